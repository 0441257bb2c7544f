#!/usr/bin/env python3
"""The soak run's halves (tools/soak_run.sh and tools/compare_run.sh drive
them).

  python3 tools/soak.py preage DB HOURS
      Fills DB (made by the agent: its schema, tanks and sample sets) with
      HOURS of history ending 20 s ago, at the agent's own thinning: a
      block of every sample set every 10 s before the last 2 h, every second
      within them, each tank with a good level and pressure as the load
      site's samples have, packed as the agent packs them. The trim progress
      row is left as a daemon that kept up would leave it: thinned up to
      2 h ago, nothing removed, so the first trims must remove everything
      older than 24 h. One transaction per sample set.

  python3 tools/soak.py preage-rows DB SITE HOURS
      The same history for the plain Python poller (tools/plain_poller.py):
      a row per sample in its own table.

  python3 tools/soak.py watch DB AGENT_PID SECONDS NOTE_EVERY_S EVENT OUT.json
      Watches a running agent for SECONDS: its heartbeat (read 10 times a
      second; the gap is between successive beats the daemon wrote), a
      `leaktally leak note EVENT ...` every NOTE_EVERY_S seconds timed from
      start to acknowledgement (in a thread, so the heartbeat watch goes
      on), its CPU time and peak memory from /proc, the database's and the
      WAL's size, and the load average. Writes the figures to OUT.json.
"""
import json
import os
import sqlite3
import struct
import subprocess
import sys
import threading
import time

HOUR = 3_600_000


def block(levels, pressure_pa):
    """A packed block as the agent stores it (store::samples): a format
    byte, then per tank a leak-flag byte (0: not mapped), the level and
    pressure qualities (good, good), the transfer and temperature qualities
    (not mapped), then the two values as little-endian f64."""
    out = bytearray(b"\x01")
    for level in levels:
        out += b"\x00\x11\x00" + struct.pack("<dd", level, pressure_pa)
    return bytes(out)


def preage(db, hours):
    """Fills the agent's sample sets with HOURS of history ending 20 s ago,
    at its thinning: a block per set every 10 s before the last 2 h, every
    second within them. Also, with --rows TABLE, the plain poller's table
    of a row per sample (tools/plain_poller.py) in another database."""
    now = int(time.time() * 1000) - 20_000
    c = sqlite3.connect(db)
    c.execute("PRAGMA synchronous = OFF")
    sets = c.execute("SELECT id FROM sample_sets ORDER BY id").fetchall()
    full_from = (now - 2 * HOUR) // 10_000 * 10_000
    thin_from = (now - hours * HOUR) // 10_000 * 10_000
    began = time.time()
    samples = 0
    for n, (set_id,) in enumerate(sets):
        slots = c.execute("SELECT COUNT(*) FROM sample_set_slots WHERE sample_set = ?", (set_id,)).fetchone()[0]
        # Each device polls at its own moment in the second.
        offset = (n % 20) * 37
        times = list(range(thin_from + offset, full_from, 10_000)) + list(range(full_from + offset, now, 1000))
        with c:
            c.executemany(
                "INSERT OR IGNORE INTO sample_blocks (sample_set, at_ms, data) VALUES (?, ?, ?)",
                ((set_id, at, block([2.0 + 7.0 * (((n * 50 + k) * 37) % 100) / 100.0 + 0.001 * ((i * 7919) % 1000) / 1000.0
                                     for k in range(slots)], 5000.0 + ((i * 104729) % 40) - 20))
                 for i, at in enumerate(times)),
            )
        samples += slots * len(times)
    with c:
        c.execute("""INSERT INTO trim_progress (id, thinned_before_ms, removed_before_ms) VALUES (1, ?, ?)
                     ON CONFLICT (id) DO UPDATE SET thinned_before_ms = excluded.thinned_before_ms,
                                                    removed_before_ms = excluded.removed_before_ms""",
                  (full_from, thin_from))
    c.execute("PRAGMA wal_checkpoint(TRUNCATE)")
    c.close()
    flush(db)
    print(f"pre-aged {len(sets)} sample sets with {hours} h of history: {samples:,} samples, "
          f"{os.path.getsize(db) / 1e9:.2f} GB, in {time.time() - began:.0f} s")


def preage_rows(db, site, hours):
    """The plain poller's database pre-aged the same way: a row per sample,
    every 10 s before the last 2 h and every second within them."""
    import tomllib
    tanks = [t["id"] for t in tomllib.load(open(site, "rb"))["tank"]]
    now = int(time.time() * 1000) - 20_000
    c = sqlite3.connect(db)
    c.execute("PRAGMA journal_mode = WAL")
    c.execute("PRAGMA synchronous = OFF")
    c.execute("CREATE TABLE IF NOT EXISTS readings (tank TEXT NOT NULL, at_ms INTEGER NOT NULL, level_m REAL, pressure_pa REAL)")
    c.execute("CREATE INDEX IF NOT EXISTS readings_by_tank ON readings (tank, at_ms)")
    full_from = (now - 2 * HOUR) // 10_000 * 10_000
    thin_from = (now - hours * HOUR) // 10_000 * 10_000
    times = list(range(thin_from, full_from, 10_000)) + list(range(full_from, now, 1000))
    began = time.time()
    # In time order, as the poller writes them.
    with c:
        for i, at in enumerate(times):
            c.executemany("INSERT INTO readings VALUES (?, ?, ?, ?)",
                          ((tag, at, 2.0 + 0.001 * ((i * 7919) % 1000) / 1000.0, 5000.0) for tag in tanks))
    c.execute("PRAGMA wal_checkpoint(TRUNCATE)")
    c.close()
    flush(db)
    print(f"pre-aged the plain poller's database with {hours} h of {len(tanks)} tanks: "
          f"{len(times) * len(tanks):,} rows, {os.path.getsize(db) / 1e9:.2f} GB, in {time.time() - began:.0f} s")


def flush(db):
    """Written with synchronous = OFF: flush it now, or the first checkpoint
    of whatever runs on it pays for the whole file's fsync."""
    fd = os.open(db, os.O_RDONLY)
    os.fsync(fd)
    os.close(fd)


def proc_cpu_s(pid):
    fields = open(f"/proc/{pid}/stat").read().rsplit(")", 1)[1].split()
    return (int(fields[11]) + int(fields[12])) / os.sysconf("SC_CLK_TCK")


def proc_status(pid, key):
    for line in open(f"/proc/{pid}/status"):
        if line.startswith(key + ":"):
            return int(line.split()[1])
    return 0


def watch(db, pid, seconds, note_every, event, out):
    pid, seconds, note_every = int(pid), float(seconds), float(note_every)
    ro = sqlite3.connect(f"file:{db}?mode=ro", uri=True, timeout=5)
    leaktally = os.path.join(os.path.dirname(os.path.abspath(__file__)), "..", "target", "release", "leaktally")
    notes, lock = [], threading.Lock()

    def note(n):
        t0 = time.monotonic()
        done = subprocess.run([leaktally, "leak", "note", str(event), f"soak note {n}", "--db", db],
                              capture_output=True, text=True)
        took = time.monotonic() - t0
        with lock:
            notes.append({"n": n, "seconds": took, "ok": done.returncode == 0,
                          "said": (done.stdout + done.stderr).strip()[:300]})

    beats, last_beat, largest_gap, largest_stale = [], None, 0.0, 0.0
    samples = []
    t_start = time.monotonic()
    cpu0 = proc_cpu_s(pid)
    next_note, next_sample, n = t_start + note_every, t_start, 0
    threads = []
    while time.monotonic() - t_start < seconds:
        now = time.monotonic()
        try:
            beat = ro.execute("SELECT beat_wall_ms FROM daemon WHERE id = 1").fetchone()[0]
        except sqlite3.Error:
            beat = None
        wall = time.time() * 1000
        if beat is not None:
            largest_stale = max(largest_stale, (wall - beat) / 1000)
            if last_beat is not None and beat != last_beat:
                largest_gap = max(largest_gap, (beat - last_beat) / 1000)
                beats.append(beat)
            last_beat = beat
        if now >= next_note:
            n += 1
            t = threading.Thread(target=note, args=(n,))
            t.start()
            threads.append(t)
            next_note += note_every
        if now >= next_sample:
            q = lambda p: ro.execute(f"PRAGMA {p}").fetchone()[0]
            try:
                in_use = (q("page_count") - q("freelist_count")) * q("page_size")
            except sqlite3.Error:
                in_use = None
            wal = db + "-wal"
            samples.append({
                "t": now - t_start,
                "db_bytes": os.path.getsize(db),
                "in_use_bytes": in_use,
                "wal_bytes": os.path.getsize(wal) if os.path.exists(wal) else 0,
                "rss_kb": proc_status(pid, "VmRSS"),
                "load1": float(open("/proc/loadavg").read().split()[0]),
            })
            next_sample += 5
        time.sleep(0.1)
    cpu1 = proc_cpu_s(pid)
    wall_s = time.monotonic() - t_start
    for t in threads:
        t.join()
    peak_kb = proc_status(pid, "VmHWM")
    actions = ro.execute("""SELECT max(handled_at_ms - requested_at_ms), avg(handled_at_ms - requested_at_ms), count(*)
                            FROM actions WHERE kind = 'note'""").fetchone()
    result = {
        "seconds": wall_s,
        "cpu_percent": 100 * (cpu1 - cpu0) / wall_s,
        "peak_rss_mib": peak_kb / 1024,
        "largest_heartbeat_gap_s": largest_gap,
        "largest_heartbeat_age_s": largest_stale,
        "beats": len(beats),
        "notes": len(notes),
        "notes_failed": [x for x in notes if not x["ok"]],
        "largest_note_ack_s": max((x["seconds"] for x in notes), default=None),
        "median_note_ack_s": sorted(x["seconds"] for x in notes)[len(notes) // 2] if notes else None,
        "largest_note_handling_ms": actions[0],
        "mean_note_handling_ms": actions[1],
        "samples": samples,
    }
    with open(out, "w") as f:
        json.dump(result, f, indent=1)


if __name__ == "__main__":
    if len(sys.argv) >= 2 and sys.argv[1] == "preage" and len(sys.argv) == 4:
        preage(sys.argv[2], int(sys.argv[3]))
    elif len(sys.argv) >= 2 and sys.argv[1] == "preage-rows" and len(sys.argv) == 5:
        preage_rows(sys.argv[2], sys.argv[3], int(sys.argv[4]))
    elif len(sys.argv) >= 2 and sys.argv[1] == "watch" and len(sys.argv) == 8:
        watch(*sys.argv[2:])
    else:
        sys.exit(__doc__)

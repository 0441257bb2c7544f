#!/usr/bin/env bash
# The soak run of BENCHMARKS.md: the load site of tools/load_run.sh (TANKS
# tanks over DEVICES devices, polled every second) on a database pre-aged
# with 26 h of history at the agent's own thinning, run for MINUTES (the
# agent trims once a minute, so that many trim cycles; the first removes the
# 2 h older than 24 h). An operator's `leak note` every 5 s is timed to its
# acknowledgement. Reports the largest heartbeat gap, the largest operator
# delay, CPU, peak memory, the database's and the WAL's size over the run,
# the trim cycles from the agent's log, and the time to stop on SIGTERM.
#
#   bash tools/soak_run.sh [TANKS] [DEVICES] [MINUTES]   (default 1000 20 10)
#
# Needs release binaries (cargo build --release --workspace) and about 2 GB
# of space in the temp folder. Run it on a quiet machine; it prints the load
# average so that a busy one shows. Everything runs on 127.0.0.1 and stops by
# itself.
set -euo pipefail
cd "$(dirname "${BASH_SOURCE[0]}")/.."
tanks=${1:-1000}; devices=${2:-20}; minutes=${3:-10}
bin=target/release
[[ -x $bin/leaktally && -x $bin/leaktally-sim ]] || { echo "build first: cargo build --release --workspace" >&2; exit 1; }
work=$(mktemp -d)
sim_pid=; agent_pid=
cleanup() {
  [[ -n $agent_pid ]] && kill $agent_pid 2>/dev/null || true
  [[ -n $sim_pid ]] && kill $sim_pid 2>/dev/null || true
  wait 2>/dev/null || true
  rm -rf "$work"
}
trap cleanup EXIT
echo "== soak: $tanks tanks, $devices devices, $minutes min; load average at start: $(cut -d' ' -f1-3 /proc/loadavg)"
port=$(python3 -c 'import socket; s=socket.socket(); s.bind(("127.0.0.1",0)); print(s.getsockname()[1]); s.close()')
python3 tools/load_site.py "$work" "$tanks" "$devices" "$port"
db=$work/soak.db

# The schema and the tanks, from the agent itself (nobody answers yet).
$bin/leaktally run --config "$work/site.toml" --db "$db" 2> "$work/init.log" &
agent_pid=$!
sleep 3
kill -TERM $agent_pid; wait $agent_pid || true; agent_pid=
python3 tools/soak.py preage "$db" 26

$bin/leaktally-sim --scenario "$work/scenario.toml" --listen "127.0.0.1:$port" > "$work/sim.out" 2> "$work/sim.err" &
sim_pid=$!
sleep 2
launched=$(date +%s.%N)
$bin/leaktally run --config "$work/site.toml" --db "$db" 2> "$work/agent.log" &
agent_pid=$!
until grep -q "leaktally daemon started" "$work/agent.log"; do
  kill -0 $agent_pid 2>/dev/null || { cat "$work/agent.log"; exit 1; }
  sleep 0.2
done
started=$(date +%s.%N)
sleep 3
$bin/leaktally leak open --tank LT-0001 --hole-height 0.2 --cd 0.61 --since 2s --db "$db" 2>/dev/null
python3 tools/soak.py watch "$db" $agent_pid $((minutes * 60)) 5 1 "$work/watch.json"
stop_began=$(date +%s.%N)
kill -TERM $agent_pid
wait $agent_pid && agent_status=0 || agent_status=$?
stop_ended=$(date +%s.%N)
agent_pid=
cp "$work/agent.log" /tmp/soak-agent.log
python3 - "$work/watch.json" "$work/agent.log" "$launched" "$started" "$stop_began" "$stop_ended" "$agent_status" "$tanks" <<'PY'
import json, re, sys
w = json.load(open(sys.argv[1])); log = open(sys.argv[2]).read()
launched, started, stop_began, stop_ended = map(float, sys.argv[3:7])
status, tanks = int(sys.argv[7]), int(sys.argv[8])
trims = re.findall(r"trimmed the rolling history: (\d+) samples in (\d+) chunk\(s\) over ([\d.]+) s, the longest (\d+) ms; the longest WAL checkpoint since the last trim (\d+) ms", log)
print(f"start to heartbeat (integrity check of the pre-aged file included): {started - launched:.1f} s")
print(f"watched {w['seconds']:.0f} s: {w['beats']} beats, largest heartbeat gap {w['largest_heartbeat_gap_s']:.2f} s, "
      f"oldest heartbeat seen {w['largest_heartbeat_age_s']:.2f} s")
print(f"operator notes: {w['notes']}, failed {len(w['notes_failed'])}; acknowledged within {w['largest_note_ack_s']:.2f} s at most "
      f"(median {w['median_note_ack_s']:.2f} s, CLI start to answer); daemon handled each within {w['largest_note_handling_ms']} ms "
      f"(mean {w['mean_note_handling_ms']:.0f} ms) of its request")
for f in w["notes_failed"][:3]:
    print("  failed note:", f)
print(f"agent CPU {w['cpu_percent']:.2f} % of one core; peak resident memory {w['peak_rss_mib']:.1f} MiB")
for i, (rows, chunks, secs, longest, cp) in enumerate(trims, 1):
    print(f"trim cycle {i}: {int(rows):,} samples removed in {chunks} chunk(s) over {secs} s, longest chunk {longest} ms, "
          f"longest checkpoint in the minute before {cp} ms")
s = w["samples"]
print("database over the run (every minute): file GB / in use GB / WAL MB / load1")
for x in s[::12]:
    inuse = "?" if x["in_use_bytes"] is None else f"{x['in_use_bytes'] / 1e9:.3f}"
    print(f"  {x['t']:6.0f} s  {x['db_bytes'] / 1e9:.3f}  {inuse}  {x['wal_bytes'] / 1e6:6.1f}  {x['load1']:.2f}")
print(f"largest WAL {max(x['wal_bytes'] for x in s) / 1e6:.1f} MB; mean load average {sum(x['load1'] for x in s) / len(s):.2f}")
print(f"SIGTERM to exit: {stop_ended - stop_began:.2f} s, exit status {status}")
print(next((l for l in log.splitlines() if "daemon stopped" in l), "no stop line in the log"))
PY
echo "load average at the end: $(cut -d' ' -f1-3 /proc/loadavg); the agent's log is in /tmp/soak-agent.log"

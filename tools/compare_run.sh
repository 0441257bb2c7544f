#!/usr/bin/env bash
# The side-by-side of BENCHMARKS.md ("Per-sample cost"): the agent, a plain
# Python poller (tools/plain_poller.py) and a floor program (the `floor`
# example: raw tokio-modbus reads and raw rusqlite inserts of the agent's
# rows, nothing else) poll the same simulated site, one after the other,
# each on a database pre-aged with HOURS of history (the steady state of the
# rolling window), for SECONDS after a WARMUP. CPU time (user + system) comes
# from /proc, stored samples from the database; the figure is CPU per stored
# sample, and the ratios between the three. RUNS repeats the three and ends
# with medians.
#
#   bash tools/compare_run.sh [TANKS] [DEVICES] [SECONDS] [RUNS] [HOURS]
#                             (default 1000 20 100 3 26)
#
# Needs release builds (cargo build --release --workspace --bins --examples) and
# builds target/bench-venv from tests/python/requirements.txt (pymodbus) on
# first use. Run it on a quiet machine; it prints the load average. Uses
# about 1.5 GB in the temp folder at 1,000 tanks and 26 h. Everything runs
# on 127.0.0.1 and stops by itself.
set -euo pipefail
cd "$(dirname "${BASH_SOURCE[0]}")/.."
tanks=${1:-1000}; devices=${2:-20}; seconds=${3:-100}; runs=${4:-3}; hours=${5:-26}
warmup=30
bin=target/release
for b in $bin/leaktally $bin/leaktally-sim $bin/examples/floor; do
  [[ -x $b ]] || { echo "build first: cargo build --release --workspace --bins --examples ($b is missing)" >&2; exit 1; }
done
venv=target/bench-venv
if ! cmp -s tests/python/requirements.txt "$venv/requirements.txt" 2>/dev/null; then
  rm -rf "$venv"
  python3 -m venv "$venv"
  "$venv/bin/pip" install -q -r tests/python/requirements.txt
  cp tests/python/requirements.txt "$venv/requirements.txt"
fi
work=$(mktemp -d)
sim_pid=; pid=
cleanup() {
  [[ -n $pid ]] && kill $pid 2>/dev/null || true
  [[ -n $sim_pid ]] && kill $sim_pid 2>/dev/null || true
  wait 2>/dev/null || true
  rm -rf "$work"
}
trap cleanup EXIT
echo "== per-sample cost: $tanks tanks, $devices devices, ${seconds} s after ${warmup} s, $runs run(s), $hours h of history; load average $(cut -d' ' -f1-3 /proc/loadavg)"
port=$(python3 -c 'import socket; s=socket.socket(); s.bind(("127.0.0.1",0)); print(s.getsockname()[1]); s.close()')
python3 tools/load_site.py "$work" "$tanks" "$devices" "$port"
site=$work/site.toml

# The agent's schema, tanks and sample sets: one start against nobody.
$bin/leaktally run --config "$site" --db "$work/pristine.db" 2> "$work/init.log" &
pid=$!; sleep 3; kill -TERM $pid; wait $pid || true; pid=
python3 tools/soak.py preage "$work/pristine.db" "$hours"
"$venv/bin/python" tools/soak.py preage-rows "$work/pristine-rows.db" "$site" "$hours"

$bin/leaktally-sim --scenario "$work/scenario.toml" --listen "127.0.0.1:$port" > "$work/sim.out" 2> "$work/sim.err" &
sim_pid=$!
sleep 2

# Samples stored after a mark: a block's tanks, or a row.
stored() { "$venv/bin/python" - "$1" "$2" "${3:-}" <<'PY'
import sqlite3, sys
db, kind, mark = sys.argv[1], sys.argv[2], sys.argv[3]
c = sqlite3.connect(f"file:{db}?mode=ro", uri=True)
if kind == "rows":
    top = c.execute("SELECT COALESCE(MAX(rowid), 0) FROM readings").fetchone()[0]
    n = c.execute("SELECT COUNT(*) FROM readings WHERE rowid > ?", (int(mark or top),)).fetchone()[0]
else:
    top = c.execute("SELECT COALESCE(MAX(id), 0) FROM sample_blocks").fetchone()[0]
    n = c.execute("""SELECT COALESCE(SUM(s.n), 0) FROM sample_blocks b
                     JOIN (SELECT sample_set, COUNT(*) n FROM sample_set_slots GROUP BY sample_set) s
                     ON s.sample_set = b.sample_set WHERE b.id > ?""", (int(mark or top),)).fetchone()[0]
print(top if not mark else n)
PY
}
cpu_ticks() { awk '{print $14 + $15}' /proc/$1/stat; }
hz=$(getconf CLK_TCK)
results=$work/results.jsonl

one() {  # NAME KIND DB COMMAND...
  local name=$1 kind=$2 db=$3; shift 3
  rm -f "$db" "$db-wal" "$db-shm"
  if [[ $kind == rows ]]; then cp "$work/pristine-rows.db" "$db"; else cp "$work/pristine.db" "$db"; fi
  # The copy's dirty pages on disk first, so that no program pays for them.
  sync
  "$@" 2> "$work/$name.log" &
  pid=$!
  if [[ $name == agent ]]; then
    sleep 3
    $bin/leaktally leak open --tank LT-0001 --hole-height 0.2 --cd 0.61 --since 2s --db "$db" > /dev/null
    sleep $((warmup - 3))
  else
    sleep $warmup
  fi
  local mark c0 t0 c1 t1 n rss
  mark=$(stored "$db" "$kind"); c0=$(cpu_ticks $pid); t0=$(date +%s.%N)
  sleep "$seconds"
  c1=$(cpu_ticks $pid); t1=$(date +%s.%N)
  rss=$(awk '/VmHWM/ {print $2}' /proc/$pid/status)
  kill -TERM $pid; wait $pid || true; pid=
  n=$(stored "$db" "$kind" "$mark")
  python3 - "$name" "$c0" "$c1" "$hz" "$t0" "$t1" "$n" "$rss" "$(cut -d' ' -f1 /proc/loadavg)" >> "$results" <<'PY'
import json, sys
name, c0, c1, hz, t0, t1, n, rss, load = sys.argv[1:]
cpu = (int(c1) - int(c0)) / int(hz)
wall = float(t1) - float(t0)
print(json.dumps({"name": name, "cpu_s": cpu, "wall_s": wall, "samples": int(n),
                  "us_per_sample": 1e6 * cpu / max(int(n), 1), "cpu_percent": 100 * cpu / wall,
                  "samples_per_s": int(n) / wall, "peak_rss_mib": int(rss) / 1024, "load1": float(load)}))
PY
  tail -1 "$results"
}

for ((run = 1; run <= runs; run++)); do
  echo "== run $run of $runs"
  one agent blocks "$work/agent.db" $bin/leaktally run --config "$site" --db "$work/agent.db"
  one python rows "$work/rows.db" "$venv/bin/python" tools/plain_poller.py "$site" "$work/rows.db"
  one floor blocks "$work/floor.db" $bin/examples/floor "$site" "$work/floor.db"
done

python3 - "$results" <<'PY'
import json, statistics, sys
rows = [json.loads(l) for l in open(sys.argv[1])]
by = {}
for r in rows:
    by.setdefault(r["name"], []).append(r)
med = lambda name, key: statistics.median(r[key] for r in by[name])
print(f"== medians of {len(by['agent'])} run(s) (min .. max)")
for name in ("agent", "python", "floor"):
    us = [r["us_per_sample"] for r in by[name]]
    print(f"{name:7s} {med(name, 'us_per_sample'):7.2f} µs CPU per stored sample ({min(us):.2f} .. {max(us):.2f}); "
          f"{med(name, 'cpu_percent'):5.2f} % of a core; {med(name, 'samples_per_s'):6.0f} samples/s; "
          f"peak RSS {med(name, 'peak_rss_mib'):.1f} MiB")
a, p, f = med("agent", "us_per_sample"), med("python", "us_per_sample"), med("floor", "us_per_sample")
print(f"the Python poller costs {p / a:.1f} times the agent per sample; the agent costs {a / f:.2f} times the floor")
print(f"load average over the runs: {min(r['load1'] for r in rows):.2f} .. {max(r['load1'] for r in rows):.2f}")
PY

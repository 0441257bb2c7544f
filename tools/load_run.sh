#!/usr/bin/env bash
# The load run of BENCHMARKS.md: the simulator serves TANKS tanks over
# DEVICES devices, the agent polls them every second for SECONDS, and this
# script samples the agent's CPU time and resident memory from /proc, then
# reads the poll latency from its metrics and the database's growth. With
# RUNS above 1 it repeats the whole run (fresh simulator, agent and
# database each time) and ends with the median of every figure.
#
#   bash tools/load_run.sh [TANKS] [DEVICES] [SECONDS] [RUNS]   (default 1000 20 300 1)
#
# Needs release binaries: cargo build --release --workspace. Everything runs
# on 127.0.0.1 and stops by itself.
set -euo pipefail
cd "$(dirname "${BASH_SOURCE[0]}")/.."
tanks=${1:-1000}; devices=${2:-20}; seconds=${3:-300}; runs=${4:-1}
bin=target/release
[[ -x $bin/leaktally && -x $bin/leaktally-sim ]] || { echo "build first: cargo build --release --workspace" >&2; exit 1; }
results=$(mktemp)
sim_pid=; agent_pid=; work=
# Stops this run's processes and waits for them, so that runs never overlap;
# also on an error or Ctrl-C part way through.
cleanup() {
  kill $sim_pid $agent_pid 2>/dev/null || true
  wait $sim_pid $agent_pid 2>/dev/null || true
  sim_pid=; agent_pid=
  [[ -n $work ]] && rm -rf "$work"
  work=
}
trap 'cleanup; rm -f "$results"' EXIT

one_run() {
work=$(mktemp -d)
port=$(python3 -c 'import socket; s=socket.socket(); s.bind(("127.0.0.1",0)); print(s.getsockname()[1]); s.close()')
python3 tools/load_site.py "$work" "$tanks" "$devices" "$port"
$bin/leaktally check --offline --config "$work/site.toml" > /dev/null
$bin/leaktally-sim --scenario "$work/scenario.toml" --listen "127.0.0.1:$port" > "$work/sim.out" 2> "$work/sim.err" &
sim_pid=$!
sleep 2
$bin/leaktally run --config "$work/site.toml" --db "$work/load.db" 2> "$work/agent.log" &
agent_pid=$!
sleep 8
$bin/leaktally leak open --tank LT-0001 --hole-height 0.2 --cd 0.61 --db "$work/load.db" > /dev/null
web=$(grep -o 'web page on http://[0-9.:]*' "$work/agent.log" | head -1 | sed 's/web page on //')
hz=$(getconf CLK_TCK)
cpu() { awk '{print $14 + $15}' /proc/$agent_pid/stat; }
rss_kb() { awk '/VmRSS/ {print $2}' /proc/$agent_pid/status; }
count() { python3 - "$work/load.db" <<'PY'
import sqlite3, sys
c = sqlite3.connect(f"file:{sys.argv[1]}?mode=ro", uri=True)
# Samples: every block's tanks (store::samples packs a poll cycle a row).
print(c.execute("""SELECT COALESCE(SUM(s.n), 0) FROM sample_blocks b
                   JOIN (SELECT sample_set, COUNT(*) n FROM sample_set_slots GROUP BY sample_set) s
                   ON s.sample_set = b.sample_set""").fetchone()[0])
PY
}
# The database's size as a reader sees it: pages in use, WAL included.
size() { python3 - "$work/load.db" <<'PY'
import sqlite3, sys
c = sqlite3.connect(f"file:{sys.argv[1]}?mode=ro", uri=True)
q = lambda p: c.execute(f"pragma {p}").fetchone()[0]
print((q("page_count") - q("freelist_count")) * q("page_size"))
PY
}
t0=$(date +%s.%N); c0=$(cpu); n0=$(count); s0=$(size); max_rss=0
for ((i = 0; i < seconds; i += 5)); do
  sleep 5
  r=$(rss_kb); (( r > max_rss )) && max_rss=$r
done
t1=$(date +%s.%N); c1=$(cpu); n1=$(count); s1=$(size)
curl -s "$web/metrics" > "$work/metrics.txt"
python3 - "$work/metrics.txt" "$t0" "$t1" "$c0" "$c1" "$hz" "$n0" "$n1" "$max_rss" "$tanks" "$s0" "$s1" "$results" <<'PY'
import json, sys
metrics, t0, t1, c0, c1, hz, n0, n1, rss, tanks, s0, s1, results = sys.argv[1:]
wall = float(t1) - float(t0)
cpu_share = (int(c1) - int(c0)) / int(hz) / wall
rows = int(n1) - int(n0)
# Poll latency from the histogram: its buckets summed over devices.
buckets, count = {}, 0
for line in open(metrics):
    if line.startswith("leaktally_poll_duration_seconds_bucket"):
        le = line.split('le="')[1].split('"')[0]
        buckets[le] = buckets.get(le, 0) + float(line.rsplit(" ", 1)[1])
    elif line.startswith("leaktally_poll_duration_seconds_count"):
        count += float(line.rsplit(" ", 1)[1])
def quantile(q):
    # As Prometheus's histogram_quantile: linear within the bucket that
    # holds the rank, from its lower bound (0 for the first).
    bounds = sorted((float("inf") if le == "+Inf" else float(le), n) for le, n in buckets.items())
    rank, lower, below = q * count, 0.0, 0.0
    for upper, n in bounds:
        if n >= rank:
            if upper == float("inf"):
                return lower
            return lower + (upper - lower) * (rank - below) / max(n - below, 1e-12)
        lower, below = upper, n
    return float("nan")
# Growth in pages in use (the WAL's included).
per_sample = (int(s1) - int(s0)) / max(rows, 1)
# Kept per tank: 2 h at 1 Hz plus 22 h at one per 10 s (the retention).
kept = 7200 + 22 * 360
print(f"wall {wall:.0f} s, tanks {tanks}")
print(f"agent CPU: {100 * cpu_share:.1f} % of one core")
print(f"agent peak RSS: {int(rss) / 1024:.1f} MiB")
print(f"samples stored: {rows / wall:.0f} per second")
print(f"poll cycle latency: median {1000 * quantile(0.5):.2f} ms, 99th percentile {1000 * quantile(0.99):.2f} ms (from the histogram)")
print(f"database: {per_sample:.0f} bytes per sample; {86400 * per_sample / 1e6:.2f} MB per tank-day at 1 Hz, "
      f"{kept * per_sample / 1e6:.2f} MB per tank kept by the rolling window ({int(tanks) * kept * per_sample / 1e9:.2f} GB for {tanks} tanks)")
with open(results, "a") as f:
    f.write(json.dumps({
        "cpu_percent": 100 * cpu_share, "rss_mib": int(rss) / 1024, "samples_per_s": rows / wall,
        "latency_median_ms": 1000 * quantile(0.5), "latency_p99_ms": 1000 * quantile(0.99),
        "bytes_per_sample": per_sample, "window_gb": int(tanks) * kept * per_sample / 1e9,
    }) + "\n")
PY
}

for ((run = 1; run <= runs; run++)); do
  echo "== run $run of $runs: $tanks tanks, $devices devices, $seconds s"
  one_run
  cleanup
done
if (( runs > 1 )); then
  python3 - "$results" <<'PY'
import json, statistics, sys
rows = [json.loads(l) for l in open(sys.argv[1])]
print(f"== medians over {len(rows)} runs (min .. max)")
for key in rows[0]:
    values = [r[key] for r in rows]
    print(f"{key}: {statistics.median(values):.3f} ({min(values):.3f} .. {max(values):.3f})")
PY
fi

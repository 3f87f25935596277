#!/usr/bin/env bash
# Benchmarks of issue 16 (README Performance, "Poisson resampling, numpy, parse floor, gzip"):
# each command once per round under /usr/bin/time -v, printing wall, CPU (user + sys), peak RSS
# and the load average before it. Needs the logs of scripts/bench.sh (bench-data/rover_1m.csv,
# rover_10m.csv) and makes bench-data/rover_1m.csv.gz if missing.
# Usage: scripts/bench_poisson.sh [rounds] [10m]
set -euo pipefail
cd "$(dirname "$0")/.."
rounds=${1:-1}
cargo build --release --bins
cargo bench --bench csv_floor --no-run 2>/dev/null
floor=$(ls -t target/release/deps/csv_floor-* | grep -v '\.d$' | head -1)
bin=target/release/gradaudit
[ -f bench-data/rover_1m.csv.gz ] || gzip -6 -c bench-data/rover_1m.csv > bench-data/rover_1m.csv.gz
t() { # name command...
  local name=$1; shift
  local load; load=$(cut -d' ' -f1 /proc/loadavg)
  /usr/bin/time -v "$@" > /tmp/bench_poisson.out 2> /tmp/bench_poisson.time
  awk -F': ' -v name="$name" -v load="$load" '
    /User time/ {u = $2} /System time/ {s = $2} /Maximum resident/ {rss = $2 / 1024}
    /Elapsed/ {n = split($2, p, ":"); w = (n == 3) ? p[1] * 3600 + p[2] * 60 + p[3] : p[1] * 60 + p[2]}
    END {printf "%-34s wall %7.2f s  cpu %7.2f s (user %.2f, sys %.2f)  rss %6.1f MB  load %s\n",
         name, w, u + s, u, s, rss, load}' /tmp/bench_poisson.time
}
for r in $(seq "$rounds"); do
  t "audit 1M multinomial" $bin audit bench-data/rover_1m.csv -q
  t "audit 1M poisson" $bin audit bench-data/rover_1m.csv -q --resampling poisson
  t "audit 1M.gz multinomial" $bin audit bench-data/rover_1m.csv.gz -q
  t "audit 1M.gz poisson" $bin audit bench-data/rover_1m.csv.gz -q --resampling poisson
  t "csv crate + fast-float, 1 thread" "$floor" bench-data/rover_1m.csv
  t "numpy audit 1M" python3 scripts/numpy_audit.py bench-data/rover_1m.csv
  if [ "${2:-}" = 10m ]; then
    t "audit 10M poisson" $bin audit bench-data/rover_10m.csv -q --resampling poisson
    t "audit 10M multinomial" $bin audit bench-data/rover_10m.csv -q
  fi
done

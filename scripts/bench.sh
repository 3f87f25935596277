#!/usr/bin/env bash
# End-to-end benchmarks of gradaudit: builds the benchmark logs (if missing) with
# examples/make_rollouts, then measures wall time (hyperfine, median of runs) and peak RSS
# (/usr/bin/time -v). Needs hyperfine (Debian package) and about 25 GB of free disk.
# Usage: scripts/bench.sh [quick]   (quick: the 1M log only)
set -euo pipefail
cd "$(dirname "$0")/.."
command -v hyperfine >/dev/null || { echo "install hyperfine (apt-get install hyperfine)" >&2; exit 1; }
cargo build --release --examples --bins
bin=target/release/gradaudit
gen=target/release/examples/make_rollouts
mkdir -p bench-data bench-results
make_log() { # name episodes horizon seed
  [ -f "bench-data/$1.csv" ] || "$gen" --scenario rover --episodes "$2" --horizon "$3" \
      --score-dim 32 --dock-radius 0 --seed "$4" --out "bench-data/$1.csv"
}
make_log rover_1m 5000 200 7
if [ "${1:-}" != quick ]; then
  make_log rover_10m 50000 200 7
  make_log rover_long 100 100000 8
fi

out=bench-results/$(date +%Y%m%d-%H%M%S)
mkdir -p "$out"
{
  echo "machine: $(nproc) cores, $(free -g | awk '/Mem:/ {print $2}') GiB, $(uname -m), $(grep -m1 'model name' /proc/cpuinfo | cut -d: -f2 | xargs)"
  echo "gradaudit $($bin --version | cut -d' ' -f2), $(date -u +%Y-%m-%dT%H:%MZ)"
} | tee "$out/machine.txt"

hf() { # name runs command...
  local name=$1 runs=$2; shift 2
  hyperfine -N -w 1 -r "$runs" --export-json "$out/$name.json" "$@" >/dev/null
  python3 - "$out/$name.json" <<'PY'
import json, sys
for r in json.load(open(sys.argv[1]))["results"]:
    print(f"{r['median']:8.3f} s median  (min {r['min']:.3f}, max {r['max']:.3f})  {r['command']}")
PY
}
rss() { # command...
  /usr/bin/time -v "$@" >/dev/null 2>"$out/time.txt"
  awk -F': ' '/Maximum resident/ {rss = $2 / 1024} /Elapsed/ {wall = $2}
              END {printf "%8.1f MB peak RSS, %s wall  (/usr/bin/time -v)\n", rss, wall}' "$out/time.txt"
}
{
  echo "== parse floor and audit, 1M rows (5000 x 200, d = 32)"
  ls -l bench-data/rover_1m.csv | awk '{printf "file: %.0f MB\n", $5/1e6}'
  hf floor_1m 5 "$bin inspect bench-data/rover_1m.csv" \
                "taskset -c 0 env RAYON_NUM_THREADS=1 $bin inspect bench-data/rover_1m.csv"
  hf audit_1m 5 "$bin audit bench-data/rover_1m.csv"
  hf sweep_1m 5 "$bin sweep bench-data/rover_1m.csv --over lambda"
  rss "$bin" audit bench-data/rover_1m.csv
  echo "== threads (audit 1M, B = 8000)"
  hf threads 3 "env RAYON_NUM_THREADS=1 $bin audit bench-data/rover_1m.csv --resamples 8000" \
               "env RAYON_NUM_THREADS=2 $bin audit bench-data/rover_1m.csv --resamples 8000"
  echo "== resample scaling (audit 1M)"
  hf resamples 3 "$bin audit bench-data/rover_1m.csv --resamples 2" \
                 "$bin audit bench-data/rover_1m.csv --resamples 500" \
                 "$bin audit bench-data/rover_1m.csv --resamples 2000" \
                 "$bin audit bench-data/rover_1m.csv --resamples 8000"
  if [ "${1:-}" != quick ]; then
    echo "== 10M rows (50000 x 200)"
    hf audit_10m 3 "$bin audit bench-data/rover_10m.csv"
    rss "$bin" audit bench-data/rover_10m.csv
    echo "== long episodes (100 x 100000)"
    hf audit_long 3 "$bin audit bench-data/rover_long.csv"
    rss "$bin" audit bench-data/rover_long.csv
  fi
} | tee "$out/summary.txt"
echo "results in $out"

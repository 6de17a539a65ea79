#!/usr/bin/env bash
# Wall-clock soak: run the daemon's pipeline on the simulated stage for hours at a
# chosen speed, recording, and log its memory and CPU every minute so growth shows.
#
#   scripts/soak-wallclock.sh [DURATION] [SPEED] [OUT]
#   scripts/soak-wallclock.sh 12h 1 soak-runs      # twelve real hours at real time
#   scripts/soak-wallclock.sh 3d 60 soak-runs      # three simulated days in 1.2 hours
#
# Output: OUT/ holds the HDF5 segments, OUT/soak.log one line a minute
# (time, RSS KiB, CPU seconds), OUT/summary.json the demo's final summary.
set -euo pipefail
cd "$(dirname "$0")/.."
duration="${1:-12h}"
speed="${2:-1}"
out="${3:-soak-runs}"
mkdir -p "$out"
cargo build --release -p stilt-daemon --bin stiltd
./target/release/stiltd demo --duration "$duration" --speed "$speed" --settle 1h --json --out "$out" \
  > "$out/summary.json" &
pid=$!
trap 'kill "$pid" 2>/dev/null || true' INT TERM
echo "# utc rss_kib cpu_s" > "$out/soak.log"
tick=$(getconf CLK_TCK)
while kill -0 "$pid" 2>/dev/null; do
  if [ -r "/proc/$pid/status" ]; then
    rss=$(awk '/^VmRSS:/ {print $2}' "/proc/$pid/status")
    cpu=$(awk -v t="$tick" '{printf "%.1f", ($14 + $15) / t}' "/proc/$pid/stat")
    echo "$(date -u +%FT%TZ) $rss $cpu" >> "$out/soak.log"
  fi
  sleep 60
done
wait "$pid"
echo "soak done: $out/summary.json, memory log $out/soak.log"

#!/usr/bin/env bash
# Benchmark (not a test): CPU used by `stiltd run` while it polls the three HIL instruments
# over ptys — tiltmeter, thermometer and heater supply each at 10 Hz (the HIL stage with the
# thermometer's poll_hz and the control rate raised to 10 Hz), no recording.
#
#   daemon/benches/acquire-cpu.sh [SECONDS]     (default 60; run from the repository root)
#
# Reads the daemon's utime+stime from /proc/PID/stat after a 5 s warm-up and again SECONDS
# later, and prints the share of one core. Target: ≤ 1 % of one core.
set -euo pipefail
secs="${1:-60}"
root="$(cd "$(dirname "$0")/../.." && pwd)"
cd "$root"
cargo build --release --offline -q -p stilt-daemon -p stilt-hil-sim --bins
bin="${CARGO_TARGET_DIR:-$root/target}/release"
work="$(mktemp -d)"
trap 'kill $sim $daemon 2>/dev/null || true; rm -rf "$work"' EXIT
sed -e 's/^poll_hz = 2.0/poll_hz = 10.0/' -e '/^\[control\]/,/^\[/ s/^rate_hz = 1.0/rate_hz = 10.0/' \
    config/examples/hil/stage.toml > "$work/stage.toml"
grep -q '^poll_hz = 10.0' "$work/stage.toml"
mkfifo "$work/sim.out"
"$bin/stilt-hil-sim" --port-map "$work/hil-ports.toml" > "$work/sim.out" 2> "$work/sim.log" &
sim=$!
read -r -t 15 line < "$work/sim.out" && [ "$line" = ready ] || { echo "simulator not ready" >&2; exit 1; }
cat "$work/sim.out" > /dev/null &
"$bin/stiltd" run --config "$work/stage.toml" --port-map "$work/hil-ports.toml" --no-record \
    --duration $((secs + 10)) --summary-json > "$work/summary.json" 2> "$work/daemon.log" &
daemon=$!
ticks() { awk '{print $14 + $15}' "/proc/$1/stat"; }
hz=$(getconf CLK_TCK)
sleep 5
a=$(ticks $daemon); sa=$(ticks $sim); t0=$(date +%s.%N)
sleep "$secs"
b=$(ticks $daemon); sb=$(ticks $sim); t1=$(date +%s.%N)
wait $daemon
awk -v a="$a" -v b="$b" -v sa="$sa" -v sb="$sb" -v t0="$t0" -v t1="$t1" -v hz="$hz" 'BEGIN {
  dt = t1 - t0;
  printf "window %.1f s: stiltd %.3f s CPU = %.2f %% of one core; stilt-hil-sim %.3f s = %.2f %%\n",
    dt, (b - a) / hz, 100 * (b - a) / hz / dt, (sb - sa) / hz, 100 * (sb - sa) / hz / dt }'
python3 - "$work/summary.json" <<'PY' 2>/dev/null || cat "$work/summary.json"
import json, sys
s = json.load(open(sys.argv[1]))
print("ticks", s["ticks"], "tilt samples", s["tilt_samples"], "unusable", s["tilt_bad"])
for c in s["channels"]:
    print(f'  {c["name"]:16} requests {c["requests"]:6} timeouts {c["timeouts"]} bad frames {c["bad_frames"]} reconnects {c["reconnects"]}')
PY
echo "machine: $(nproc) cores, $(lscpu | sed -n 's/^Model name: *//p')"

#!/usr/bin/env bash
# Benchmark (not a test): CPU used by `stiltd run` while it polls the three HIL instruments
# over ptys — tiltmeter, thermometer and heater supply each at 10 Hz (the HIL stage with the
# thermometer's poll_hz and the control rate raised to 10 Hz), no recording.
#
#   daemon/benches/acquire-cpu.sh [SECONDS [RUNS]]    (defaults 60 and 3; from the repository root)
#
# Each run starts the simulator and the daemon afresh, waits 5 s, then measures SECONDS of
# the daemon's CPU time (the sum of its threads' run time in /proc/PID/task/*/schedstat,
# which the scheduler keeps in nanoseconds) and prints the share of one core; the last line
# is the median over the runs. Target: ≤ 1 % of one core.
#
# Same-run comparison: with BASELINE_BIN=DIR (a directory holding an older build's `stiltd`
# and `stilt-hil-sim`) the runs alternate new, baseline, new, baseline … and the last line
# gives both medians and their ratio. Machines here are shared and noisy: compare builds
# only within one such run.
set -euo pipefail
secs="${1:-60}"
runs="${2:-3}"
root="$(cd "$(dirname "$0")/../.." && pwd)"
cd "$root"
cargo build --release --offline -q -p stilt-daemon -p stilt-hil-sim --bins
bin="${CARGO_TARGET_DIR:-$root/target}/release"
work="$(mktemp -d)"
sim=""
daemon=""
trap 'kill $sim $daemon 2>/dev/null || true; rm -rf "$work"' EXIT
sed -e 's/^poll_hz = 2.0/poll_hz = 10.0/' -e '/^\[control\]/,/^\[/ s/^rate_hz = 1.0/rate_hz = 10.0/' \
    config/examples/hil/stage.toml > "$work/stage.toml"
grep -q '^poll_hz = 10.0' "$work/stage.toml"

# CPU time of every thread of process $1, ns.
cpu_ns() { cat /proc/"$1"/task/*/schedstat 2>/dev/null | awk '{t += $1} END {printf "%d\n", t}'; }

# One run with the binaries in $1; prints "DAEMON_PCT SIM_PCT" on stdout, details on stderr.
one_run() {
  local dir="$1" a b sa sb t0 t1
  rm -f "$work/sim.out" "$work/hil-ports.toml"
  mkfifo "$work/sim.out"
  "$dir/stilt-hil-sim" --port-map "$work/hil-ports.toml" > "$work/sim.out" 2> "$work/sim.log" &
  sim=$!
  local line=""
  read -r -t 15 line < "$work/sim.out" && [ "$line" = ready ] || { echo "simulator not ready" >&2; exit 1; }
  cat "$work/sim.out" > /dev/null &
  "$dir/stiltd" run --config "$work/stage.toml" --port-map "$work/hil-ports.toml" --no-record \
      --duration $((secs + 10)) --summary-json > "$work/summary.json" 2> "$work/daemon.log" &
  daemon=$!
  sleep 5
  a=$(cpu_ns $daemon); sa=$(cpu_ns $sim); t0=$(date +%s%N)
  sleep "$secs"
  b=$(cpu_ns $daemon); sb=$(cpu_ns $sim); t1=$(date +%s%N)
  wait $daemon || { echo "stiltd failed; its log:" >&2; tail -20 "$work/daemon.log" >&2; exit 1; }
  kill $sim 2>/dev/null || true
  wait $sim 2>/dev/null || true
  python3 - "$work/summary.json" >&2 <<'PY' 2>/dev/null || cat "$work/summary.json" >&2
import json, sys
s = json.load(open(sys.argv[1]))
print("  ticks", s["ticks"], "tilt samples", s["tilt_samples"], "unusable", s["tilt_bad"])
for c in s["channels"]:
    print(f'    {c["name"]:16} requests {c["requests"]:6} timeouts {c["timeouts"]} bad frames {c["bad_frames"]} reconnects {c["reconnects"]}')
PY
  awk -v a="$a" -v b="$b" -v sa="$sa" -v sb="$sb" -v t0="$t0" -v t1="$t1" \
      'BEGIN { dt = t1 - t0; printf "%.3f %.3f\n", 100 * (b - a) / dt, 100 * (sb - sa) / dt }'
}

median() { sort -g | awk '{v[NR] = $1} END {print (NR % 2) ? v[(NR + 1) / 2] : (v[NR / 2] + v[NR / 2 + 1]) / 2}'; }

new=()
old=()
for i in $(seq 1 "$runs"); do
  # Not in a subshell: the trap must see the pids, and a failed run must end the script.
  one_run "$bin" > "$work/run.out"
  read -r d s < "$work/run.out"
  echo "run $i: stiltd $d % of one core, stilt-hil-sim $s % (this build)"
  new+=("$d")
  if [ -n "${BASELINE_BIN:-}" ]; then
    one_run "$BASELINE_BIN" > "$work/run.out"
    read -r d s < "$work/run.out"
    echo "run $i: stiltd $d % of one core, stilt-hil-sim $s % (baseline $BASELINE_BIN)"
    old+=("$d")
  fi
done
m=$(printf '%s\n' "${new[@]}" | median)
if [ -n "${BASELINE_BIN:-}" ]; then
  mo=$(printf '%s\n' "${old[@]}" | median)
  awk -v m="$m" -v mo="$mo" -v n="$runs" -v s="$secs" 'BEGIN {
    printf "median over %d runs of %d s: stiltd %.2f %% of one core (baseline %.2f %%, ratio %.2f); target <= 1 %%\n", n, s, m, mo, m / mo }'
else
  awk -v m="$m" -v n="$runs" -v s="$secs" 'BEGIN {
    printf "median over %d runs of %d s: stiltd %.2f %% of one core; target <= 1 %%\n", n, s, m }'
fi
echo "machine: $(nproc) cores, $(lscpu | sed -n 's/^Model name: *//p'), load average $(cut -d' ' -f1-3 /proc/loadavg)"

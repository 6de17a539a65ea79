#!/usr/bin/env bash
# Recording benchmark: the Rust segment writer and the h5py equivalent, side by side,
# on the same rows, chunk size (4096), filters (shuffle + deflate) and batches (4096).
# Usage: bench/recorder.sh   (needs python3 with h5py: pip install h5py)
set -euo pipefail
cd "$(dirname "$0")/.."
export STILT_BENCH_DIR="${STILT_BENCH_DIR:-$PWD/target/bench-record}"
mkdir -p "$STILT_BENCH_DIR"
echo "== machine: $(nproc) cores, $(lscpu | sed -n 's/^Model name: *//p')"
echo "== Rust (cargo bench -p stilt-daemon --bench record)"
cargo bench -p stilt-daemon --bench record
echo "== h5py (bench/h5py_append.py)"
python3 bench/h5py_append.py "$STILT_BENCH_DIR/rows.h5" "$STILT_BENCH_DIR"

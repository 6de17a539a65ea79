#!/usr/bin/env python3
"""The h5py side of the recording benchmark (run by bench/recorder.sh).

Reads the tilt rows the Rust benchmark wrote (rows.h5) into memory, then appends them
to a new SWMR file exactly as the Rust writer does: same compound dtype, chunks of 4096
rows, shuffle + deflate (gzip) level 1, unlimited first dimension, batches of 4096 rows,
each batch = resize + write + Dataset.flush(); at the end flush and close (h5py has no
fsync; the Rust figure includes one fsync at close). Prints rows/s and bytes per row.
"""
import os
import statistics
import sys
import time

import h5py

BATCH = 4096
REPEATS = 5


def append(rows, path, level):
    if os.path.exists(path):
        os.remove(path)
    t0 = time.perf_counter()
    with h5py.File(path, "w", libver="latest") as f:
        ds = f.create_dataset("tilt", shape=(0,), maxshape=(None,), dtype=rows.dtype,
                              chunks=(BATCH,), shuffle=True, compression="gzip",
                              compression_opts=level)
        f.swmr_mode = True
        n = 0
        for a in range(0, len(rows), BATCH):
            b = rows[a:a + BATCH]
            ds.resize((n + len(b),))
            ds[n:n + len(b)] = b
            ds.flush()
            n += len(b)
        f.flush()
    return time.perf_counter() - t0


def main():
    src, out = sys.argv[1], sys.argv[2]
    with h5py.File(src, "r", libver="latest", swmr=True) as f:
        rows = f["tilt"][...]
    print(f"h5py {h5py.__version__} (HDF5 {h5py.version.hdf5_version}), {len(rows)} rows, "
          f"itemsize {rows.dtype.itemsize}")
    for level in (1, 4):
        path = os.path.join(out, f"h5py-level{level}.h5")
        times = [append(rows, path, level) for _ in range(REPEATS)]
        rate = [len(rows) / t for t in times]
        size = os.path.getsize(path)
        print(f"h5py deflate {level}: median {statistics.median(rate):,.0f} rows/s "
              f"(best {max(rate):,.0f}, worst {min(rate):,.0f}; {REPEATS} runs), "
              f"{size / len(rows):.2f} bytes per row on disk")


if __name__ == "__main__":
    main()

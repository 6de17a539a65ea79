//! Recording throughput: sustained tilt rows per second into a compressed SWMR segment,
//! and bytes per row on disk. Run with `bench/recorder.sh`, which also runs the h5py
//! equivalent (`bench/h5py_append.py`) on the same rows, chunk size, filters and batches.
//!
//! Rows are the invented tilt rows of the tests (a slow sine with noise in the low bits,
//! demo data); the reference file `rows.h5` in `$STILT_BENCH_DIR` holds exactly the rows
//! appended here, for the Python side to read.

#[path = "../tests/record_common/mod.rs"]
mod record_common;

use std::path::PathBuf;

use stilt_daemon::record::layout::TiltWire;
use stilt_daemon::record::{LayoutOptions, Recorder, RecorderOptions, SegmentMeta, SegmentWriter};
use stilt_daemon::rows::{RowSink, TiltSample};

/// Rows per benchmark iteration.
const ROWS: usize = 1_000_000;
/// Rows per append batch: one chunk, as the recorder appends when a chunk's worth is buffered.
const BATCH: usize = 4096;

fn bench_dir() -> PathBuf {
    let d = std::env::var_os("STILT_BENCH_DIR")
        .map(PathBuf::from)
        .unwrap_or_else(|| PathBuf::from(env!("CARGO_TARGET_TMPDIR")).join("bench-record"));
    std::fs::create_dir_all(&d).expect("bench folder");
    d
}

fn rows() -> Vec<TiltSample> {
    (0..ROWS as u64).map(record_common::tilt).collect()
}

fn meta(index: u32) -> SegmentMeta {
    let cfg = record_common::config();
    SegmentMeta {
        run_id: "bench".into(),
        segment_index: index,
        run_start_utc_ns: record_common::T0_UTC_NS,
        segment_start_utc_ns: record_common::T0_UTC_NS,
        segment_start_mono_s: 0.0,
        host: "bench".into(),
        stage_name: cfg.stage_name.clone(),
        config_toml: cfg.source_text.clone(),
        leg_names: cfg.legs.iter().map(|l| l.name.clone()).collect(),
    }
}

/// Appends `wire` to a fresh segment in chunk-sized batches (resize + write + H5Dflush
/// each), then closes it (segment_state, H5Fflush, fsync). Returns the file size.
fn write_segment(path: &std::path::Path, wire: &[TiltWire], level: u8) -> u64 {
    let _ = std::fs::remove_file(path);
    let opts = LayoutOptions {
        deflate_level: level,
        ..LayoutOptions::default()
    };
    let mut seg = SegmentWriter::create(path, &meta(0), &opts).expect("create");
    for b in wire.chunks(BATCH) {
        seg.append_tilt_wire(b).expect("append");
    }
    seg.close(0).map_err(|c| c.error).expect("close");
    std::fs::metadata(path).expect("size").len()
}

#[divan::bench(args = [1, 4], sample_count = 5, sample_size = 1)]
fn segment_append_tilt(bencher: divan::Bencher, level: u8) {
    let wire: Vec<TiltWire> = rows().iter().map(TiltWire::from).collect();
    let path = bench_dir().join(format!("rust-level{level}.h5"));
    bencher
        .counter(divan::counter::ItemsCount::new(ROWS))
        .bench_local(|| write_segment(&path, &wire, level));
}

/// The whole path: RowSink calls on this thread, the queue, the writer thread, HDF5.
/// Blocking mode, so that every row is written (nothing dropped).
#[divan::bench(sample_count = 5, sample_size = 1)]
fn recorder_sink_tilt(bencher: divan::Bencher) {
    let rows = rows();
    let cfg = record_common::config();
    let dir = bench_dir().join("sink");
    bencher
        .counter(divan::counter::ItemsCount::new(ROWS))
        .bench_local(|| {
            let _ = std::fs::remove_dir_all(&dir);
            let mut o = RecorderOptions::from_config(&cfg);
            o.dir = dir.clone();
            o.blocking = true;
            o.run_id = Some("sink".into());
            let (mut sink, _h) = Recorder::start(&cfg, o).expect("start");
            for r in &rows {
                sink.tilt(r);
            }
            let rep = sink.finish().expect("finish");
            assert_eq!(rep.tilt_rows as usize, ROWS);
        });
}

fn main() {
    // The reference rows for the Python side, and the bytes per row of each level.
    let wire: Vec<TiltWire> = rows().iter().map(TiltWire::from).collect();
    let dir = bench_dir();
    let size = write_segment(&dir.join("rows.h5"), &wire, 1);
    println!(
        "reference rows: {} ({ROWS} tilt rows, {} bytes per row in memory)",
        dir.join("rows.h5").display(),
        std::mem::size_of::<TiltWire>()
    );
    println!(
        "rust deflate 1: {:.2} bytes per row on disk",
        size as f64 / ROWS as f64
    );
    let size4 = write_segment(&dir.join("rust-level4.h5"), &wire, 4);
    println!(
        "rust deflate 4: {:.2} bytes per row on disk",
        size4 as f64 / ROWS as f64
    );
    divan::main();
}

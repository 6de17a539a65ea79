//! Round trip through the recorder: rows written and read back equal, by the project's
//! reader and by `h5dump` (HDF5's own tools, an outside reference); CSV export; drops
//! counted and reported; blocking mode; rotation by time and by size; bad options.

mod record_common;

use std::path::Path;
use std::process::Command;
use std::time::Duration;

use record_common::*;
use stilt_daemon::record::{
    LayoutOptions, Recorder, RecorderOptions, SegmentSet, StreamKind, TimeWindow, export_csv,
};
use stilt_daemon::rows::{EventKind, EventRow, RowSink};

fn opts(dir: &Path) -> RecorderOptions {
    let mut o = RecorderOptions::from_config(&config());
    o.dir = dir.to_path_buf();
    o.start_utc_ns = Some(T0_UTC_NS);
    o.flush_interval = Duration::from_millis(100);
    o
}

/// Feeds `secs` seconds of invented rows: 10 tilt rows, 1 control row per second and
/// an event every 3 s, in time order.
fn feed(sink: &mut dyn RowSink, secs: u64, legs: usize) -> (u64, u64, u64) {
    let mut ev = 0;
    for s in 0..secs {
        for k in 0..10 {
            sink.tilt(&tilt(s * 10 + k));
        }
        sink.control(&control(s, legs));
        if s % 3 == 0 {
            sink.event(&event(ev));
            ev += 1;
        }
    }
    (secs * 10, secs, ev)
}

fn h5dump(args: &[&str]) -> String {
    let out = Command::new("h5dump")
        .args(args)
        .output()
        .expect("run h5dump (apt-get install hdf5-tools)");
    assert!(
        out.status.success(),
        "h5dump {args:?} failed: {}",
        String::from_utf8_lossy(&out.stderr)
    );
    String::from_utf8(out.stdout).expect("utf-8")
}

#[test]
fn rows_read_back_equal_by_our_reader_and_by_h5dump() {
    let _g = serial();
    let dir = tmp_dir("roundtrip");
    let cfg = config();
    let legs = cfg.legs.len();
    let (mut sink, handle) = Recorder::start(&cfg, opts(&dir)).expect("start");
    let (nt, nc, ne) = feed(&mut sink, 600, legs);
    let report = sink.finish().expect("finish");
    assert_eq!(
        (
            report.tilt_rows,
            report.control_rows,
            report.events,
            report.dropped_rows
        ),
        (nt, nc, ne, 0)
    );
    assert_eq!(report.files.len(), 1);
    let h = handle.health();
    assert_eq!(
        h.flushed_rows,
        (nt, nc, ne),
        "everything on disk after finish"
    );
    assert!(!h.running && h.alarm.is_none());

    let set = SegmentSet::open(&report.files).expect("open");
    let info = &set.segments()[0];
    assert!(info.closed);
    assert_eq!(
        info.leg_names,
        cfg.legs.iter().map(|l| l.name.clone()).collect::<Vec<_>>()
    );
    let tilt_back: Vec<_> = set
        .tilt(TimeWindow::ALL)
        .collect::<Result<_, _>>()
        .expect("tilt");
    assert_eq!(tilt_back.len() as u64, nt);
    assert_tilt_prefix(&tilt_back, "tilt_back");
    let control_back: Vec<_> = set
        .control(TimeWindow::ALL)
        .collect::<Result<_, _>>()
        .expect("control");
    assert_eq!(
        control_back,
        (0..nc).map(|i| control(i, legs)).collect::<Vec<_>>()
    );
    let events_back: Vec<EventRow> = set
        .events(TimeWindow::ALL)
        .collect::<Result<_, _>>()
        .expect("events");
    assert_eq!(events_back.len() as u64, ne);
    for (i, e) in events_back.iter().enumerate() {
        let want = event(i as u64);
        assert_eq!(
            (e.stamp, e.kind, &e.source),
            (want.stamp, want.kind, &want.source)
        );
        if want.detail.len() <= 256 {
            assert_eq!(e.detail, want.detail);
        } else {
            // Cut at a character boundary, marked, within the field's 256 bytes.
            assert!(
                e.detail.len() <= 256 && e.detail.ends_with('…'),
                "{}",
                e.detail
            );
            assert!(want.detail.starts_with(e.detail.trim_end_matches('…')));
        }
    }

    // A window selects exactly the rows whose UTC lies in [from, to).
    let w = TimeWindow {
        from_utc_ns: Some(T0_UTC_NS + 100_000_000_000),
        to_utc_ns: Some(T0_UTC_NS + 200_000_000_000),
    };
    let part: Vec<_> = set.tilt(w).collect::<Result<_, _>>().unwrap();
    assert_eq!(part, (1000..2000).map(tilt).collect::<Vec<_>>());
    let small = SegmentSet::open(&report.files).unwrap().with_chunk_rows(7);
    assert_eq!(small.control(w).count(), 100);

    // Outside reference: h5dump from the HDF5 tools. Header: dims, chunking, filters.
    let f = report.files[0].to_str().unwrap();
    let head = h5dump(&["-H", "-p", "-d", "/tilt", f]);
    assert!(
        head.contains(&format!(
            "DATASPACE  SIMPLE {{ ( {nt} ) / ( H5S_UNLIMITED ) }}"
        )),
        "{head}"
    );
    assert!(head.contains("CHUNKED ( 4096 )"), "{head}");
    assert!(
        head.contains("SHUFFLE") && head.contains("DEFLATE"),
        "{head}"
    );
    assert!(head.contains("LEVEL 1"), "{head}");
    let legs_head = h5dump(&["-H", "-d", "/control_legs", f]);
    assert!(
        legs_head.contains(&format!("( {nc}, {legs} ) / ( H5S_UNLIMITED, {legs} )")),
        "{legs_head}"
    );
    // Values: ask h5dump for 17 significant digits (enough to round-trip a double),
    // parse every number it printed and look for the written values.
    // (`-A 0`: without the attributes.)
    let rows = h5dump(&[
        "-A", "0", "-d", "/tilt", "-s", "1234", "-c", "1", "-m", "%.17g", f,
    ]);
    let data = rows.split("DATA {").nth(1).expect("DATA section");
    let nums: Vec<f64> = data
        .split(|c: char| !(c.is_ascii_digit() || "eE.+-".contains(c)))
        .filter_map(|t| t.parse().ok())
        .collect();
    let want = tilt(1234);
    for (field, v) in [
        ("raw_x", want.raw[0]),
        ("tilt_y_urad", want.tilt_urad[1]),
        ("t_mono_s", want.stamp.t_mono_s),
    ] {
        assert!(nums.contains(&v), "{field} = {v:?} not in {rows}");
    }
    assert!(rows.contains(&want.stamp.t_utc_ns.to_string()), "{rows}");
    let attrs = h5dump(&["-A", "-a", "/run_id", f]);
    assert!(attrs.contains(handle.run_id()), "{attrs}");
    let units = h5dump(&["-a", "/tilt/units", f]);
    assert!(units.contains("tilt_x_urad: urad"), "{units}");
    let cfg_attr = h5dump(&["-a", "/config_toml", f]);
    assert!(
        cfg_attr.contains("[recording]") || cfg_attr.contains("stage"),
        "{cfg_attr}"
    );

    // CSV export of the same window.
    let mut csv = Vec::new();
    let n = export_csv(&report.files, &w, StreamKind::Control, &mut csv).expect("csv");
    assert_eq!(n, 100);
    let text = String::from_utf8(csv).unwrap();
    let mut lines = text.lines();
    let head = lines.next().unwrap();
    let cols: Vec<_> = head.split(',').collect();
    assert_eq!(cols.len(), 3 + 20 + 9 * legs, "{head}");
    assert!(head.contains(&format!("{}_temp_c", cfg.legs[0].name)));
    let first: Vec<_> = lines.next().unwrap().split(',').collect();
    let c100 = control(100, legs);
    assert_eq!(first[0], "2024-03-01T00:01:40.000000000Z");
    assert_eq!(first[3], "100");
    assert_eq!(first[4], c100.mode.as_str());
    let col = cols
        .iter()
        .position(|c| *c == format!("{}_power_w", cfg.legs[1].name))
        .unwrap();
    assert_eq!(first[col].parse::<f64>().unwrap(), c100.legs[1].power_w);
    let mut ev_csv = Vec::new();
    export_csv(
        &report.files,
        &TimeWindow::ALL,
        StreamKind::Events,
        &mut ev_csv,
    )
    .unwrap();
    let ev_text = String::from_utf8(ev_csv).unwrap();
    assert_eq!(ev_text.lines().count() as u64, ne + 1);
    assert!(ev_text.contains("setpoint_x_urad: 0 → 1"), "{ev_text}");
    std::fs::remove_dir_all(&dir).ok();
}

#[test]
fn a_full_queue_drops_are_counted_and_reported_as_events() {
    let _g = serial();
    let dir = tmp_dir("drops");
    let cfg = config();
    let mut o = opts(&dir);
    o.queue_capacity_rows = 256;
    o.batch_rows = 64;
    let (mut sink, handle) = Recorder::start(&cfg, o).expect("start");
    // Hold HDF5's process-wide lock: the writer thread blocks on its next HDF5 call, as
    // it would behind a stalled disk, while the control loop keeps producing.
    let pushed = 200_000u64;
    hdf5::sync::sync(|| {
        for i in 0..pushed {
            sink.tilt(&tilt(i));
        }
    });
    let during = handle.health().dropped_rows;
    assert!(
        during > 0,
        "the queue must have overflowed while the writer was stalled"
    );
    let report = sink.finish().expect("finish");
    // Nothing lost silently: every row is either in the file or counted as dropped.
    assert_eq!(report.tilt_rows + report.dropped_rows, pushed);
    assert_eq!(report.dropped_rows, handle.health().dropped_rows);
    let set = SegmentSet::open(&report.files).unwrap();
    assert_eq!(set.tilt(TimeWindow::ALL).count() as u64, report.tilt_rows);
    let dropped_events: Vec<_> = set
        .events(TimeWindow::ALL)
        .map(Result::unwrap)
        .filter(|e| e.kind == EventKind::Dropped)
        .collect();
    assert!(!dropped_events.is_empty());
    let reported: u64 = dropped_events
        .iter()
        .map(|e| {
            e.detail
                .strip_prefix("dropped ")
                .unwrap()
                .split(' ')
                .next()
                .unwrap()
                .parse::<u64>()
                .unwrap()
        })
        .sum();
    assert_eq!(reported, report.dropped_rows, "{dropped_events:?}");
    std::fs::remove_dir_all(&dir).ok();
}

#[test]
fn blocking_mode_applies_back_pressure_and_drops_nothing() {
    let _g = serial();
    let dir = tmp_dir("blocking");
    let cfg = config();
    let mut o = opts(&dir);
    o.queue_capacity_rows = 128;
    o.batch_rows = 64;
    o.blocking = true;
    let (mut sink, _handle) = Recorder::start(&cfg, o).expect("start");
    // Stall the writer for a while from another thread, as above.
    let staller =
        std::thread::spawn(|| hdf5::sync::sync(|| std::thread::sleep(Duration::from_millis(300))));
    std::thread::sleep(Duration::from_millis(20));
    let pushed = 100_000u64;
    for i in 0..pushed {
        sink.tilt(&tilt(i));
    }
    staller.join().unwrap();
    let report = sink.finish().expect("finish");
    assert_eq!((report.tilt_rows, report.dropped_rows), (pushed, 0));
    let set = SegmentSet::open(&report.files).unwrap();
    let back: Vec<_> = set.tilt(TimeWindow::ALL).collect::<Result<_, _>>().unwrap();
    assert_eq!(back.len() as u64, pushed);
    assert_tilt_prefix(&back, "back");
    std::fs::remove_dir_all(&dir).ok();
}

#[test]
fn segments_rotate_by_run_time_and_read_back_in_order() {
    let _g = serial();
    let dir = tmp_dir("rotate-time");
    let cfg = config();
    let mut o = opts(&dir);
    o.segment_duration_s = 100.0;
    o.run_id = Some("rot".into());
    let (mut sink, _h) = Recorder::start(&cfg, o).expect("start");
    let (nt, nc, _) = feed(&mut sink, 350, cfg.legs.len());
    let report = sink.finish().expect("finish");
    let names: Vec<_> = report
        .files
        .iter()
        .map(|p| p.file_name().unwrap().to_string_lossy().into_owned())
        .collect();
    assert_eq!(
        names,
        ["rot-0000.h5", "rot-0001.h5", "rot-0002.h5", "rot-0003.h5"]
    );
    // Given in reverse, the set still sorts them by time.
    let mut rev = report.files.clone();
    rev.reverse();
    let set = SegmentSet::open(&rev).unwrap();
    assert!(set.segments().iter().all(|s| s.closed));
    let idx: Vec<_> = set.segments().iter().map(|s| s.segment_index).collect();
    assert_eq!(idx, [0, 1, 2, 3]);
    // Each segment holds about 100 s of run time (rotation happens at a batch boundary).
    for s in &set.segments()[..3] {
        let (lo, hi) = s.utc_range_ns.unwrap();
        let span_s = (hi - lo) as f64 / 1e9;
        assert!(
            (99.0..=101.0).contains(&span_s),
            "{}: {span_s} s",
            s.path.display()
        );
    }
    let back: Vec<_> = set.tilt(TimeWindow::ALL).collect::<Result<_, _>>().unwrap();
    assert_eq!(back.len() as u64, nt);
    assert_tilt_prefix(&back, "back");
    assert_eq!(set.control(TimeWindow::ALL).count() as u64, nc);
    let rotations = set
        .events(TimeWindow::ALL)
        .map(Result::unwrap)
        .filter(|e| e.kind == EventKind::Rotation && e.source == "recorder")
        .count();
    assert_eq!(
        rotations, 6,
        "a closing and a continuing event per rotation"
    );
    std::fs::remove_dir_all(&dir).ok();
}

#[test]
fn segments_rotate_by_size() {
    let _g = serial();
    let dir = tmp_dir("rotate-size");
    let cfg = config();
    let mut o = opts(&dir);
    o.segment_max_bytes = 256 * 1024;
    o.layout = LayoutOptions {
        tilt_chunk_rows: 1024,
        ..LayoutOptions::default()
    };
    let (mut sink, _h) = Recorder::start(&cfg, o).expect("start");
    let n = 60_000u64;
    for i in 0..n {
        sink.tilt(&tilt(i));
    }
    let report = sink.finish().expect("finish");
    assert!(report.files.len() >= 3, "{:?}", report.files);
    for f in &report.files {
        let len = std::fs::metadata(f).unwrap().len();
        // At most one chunk-sized batch (1024 rows, < 64 KiB) past the limit.
        assert!(len < 256 * 1024 + 64 * 1024, "{}: {len} bytes", f.display());
    }
    let set = SegmentSet::open(&report.files).unwrap();
    let back: Vec<_> = set.tilt(TimeWindow::ALL).collect::<Result<_, _>>().unwrap();
    assert_eq!(back.len() as u64, n);
    assert_tilt_prefix(&back, "back");
    std::fs::remove_dir_all(&dir).ok();
}

#[test]
fn bad_options_and_taken_names_are_refused_clearly() {
    let _g = serial();
    let dir = tmp_dir("bad-options");
    let cfg = config();
    let mut o = opts(&dir);
    o.run_id = Some("../escape".into());
    let e = Recorder::start(&cfg, o).unwrap_err().to_string();
    assert!(e.contains("run id") && e.contains("allowed"), "{e}");
    let mut o = opts(&dir);
    o.queue_capacity_rows = 0;
    assert!(
        Recorder::start(&cfg, o)
            .unwrap_err()
            .to_string()
            .contains("queue_capacity_rows")
    );
    let mut o = opts(&dir);
    o.run_id = Some("same".into());
    let (mut s, _) = Recorder::start(&cfg, o.clone()).unwrap();
    s.finish().unwrap();
    let e = Recorder::start(&cfg, o).unwrap_err().to_string();
    assert!(e.contains("already exists"), "{e}");
    // Two runs started in the same second get distinct generated ids.
    let (mut a, ha) = Recorder::start(&cfg, opts(&dir)).unwrap();
    let (mut b, hb) = Recorder::start(&cfg, opts(&dir)).unwrap();
    assert_ne!(ha.run_id(), hb.run_id());
    assert!(hb.run_id().starts_with("20240301T000000Z"));
    a.finish().unwrap();
    b.finish().unwrap();
    std::fs::remove_dir_all(&dir).ok();
}

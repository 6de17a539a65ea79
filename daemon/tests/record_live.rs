//! Reading the live segment while another process appends to it: the project's reader
//! and h5py in SWMR mode (an outside reference) both see the flushed rows grow.
//! (h5dump cannot open a file still open for SWMR writing; it is checked after the close.)

mod record_common;

use std::io::Read;
use std::path::Path;
use std::process::Command;
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::{Arc, Mutex};
use std::time::Duration;

use record_common::*;
use stilt_daemon::record::{Recorder, RecorderOptions, SegmentSet, TimeWindow};
use stilt_daemon::rows::RowSink;

const CHILD: &str = "STILT_RECORD_LIVE_CHILD_DIR";

/// The child: records paced rows, printing `FLUSHED t c e` after each flush, until its
/// stdin closes; then finishes and prints `DONE t c e`.
fn child(dir: &Path) {
    let cfg = config();
    let mut o = RecorderOptions::from_config(&cfg);
    o.dir = dir.to_path_buf();
    o.run_id = Some("live".into());
    o.start_utc_ns = Some(T0_UTC_NS);
    o.flush_interval = Duration::from_millis(150);
    let (mut sink, h) = Recorder::start(&cfg, o).expect("start");
    let stop = Arc::new(AtomicBool::new(false));
    let s2 = stop.clone();
    std::thread::spawn(move || {
        let mut buf = Vec::new();
        let _ = std::io::stdin().read_to_end(&mut buf);
        s2.store(true, Ordering::Relaxed);
    });
    let mut seen = 0;
    let t0 = std::time::Instant::now();
    paced_feed(&mut sink, cfg.legs.len(), 5_000, |_| {
        let s = h.health();
        if s.flushes != seen {
            seen = s.flushes;
            let (t, c, e) = s.flushed_rows;
            println!("FLUSHED {t} {c} {e}");
        }
        !stop.load(Ordering::Relaxed) && t0.elapsed() < Duration::from_secs(60)
    });
    let r = sink.finish().expect("finish");
    println!("DONE {} {} {}", r.tilt_rows, r.control_rows, r.events);
}

const H5PY_READER: &str = r#"
import sys, time, h5py
f = h5py.File(sys.argv[1], "r", libver="latest", swmr=True)
ds = f["tilt"]
print("INFO", ds.compression, ds.shuffle, ds.chunks[0], ",".join(ds.dtype.names), flush=True)
for _ in range(4):
    ds.refresh()
    n = ds.shape[0]
    last = ds[n - 1]
    print("SEEN", n, repr(float(last["raw_x"])), int(last["t_utc_ns"]), flush=True)
    time.sleep(0.4)
"#;

#[test]
fn live_segment_is_readable_while_it_grows() {
    if let Ok(dir) = std::env::var(CHILD) {
        child(Path::new(&dir));
        return;
    }
    let _g = serial();
    let dir = tmp_dir("live");
    let (mut ch, rx) = spawn_child(
        "live_segment_is_readable_while_it_grows",
        &[(CHILD, dir.to_str().unwrap())],
    );
    // Keep the latest flush line the child printed, from a background thread.
    let flushed = Arc::new(Mutex::new((0u64, 0u64, 0u64)));
    let done = Arc::new(Mutex::new(None));
    {
        let (flushed, done) = (flushed.clone(), done.clone());
        std::thread::spawn(move || {
            for l in rx {
                if let Some(r) = l.strip_prefix("FLUSHED ") {
                    *flushed.lock().unwrap() = three(r);
                } else if let Some(r) = l.strip_prefix("DONE ") {
                    *done.lock().unwrap() = Some(three(r));
                }
            }
        });
    }
    let deadline = std::time::Instant::now() + Duration::from_secs(30);
    while flushed.lock().unwrap().0 == 0 {
        assert!(std::time::Instant::now() < deadline, "child never flushed");
        std::thread::sleep(Duration::from_millis(20));
    }
    let path = dir.join("live-0000.h5");

    // (a) The project's reader: each read sees at least what was flushed before it.
    let mut counts = Vec::new();
    for _ in 0..4 {
        let before = *flushed.lock().unwrap();
        let set = SegmentSet::open(std::slice::from_ref(&path)).expect("open live segment");
        assert!(!set.segments()[0].closed);
        let rows: Vec<_> = set
            .tilt(TimeWindow::ALL)
            .collect::<Result<_, _>>()
            .expect("read live");
        assert!(
            rows.len() as u64 >= before.0,
            "saw {} rows, {} were flushed",
            rows.len(),
            before.0
        );
        assert_tilt_prefix(&rows, "rows");
        let n_control = set.control(TimeWindow::ALL).count() as u64;
        assert!(n_control >= before.1);
        counts.push(rows.len());
        std::thread::sleep(Duration::from_millis(400));
    }
    assert!(
        counts.windows(2).all(|w| w[0] <= w[1]) && counts[3] > counts[0],
        "{counts:?}"
    );

    // (b) h5py in SWMR mode, as an outside reference.
    if have_h5py() {
        let before = *flushed.lock().unwrap();
        let out = Command::new("python3")
            .args(["-c", H5PY_READER, path.to_str().unwrap()])
            .output()
            .unwrap();
        let text = String::from_utf8_lossy(&out.stdout).into_owned();
        assert!(
            out.status.success(),
            "h5py reader failed: {text}{}",
            String::from_utf8_lossy(&out.stderr)
        );
        let info = text
            .lines()
            .find(|l| l.starts_with("INFO "))
            .expect("INFO line");
        assert!(info.contains("gzip True 4096"), "{info}");
        assert!(
            info.contains("t_mono_s,t_utc_ns,raw_x,raw_y,tilt_x_urad,tilt_y_urad,quality"),
            "{info}"
        );
        let seen: Vec<(u64, f64, i64)> = text
            .lines()
            .filter_map(|l| l.strip_prefix("SEEN "))
            .map(|l| {
                let v: Vec<&str> = l.split_whitespace().collect();
                (
                    v[0].parse().unwrap(),
                    v[1].parse().unwrap(),
                    v[2].parse().unwrap(),
                )
            })
            .collect();
        assert_eq!(seen.len(), 4, "{text}");
        assert!(
            seen[0].0 >= before.0,
            "h5py saw {} rows, {} were flushed",
            seen[0].0,
            before.0
        );
        assert!(
            seen.windows(2).all(|w| w[0].0 <= w[1].0) && seen[3].0 > seen[0].0,
            "{seen:?}"
        );
        for (n, raw_x, t_utc) in &seen {
            let want = tilt(n - 1);
            assert_eq!(
                (*raw_x, *t_utc),
                (want.raw[0], want.stamp.t_utc_ns),
                "row {}",
                n - 1
            );
        }
    }

    // Stop the writer; the closed segment then opens in h5dump too.
    drop(ch.stdin.take());
    let status = ch.wait().unwrap();
    assert!(status.success(), "{status:?}");
    let deadline = std::time::Instant::now() + Duration::from_secs(5);
    let fin = loop {
        if let Some(d) = *done.lock().unwrap() {
            break d;
        }
        assert!(std::time::Instant::now() < deadline, "no DONE line");
        std::thread::sleep(Duration::from_millis(20));
    };
    let set = SegmentSet::open(std::slice::from_ref(&path)).unwrap();
    assert!(set.segments()[0].closed);
    assert_eq!(set.tilt(TimeWindow::ALL).count() as u64, fin.0);
    let dump = Command::new("h5dump")
        .args(["-H", "-d", "/tilt", path.to_str().unwrap()])
        .output()
        .unwrap();
    assert!(dump.status.success());
    assert!(
        String::from_utf8_lossy(&dump.stdout)
            .contains(&format!("( {} ) / ( H5S_UNLIMITED )", fin.0))
    );
    std::fs::remove_dir_all(&dir).ok();
}

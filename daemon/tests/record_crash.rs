//! A writer killed with SIGKILL mid-run: every row up to its last flush reads back from
//! the killed segment (SWMR read), `h5clear -s` (HDF5's prescribed step) makes it
//! readable by h5dump, and the next start writes a fresh segment without touching it.

mod record_common;

use std::os::unix::process::ExitStatusExt;
use std::path::Path;
use std::process::Command;
use std::time::Duration;

use record_common::*;
use stilt_daemon::record::{LAYOUT_VERSION, Recorder, RecorderOptions, SegmentSet, TimeWindow};
use stilt_daemon::rows::RowSink;

const CHILD: &str = "STILT_RECORD_CRASH_CHILD_DIR";

/// The child: records paced rows and prints `FLUSHED t c e` after every flush, until killed.
fn child(dir: &Path) {
    let cfg = config();
    let mut o = RecorderOptions::from_config(&cfg);
    o.dir = dir.to_path_buf();
    o.run_id = Some("crash".into());
    o.start_utc_ns = Some(T0_UTC_NS);
    o.flush_interval = Duration::from_millis(100);
    let (mut sink, h) = Recorder::start(&cfg, o).expect("start");
    let mut seen = 0;
    let t0 = std::time::Instant::now();
    paced_feed(&mut sink, cfg.legs.len(), 20_000, |_| {
        let s = h.health();
        if s.flushes != seen {
            seen = s.flushes;
            let (t, c, e) = s.flushed_rows;
            println!("FLUSHED {t} {c} {e}");
        }
        // The parent kills us long before this; stop anyway if it does not.
        t0.elapsed() < Duration::from_secs(60)
    });
    sink.finish().expect("finish");
}

#[test]
fn killed_writer_keeps_every_flushed_row_and_next_start_is_fresh() {
    if let Ok(dir) = std::env::var(CHILD) {
        child(Path::new(&dir));
        return;
    }
    let _g = serial();
    let dir = tmp_dir("crash");
    let name = "killed_writer_keeps_every_flushed_row_and_next_start_is_fresh";
    let (mut ch, rx) = spawn_child(name, &[(CHILD, dir.to_str().unwrap())]);
    let mut last = (0, 0, 0);
    for _ in 0..8 {
        last = three(&expect_line(&rx, "FLUSHED ", 30));
    }
    // Kill between two flushes, with rows appended after the last one.
    std::thread::sleep(Duration::from_millis(50));
    ch.kill().expect("SIGKILL");
    let status = ch.wait().unwrap();
    assert_eq!(status.signal(), Some(libc::SIGKILL), "{status:?}");
    // Flush lines printed after `last` was read may exist; the last one is the bound.
    while let Ok(l) = rx.recv_timeout(Duration::from_millis(200)) {
        if let Some(r) = l.strip_prefix("FLUSHED ") {
            last = three(r);
        }
    }
    assert!(last.0 > 0 && last.1 > 0 && last.2 > 0, "{last:?}");

    let killed = dir.join("crash-0000.h5");
    let before = std::fs::read(&killed).unwrap();
    let set =
        SegmentSet::open(std::slice::from_ref(&killed)).expect("SWMR read of the killed segment");
    let info = &set.segments()[0];
    assert!(
        !info.closed,
        "segment_state still says open: the writer died"
    );
    assert_eq!(info.layout_version, LAYOUT_VERSION);
    let tilt_back: Vec<_> = set.tilt(TimeWindow::ALL).collect::<Result<_, _>>().unwrap();
    let control_back: Vec<_> = set
        .control(TimeWindow::ALL)
        .collect::<Result<_, _>>()
        .unwrap();
    let events_back: Vec<_> = set
        .events(TimeWindow::ALL)
        .collect::<Result<_, _>>()
        .unwrap();
    assert!(
        tilt_back.len() as u64 >= last.0,
        "{} < {}",
        tilt_back.len(),
        last.0
    );
    assert!(control_back.len() as u64 >= last.1);
    assert!(events_back.len() as u64 >= last.2);
    // And they are exactly the rows sent, in order.
    assert_tilt_prefix(&tilt_back, "tilt_back");
    let legs = config().legs.len();
    assert_eq!(
        control_back,
        (0..control_back.len() as u64)
            .map(|i| control(i, legs))
            .collect::<Vec<_>>()
    );

    // h5dump cannot open it as it is (the superblock still says "open for writing") …
    let f = killed.to_str().unwrap();
    let plain = Command::new("h5dump").args(["-H", f]).output().unwrap();
    assert!(
        !plain.status.success(),
        "h5dump opened a file marked open for writing?"
    );
    // … until `h5clear -s` clears that mark (done on a copy; the original stays as is).
    let copy = dir.join("copy.h5");
    std::fs::copy(&killed, &copy).unwrap();
    let clr = Command::new("h5clear")
        .args(["-s", copy.to_str().unwrap()])
        .output()
        .unwrap();
    assert!(
        clr.status.success(),
        "{}",
        String::from_utf8_lossy(&clr.stderr)
    );
    let dump = Command::new("h5dump")
        .args(["-H", "-d", "/tilt", copy.to_str().unwrap()])
        .output()
        .unwrap();
    assert!(
        dump.status.success(),
        "{}",
        String::from_utf8_lossy(&dump.stderr)
    );
    let dump = String::from_utf8(dump.stdout).unwrap();
    assert!(
        dump.contains(&format!("( {} ) / ( H5S_UNLIMITED )", tilt_back.len())),
        "{dump}"
    );
    std::fs::remove_file(&copy).unwrap();

    // The next start writes a fresh segment and leaves the killed one alone.
    let cfg = config();
    let mut o = RecorderOptions::from_config(&cfg);
    o.dir = dir.clone();
    let (mut sink, handle) = Recorder::start(&cfg, o).expect("restart");
    for i in 0..100 {
        sink.tilt(&tilt(i));
    }
    let report = sink.finish().unwrap();
    assert_eq!(report.files.len(), 1);
    assert_ne!(report.files[0], killed);
    assert!(handle.run_id() != "crash");
    assert_eq!(
        std::fs::read(&killed).unwrap(),
        before,
        "the killed segment was modified"
    );
    // A crash can also cut a segment's creation short and leave an empty file: the
    // folder still reads, without it.
    std::fs::write(dir.join("crash-0009.h5"), b"").unwrap();
    let all = SegmentSet::open_dir(&dir).unwrap();
    assert_eq!(all.segments().len(), 2);
    assert_eq!(all.segments().iter().filter(|s| s.closed).count(), 1);
    std::fs::remove_dir_all(&dir).ok();
}

//! A full disk, made honestly with a file-size limit: a child process lowers its
//! RLIMIT_FSIZE (with SIGXFSZ ignored, writes past the limit fail with EFBIG as on a
//! full disk), records until the writer raises the alarm, then lifts the limit ("space
//! returns"). Checked: the alarm, no panic, the earlier segment intact, recovery into a
//! new segment, and every row either recorded or counted as dropped.

mod record_common;

use std::path::Path;
use std::time::{Duration, Instant};

use record_common::*;
use stilt_daemon::record::{Recorder, RecorderOptions, SegmentSet, TimeWindow};
use stilt_daemon::rows::{EventKind, RowSink};

const CHILD: &str = "STILT_RECORD_FULL_CHILD_DIR";
const LIMIT_BYTES: u64 = 400 * 1024;

fn child(dir: &Path) {
    let cfg = config();
    let mut o = RecorderOptions::from_config(&cfg);
    o.dir = dir.to_path_buf();
    o.run_id = Some("full".into());
    o.start_utc_ns = Some(T0_UTC_NS);
    o.flush_interval = Duration::from_millis(100);
    o.retry_interval = Duration::from_millis(500);
    o.queue_capacity_rows = 3000;
    let (mut sink, h) = Recorder::start(&cfg, o).expect("start");
    set_file_size_limit(Some(LIMIT_BYTES));
    let t0 = Instant::now();
    let mut phase = 0;
    let mut seen = 0;
    let mut recovered_at = None;
    let pushed = paced_feed(&mut sink, cfg.legs.len(), 20_000, |_| {
        let s = h.health();
        assert!(
            t0.elapsed() < Duration::from_secs(40),
            "stuck in phase {phase}: {s:?}"
        );
        if s.flushes != seen {
            seen = s.flushes;
            let (t, c, e) = s.flushed_rows;
            println!("FLUSHED {t} {c} {e}");
        }
        match phase {
            0 if s.alarm.is_some() => {
                println!("ALARM {}", s.alarm.unwrap_or_default());
                // Stay "full" a little longer, so that rows pile up beyond the bound.
                std::thread::sleep(Duration::from_millis(300));
                set_file_size_limit(None);
                println!("SPACE");
                phase = 1;
            }
            1 if s.alarm.is_none() && s.segments.len() >= 2 => {
                println!(
                    "RECOVERED {}",
                    s.segment
                        .as_ref()
                        .map(|p| p.display().to_string())
                        .unwrap_or_default()
                );
                recovered_at = Some(Instant::now());
                phase = 2;
            }
            _ => {}
        }
        recovered_at.is_none_or(|t| t.elapsed() < Duration::from_millis(500))
    });
    let r = sink.finish().expect("finish after recovery");
    println!("PUSHED {} {} {}", pushed.0, pushed.1, pushed.2);
    println!(
        "REPORT {} {} {} {}",
        r.tilt_rows, r.control_rows, r.events, r.dropped_rows
    );
}

#[test]
fn full_disk_alarms_keeps_earlier_segments_and_recovers_in_a_new_one() {
    if let Ok(dir) = std::env::var(CHILD) {
        child(Path::new(&dir));
        return;
    }
    let _g = serial();
    let dir = tmp_dir("fulldisk");
    let name = "full_disk_alarms_keeps_earlier_segments_and_recovers_in_a_new_one";
    let (mut ch, rx) = spawn_child(name, &[(CHILD, dir.to_str().unwrap())]);
    let mut flushed_before_alarm = (0, 0, 0);
    let alarm = loop {
        let l = rx
            .recv_timeout(Duration::from_secs(40))
            .expect("child output");
        if let Some(r) = l.strip_prefix("FLUSHED ") {
            flushed_before_alarm = three(r);
        } else if let Some(a) = l.strip_prefix("ALARM ") {
            break a.to_owned();
        }
    };
    assert!(
        alarm.contains("recording stopped") && alarm.contains("full-0000.h5"),
        "{alarm}"
    );
    expect_line(&rx, "SPACE", 10);
    let recovered = expect_line(&rx, "RECOVERED ", 20);
    assert!(recovered.ends_with("full-0001.h5"), "{recovered}");
    let pushed = three(&expect_line(&rx, "PUSHED ", 20));
    let rep: Vec<u64> = expect_line(&rx, "REPORT ", 5)
        .split(' ')
        .map(|x| x.parse().unwrap())
        .collect();
    let status = ch.wait().unwrap();
    assert!(status.success(), "the child failed (a panic?): {status:?}");

    // The earlier segment: all rows flushed before the disk filled, intact.
    let first = SegmentSet::open(&[dir.join("full-0000.h5")]).expect("earlier segment opens");
    let t0: Vec<_> = first
        .tilt(TimeWindow::ALL)
        .collect::<Result<_, _>>()
        .expect("earlier rows read");
    assert!(t0.len() as u64 >= flushed_before_alarm.0 && flushed_before_alarm.0 > 0);
    assert_tilt_prefix(&t0, "earlier segment");

    // The new segment: closed cleanly, with the alarm, the recovery and the drops.
    let second = SegmentSet::open(&[dir.join("full-0001.h5")]).unwrap();
    assert!(second.segments()[0].closed);
    let ev: Vec<_> = second
        .events(TimeWindow::ALL)
        .map(Result::unwrap)
        .filter(|e| e.source == "recorder")
        .collect();
    let all = SegmentSet::open_dir(&dir).unwrap();
    let all_ev: Vec<_> = all
        .events(TimeWindow::ALL)
        .map(Result::unwrap)
        .filter(|e| e.source == "recorder")
        .collect();
    assert!(
        ev.iter()
            .any(|e| e.kind == EventKind::Alarm && e.detail.starts_with("recording stopped")),
        "{ev:?}"
    );
    assert!(
        ev.iter()
            .any(|e| e.kind == EventKind::Recording && e.detail.contains("resumed")),
        "{ev:?}"
    );
    let dropped: u64 = all_ev
        .iter()
        .filter(|e| e.kind == EventKind::Dropped)
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
    assert!(
        rep[3] > 0,
        "rows beyond the bound must have been dropped: {rep:?}"
    );
    assert_eq!(dropped, rep[3], "every dropped row reported in an event");

    // Every pushed tilt row is in a segment or counted as dropped. A batch that failed
    // half-written may appear in both segments, so count distinct rows.
    let mut ticks: Vec<u64> = all
        .tilt(TimeWindow::ALL)
        .map(|r| (r.unwrap().stamp.t_mono_s * 10.0).round() as u64)
        .collect();
    assert!(ticks.windows(2).all(|w| w[0] <= w[1]), "rows out of order");
    ticks.dedup();
    let control_n = all.control(TimeWindow::ALL).count() as u64;
    let events_n = all.events(TimeWindow::ALL).count() as u64;
    let kept = ticks.len() as u64 + control_n + events_n;
    let recorder_events = all
        .events(TimeWindow::ALL)
        .map(Result::unwrap)
        .filter(|e| e.source == "recorder")
        .count() as u64;
    let sent = pushed.0 + pushed.1 + pushed.2 + recorder_events;
    assert!(
        kept + rep[3] >= sent,
        "kept {kept} + dropped {} < sent {sent}",
        rep[3]
    );
    assert!(ticks.len() as u64 <= pushed.0);
    std::fs::remove_dir_all(&dir).ok();
}

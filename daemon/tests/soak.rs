//! The soak: three simulated days on the demo stage with a schedule of trouble, in
//! virtual time (seconds of wall time), recorded to HDF5 by the real recorder. The
//! schedule is invented for this test. The soak runs in a child process (this test
//! re-run with an environment variable) because the full disk is made honestly with
//! RLIMIT_FSIZE, which applies to the whole process.
//!
//! Checks: no panic; every tick accounted for (a control row for every second leaves the
//! loop, in order, no gaps; in the recording every tick is a row or counted in a
//! `dropped` event, and the missing ones lie between the recorder's alarm and its
//! recovery); every fault raised its alarm and cleared; the tilt back within 50 nrad of
//! its setpoint three hours after each disturbance; memory flat (the last day's peak
//! resident size within 5 % of the first day's).

mod record_common;

use std::path::Path;
use std::time::{Duration, Instant};

use record_common::{T0_UTC_NS, set_file_size_limit, spawn_child, tmp_dir};
use stilt_config::Mode;
use stilt_daemon::pipeline::{Command, Pipeline};
use stilt_daemon::record::{
    Recorder, RecorderHandle, RecorderOptions, RecorderSink, SegmentSet, TimeWindow,
};
use stilt_daemon::rows::{
    ControlRow, EventKind, EventRow, Quality, RowSink, SinkError, SinkReport, TiltSample,
};
use stilt_daemon::sim::{SimLoop, TickReport};
use stilt_hil_sim::SimStage;

const H: f64 = 3600.0;
/// Set in the child: the folder to record into.
const CHILD: &str = "STILT_SOAK_CHILD_DIR";
/// The disk fills at this simulated time and empties at the next. On the first day, so
/// that the rows held back meanwhile (bounded by `queue_capacity_rows`) count in the first
/// day's peak memory, against which the last day's is compared.
const DISK_FULL: (f64, f64) = (14.0 * H, 18.0 * H);

/// Keeps events, checks control rows on the fly, counts the rest (constant memory), and
/// passes every row on to the recorder.
#[derive(Clone)]
struct SoakSink(
    std::sync::Arc<std::sync::Mutex<SoakState>>,
    std::sync::Arc<std::sync::Mutex<RecorderSink>>,
);

#[derive(Default)]
struct SoakState {
    tilt_rows: u64,
    next_tick: u64,
    gaps: u64,
    events: Vec<EventRow>,
}

impl RowSink for SoakSink {
    fn tilt(&mut self, t: &TiltSample) {
        self.0.lock().unwrap().tilt_rows += 1;
        self.1.lock().unwrap().tilt(t);
    }
    fn control(&mut self, r: &ControlRow) {
        {
            let mut s = self.0.lock().unwrap();
            if r.tick != s.next_tick {
                s.gaps += 1;
            }
            s.next_tick = r.tick + 1;
        }
        self.1.lock().unwrap().control(r);
    }
    fn event(&mut self, e: &EventRow) {
        self.0.lock().unwrap().events.push(e.clone());
        self.1.lock().unwrap().event(e);
    }
    fn finish(&mut self) -> Result<SinkReport, SinkError> {
        self.1.lock().unwrap().finish()
    }
}

fn rss_kib() -> u64 {
    std::fs::read_to_string("/proc/self/status")
        .ok()
        .and_then(|s| {
            s.lines()
                .find(|l| l.starts_with("VmRSS:"))
                .and_then(|l| l.split_whitespace().nth(1)?.parse().ok())
        })
        .unwrap_or(0)
}

#[derive(Debug, Clone, Copy)]
enum Trouble {
    ThermometerDead(usize),
    ThermometerBack(usize),
    TiltGarbled,
    TiltClean,
    HeaterOpen(usize),
    HeaterFixed(usize),
    AirStep(f64),
    Bump([f64; 2]),
    DiskFull,
    DiskEmptied,
}

#[test]
fn three_days_with_trouble() {
    if let Ok(dir) = std::env::var(CHILD) {
        soak(Path::new(&dir));
        return;
    }
    let dir = tmp_dir("soak");
    let t0 = Instant::now();
    let (mut child, rx) = spawn_child("three_days_with_trouble", &[(CHILD, dir.to_str().unwrap())]);
    let mut lines = Vec::new();
    while let Ok(l) = rx.recv_timeout(Duration::from_secs(120)) {
        lines.push(l);
    }
    let status = child.wait().unwrap();
    assert!(
        status.success(),
        "the soak failed (see its stderr above): {status:?}\n{}",
        lines.join("\n")
    );
    assert!(lines.iter().any(|l| l.ends_with("SOAK DONE")), "{lines:?}");
    for l in lines.iter().filter(|l| l.contains("SOAK MEMORY")) {
        eprintln!("{l}");
    }
    check_recording(&dir);
    std::fs::remove_dir_all(&dir).ok();
    eprintln!(
        "soak with recording: {:.1} s of wall time",
        t0.elapsed().as_secs_f64()
    );
}

/// The recording the soak left: every tick is a row or counted as dropped, and the missing
/// ones lie between the recorder's alarm and its recovery.
fn check_recording(dir: &Path) {
    let all = SegmentSet::open_dir(dir).expect("every segment opens");
    // A batch that failed half-written may be in two segments: count distinct ticks.
    let mut ticks: Vec<u64> = all
        .control(TimeWindow::ALL)
        .map(|r| r.expect("control rows read").tick)
        .collect();
    assert!(ticks.windows(2).all(|w| w[0] <= w[1]), "rows out of order");
    ticks.dedup();
    let events: Vec<EventRow> = all
        .events(TimeWindow::ALL)
        .map(|e| e.expect("events read"))
        .collect();
    let of = |kind: EventKind, starts: &str| {
        events
            .iter()
            .filter(|e| e.kind == kind && e.source == "recorder" && e.detail.starts_with(starts))
            .map(|e| e.stamp.t_mono_s)
            .collect::<Vec<_>>()
    };
    let stopped = of(EventKind::Alarm, "recording stopped");
    let resumed = of(EventKind::Recording, "recording resumed");
    assert_eq!(stopped.len(), 1, "one alarm for the full disk: {events:?}");
    assert_eq!(resumed.len(), 1, "one recovery: {events:?}");
    let (t_stop, t_resume) = (stopped[0], resumed[0]);
    // The writer runs behind the loop by what the queue and the open chunks hold (the
    // 20,000 rows held back are about half an hour at 11 rows a second): allow an hour.
    let lag = H;
    assert!(
        t_stop >= DISK_FULL.0 - lag
            && t_resume >= DISK_FULL.1 - lag
            && t_resume < DISK_FULL.1 + 12.0 * H,
        "alarm at {t_stop} s, recovery at {t_resume} s, disk full {DISK_FULL:?}"
    );
    // "dropped N rows (tilt a, control b, events c): why"
    let dropped_control: u64 = events
        .iter()
        .filter(|e| e.kind == EventKind::Dropped)
        .map(|e| {
            let d = &e.detail;
            let i = d.find("control ").expect("a control count") + "control ".len();
            d[i..]
                .split(|c: char| !c.is_ascii_digit())
                .next()
                .unwrap()
                .parse::<u64>()
                .unwrap()
        })
        .sum();
    let total = 72 * 3600u64;
    let missing: Vec<u64> = {
        let mut m = Vec::new();
        let mut k = 0;
        for t in 0..total {
            if ticks.get(k) == Some(&t) {
                k += 1;
            } else {
                m.push(t);
            }
        }
        m
    };
    assert!(
        !missing.is_empty(),
        "the full disk must have cost rows beyond the bound held back"
    );
    assert!(
        missing.len() as u64 <= dropped_control,
        "{} ticks missing but only {dropped_control} control rows reported dropped",
        missing.len()
    );
    let (lo, hi) = (missing[0] as f64, *missing.last().unwrap() as f64);
    assert!(
        lo >= DISK_FULL.0 - lag && lo >= t_stop - lag && hi <= t_resume,
        "ticks missing from {lo} to {hi} s, outside the outage {t_stop} … {t_resume} s"
    );
    // The run ended cleanly: the last segment is closed and holds the end of the run.
    let last = all.segments().last().unwrap();
    assert!(last.closed, "{:?}", last.path);
    assert_eq!(*ticks.last().unwrap(), total - 1);
}

/// The soak itself (in the child process).
fn soak(dir: &Path) {
    let cfg = stilt_config::load_str(stilt_config::DEMO_SCENARIO, "demo").unwrap();
    let mut ro = RecorderOptions::from_config(&cfg);
    ro.dir = dir.to_path_buf();
    ro.run_id = Some("soak".into());
    ro.blocking = true;
    ro.start_utc_ns = Some(T0_UTC_NS);
    ro.fsync = false;
    ro.flush_interval = Duration::from_millis(200);
    ro.retry_interval = Duration::from_millis(100);
    ro.queue_capacity_rows = 20_000;
    let (rec, handle) = Recorder::start(&cfg, ro).expect("the recorder starts");
    let sink = SoakSink(
        Default::default(),
        std::sync::Arc::new(std::sync::Mutex::new(rec)),
    );
    let stage = SimStage::new(&cfg);
    let mut sim = SimLoop::new(
        stage,
        Pipeline::new(cfg.clone(), Box::new(sink.clone()), T0_UTC_NS),
    );

    // (time, trouble); disturbances end at the second time of each pair.
    let schedule: Vec<(f64, Trouble)> = vec![
        (12.0 * H, Trouble::ThermometerDead(1)),
        (12.0 * H + 60.0, Trouble::ThermometerBack(1)),
        (DISK_FULL.0, Trouble::DiskFull),
        (DISK_FULL.1, Trouble::DiskEmptied),
        (20.0 * H, Trouble::TiltGarbled),
        (20.0 * H + 30.0, Trouble::TiltClean),
        (30.0 * H, Trouble::HeaterOpen(2)),
        (30.5 * H, Trouble::HeaterFixed(2)),
        (44.0 * H, Trouble::AirStep(2.0)),
        (56.0 * H, Trouble::Bump([3.0, -2.0])),
    ];
    // The tilt must be back within bound 3 h after each disturbance ends, until the next.
    let checks: Vec<f64> = vec![
        12.0 * H + 60.0,
        20.0 * H + 30.0,
        30.5 * H,
        44.0 * H,
        56.0 * H,
        66.0 * H,
    ]
    .into_iter()
    .map(|t| t + 3.0 * H)
    .collect();
    assert!(
        schedule.windows(2).all(|w| w[0].0 < w[1].0),
        "the schedule is in time order"
    );
    let mut next = 0;
    let mut rss_day = [0u64; 3];
    let mut worst_after: Vec<f64> = vec![0.0; checks.len()];
    let mut t = 0.0;
    let mut setpoint_flip = 1.0;
    while t < 72.0 * H {
        let step_to = (t + 600.0).min(72.0 * H);
        // Setpoint change every 4 h (from 8 h on), alternating ±0.5 µrad on x.
        if t > 0.0 && (t % (4.0 * H)).abs() < 1e-6 && t >= 8.0 * H {
            setpoint_flip = -setpoint_flip;
            sim.pipeline_mut().command(
                t,
                Command::SetTiltTarget([0.5 * setpoint_flip, 0.0]),
                "soak",
            );
        }
        while next < schedule.len() && schedule[next].0 <= step_to {
            let (at, tr) = schedule[next];
            sim.advance_to(at, &mut |r| note(r, &checks, &mut worst_after));
            let st = sim.stage_mut();
            match tr {
                Trouble::ThermometerDead(l) => st.set_thermometer_fault(l, 0.0, true),
                Trouble::ThermometerBack(l) => st.set_thermometer_fault(l, 0.0, false),
                Trouble::HeaterOpen(l) => st.set_heater_delivery(l, 0.0),
                Trouble::HeaterFixed(l) => st.set_heater_delivery(l, 1.0),
                Trouble::AirStep(k) => st.set_air_offset_k(k),
                Trouble::Bump(b) => st.set_bump_urad(b),
                Trouble::TiltGarbled => sim.set_tilt_fault(Some(Quality::BadFrame)),
                Trouble::TiltClean => sim.set_tilt_fault(None),
                Trouble::DiskFull => set_file_size_limit(Some(0)),
                Trouble::DiskEmptied => disk_emptied(&handle),
            }
            next += 1;
        }
        sim.advance_to(step_to, &mut |r| note(r, &checks, &mut worst_after));
        t = step_to;
        let day = ((t - 1.0) / (24.0 * H)) as usize;
        rss_day[day.min(2)] = rss_day[day.min(2)].max(rss_kib());
        // Operators acknowledge latched alarms once their conditions cleared.
        let now = sim.time_s();
        let _ = sim.pipeline_mut().acknowledge(now, None, "soak-operator");
    }

    assert_eq!(
        sim.pipeline_mut().controller().mode(),
        Mode::Level,
        "no interlock took the stage to safe"
    );
    let end = sim.time_s();
    let (report, _) = sim
        .into_pipeline()
        .finish(end, "soak finished")
        .expect("the recording closes after the disk emptied");
    assert!(report.dropped_rows > 0, "{report:?}");
    let st = sink.0.lock().unwrap();
    assert_eq!(st.next_tick, 72 * 3600, "a control row for every second");
    assert_eq!(st.gaps, 0, "no tick missing");
    assert_eq!(st.tilt_rows, 72 * 36_000);
    let alarm = |prefix: &str| {
        st.events
            .iter()
            .filter(|e| e.kind == EventKind::Alarm && e.detail.starts_with(prefix))
            .count()
    };
    for id in [
        "sensor_stale:B",
        "sensor_stale:tilt",
        "heater_open_circuit:C",
    ] {
        assert!(
            alarm(id) >= 2,
            "{id}: expected raised and cleared, got {}",
            alarm(id)
        );
    }
    assert!(
        st.events.iter().any(|e| e.kind == EventKind::Acknowledge),
        "alarms were acknowledged"
    );
    for (k, w) in worst_after.iter().enumerate() {
        assert!(
            *w <= 0.050,
            "after disturbance {k}: tilt error up to {w} µrad in the hour that must be settled"
        );
    }
    let (d1, d3) = (rss_day[0] as f64, rss_day[2] as f64);
    assert!(
        d1 > 0.0 && d3 <= d1 * 1.05,
        "resident memory grew: day 1 peak {d1} KiB, day 3 peak {d3} KiB"
    );
    println!("SOAK MEMORY peak resident KiB per day {rss_day:?}");
    println!("SOAK DONE");
}

/// Space returns, once the recorder has noticed that it was gone (its alarm is up).
fn disk_emptied(h: &RecorderHandle) {
    let t0 = Instant::now();
    while h.health().alarm.is_none() {
        assert!(
            t0.elapsed() < Duration::from_secs(30),
            "no recorder alarm while the disk was full: {:?}",
            h.health()
        );
        std::thread::sleep(Duration::from_millis(10));
    }
    set_file_size_limit(None);
}

/// The largest |true tilt − setpoint in use| in the hour that starts at each check time
/// (skipping the hour after each setpoint change).
fn note(r: &TickReport, checks: &[f64], worst: &mut [f64]) {
    // The hour after a setpoint change is the ramp and its follow-up, not a disturbance.
    if r.t_s >= 8.0 * H && r.t_s % (4.0 * H) < H {
        return;
    }
    for (k, &c) in checks.iter().enumerate() {
        if r.t_s >= c && r.t_s < c + H {
            for a in 0..2 {
                let e = (r.true_tilt_urad[a] - r.outputs.tilt_setpoint_urad[a]).abs();
                worst[k] = worst[k].max(e);
            }
        }
    }
}

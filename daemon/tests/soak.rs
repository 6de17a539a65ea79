//! The soak: three simulated days on the demo stage with a schedule of trouble, in
//! virtual time (seconds of wall time). The schedule is invented for this test.
//!
//! Checks: no panic; every tick accounted for (a control row for every second, in
//! order, no gaps); every fault raised its alarm and cleared; the tilt back within
//! 50 nrad of its setpoint three hours after each disturbance; memory flat (the last
//! day's peak resident size within 5 % of the first day's).

use stilt_config::Mode;
use stilt_daemon::pipeline::{Command, Pipeline};
use stilt_daemon::rows::{
    ControlRow, EventKind, EventRow, Quality, RowSink, SinkError, SinkReport, TiltSample,
};
use stilt_daemon::sim::{SimLoop, TickReport};
use stilt_hil_sim::SimStage;

const H: f64 = 3600.0;

/// Keeps events, checks control rows on the fly, counts the rest (constant memory).
#[derive(Clone, Default)]
struct SoakSink(std::sync::Arc<std::sync::Mutex<SoakState>>);

#[derive(Default)]
struct SoakState {
    tilt_rows: u64,
    next_tick: u64,
    gaps: u64,
    events: Vec<EventRow>,
}

impl RowSink for SoakSink {
    fn tilt(&mut self, _: &TiltSample) {
        self.0.lock().unwrap().tilt_rows += 1;
    }
    fn control(&mut self, r: &ControlRow) {
        let mut s = self.0.lock().unwrap();
        if r.tick != s.next_tick {
            s.gaps += 1;
        }
        s.next_tick = r.tick + 1;
    }
    fn event(&mut self, e: &EventRow) {
        self.0.lock().unwrap().events.push(e.clone());
    }
    fn finish(&mut self) -> Result<SinkReport, SinkError> {
        Ok(SinkReport::default())
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
}

#[test]
fn three_days_with_trouble() {
    let cfg = stilt_config::load_str(stilt_config::DEMO_SCENARIO, "demo").unwrap();
    let sink = SoakSink::default();
    let stage = SimStage::new(&cfg);
    let mut sim = SimLoop::new(stage, Pipeline::new(cfg.clone(), Box::new(sink.clone()), 0));

    // (time, trouble); disturbances end at the second time of each pair.
    let schedule: Vec<(f64, Trouble)> = vec![
        (12.0 * H, Trouble::ThermometerDead(1)),
        (12.0 * H + 60.0, Trouble::ThermometerBack(1)),
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
    assert_eq!(
        sim.pipeline_mut().controller().mode(),
        Mode::Level,
        "no interlock took the stage to safe"
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

//! The control loop task over the simulated backend, in paused tokio time (no real I/O,
//! so auto-advance is exact): tick rate, requests, refusals, ramps, shutdown to zero.

use std::sync::Arc;
use std::sync::atomic::{AtomicBool, Ordering};

use stilt_config::Mode;
use stilt_daemon::rows::MemorySink;
use stilt_daemon::runtime::{self, Backend, Readings, RuntimeOptions, SimBackend};
use stilt_daemon::status::{ControlRequest, Handles, Request};

fn demo() -> stilt_config::Config {
    stilt_config::load_str(stilt_config::DEMO_SCENARIO, "demo").unwrap()
}

/// Wraps the simulated backend to see what the loop commanded last and whether it
/// asked for the safe state.
struct Spy {
    inner: SimBackend,
    last_power: Arc<std::sync::Mutex<Vec<f64>>>,
    safe_off: Arc<AtomicBool>,
}

impl Backend for Spy {
    fn poll(&mut self, now_s: f64) -> Readings {
        self.inner.poll(now_s)
    }
    fn apply(&mut self, now_s: f64, p: &[f64], v: &[f64]) {
        *self.last_power.lock().unwrap() = p.to_vec();
        self.inner.apply(now_s, p, v);
    }
    fn safe_off(&mut self) {
        self.safe_off.store(true, Ordering::SeqCst);
        *self.last_power.lock().unwrap() = vec![0.0; 3];
        self.inner.safe_off();
    }
}

async fn ask(
    h: &Handles,
    change: ControlRequest,
) -> Result<stilt_daemon::status::Applied, stilt_daemon::status::Refused> {
    let (tx, rx) = tokio::sync::oneshot::channel();
    h.requests
        .send(Request {
            change,
            who: "tester".into(),
            reply: tx,
        })
        .await
        .unwrap();
    rx.await.unwrap()
}

#[tokio::test(start_paused = true)]
async fn ticks_at_the_control_rate_and_zeroes_heaters_at_the_end() {
    let cfg = demo();
    let power = Arc::new(std::sync::Mutex::new(Vec::new()));
    let safe = Arc::new(AtomicBool::new(false));
    let spy = Spy {
        inner: SimBackend::new(&cfg),
        last_power: power.clone(),
        safe_off: safe.clone(),
    };
    let opts = RuntimeOptions {
        duration_s: Some(600.0),
        ..RuntimeOptions::real_time(0)
    };
    let (h, _stop, task) =
        runtime::start(cfg, Box::new(spy), Box::new(MemorySink::default()), opts);
    let end = task.await.unwrap().unwrap();
    assert_eq!(end.counters.ticks, 600);
    assert_eq!(
        end.report.tilt_rows, 6000,
        "ten tiltmeter readings per tick"
    );
    assert!(safe.load(Ordering::SeqCst));
    assert_eq!(*power.lock().unwrap(), vec![0.0; 3]);
    let st = h.status.borrow().clone();
    assert_eq!(st.timing.ticks, 600);
    assert!(st.ready);
    assert!(st.legs.iter().all(|l| l.temp_c.is_some()));
}

#[tokio::test(start_paused = true)]
async fn requests_are_checked_applied_between_ticks_and_ramped() {
    let cfg = demo();
    let range = cfg.limits.tilt_range_urad;
    let ramp = cfg.control.setpoint_ramp_urad_per_s;
    let opts = RuntimeOptions {
        duration_s: Some(400.0),
        ..RuntimeOptions::real_time(0)
    };
    let (h, _stop, task) = runtime::start(
        cfg,
        Box::new(SimBackend::new(&demo())),
        Box::new(MemorySink::default()),
        opts,
    );
    let mut rows = h.rows.subscribe();
    tokio::time::sleep(std::time::Duration::from_secs(100)).await;

    // Refused: out of range, NaN, bad gains, bias over the limit — and nothing changes.
    let before = h.status.borrow().axes[0].target_urad;
    let r = ask(&h, ControlRequest::SetTiltTarget([Some(range + 1.0), None]))
        .await
        .unwrap_err();
    assert_eq!(r.field, "setpoint_x_urad");
    assert!(
        ask(&h, ControlRequest::SetTiltTarget([Some(f64::NAN), None]))
            .await
            .is_err()
    );
    assert_eq!(
        ask(&h, ControlRequest::SetLegBias(99.0))
            .await
            .unwrap_err()
            .field,
        "leg_bias_c"
    );
    let mut g = demo().control.tilt_loop;
    g.kp = -1.0;
    assert_eq!(
        ask(&h, ControlRequest::SetTiltGains(g))
            .await
            .unwrap_err()
            .field,
        "kp"
    );
    g.kp = 1.0;
    g.ti_s = Some(0.0);
    assert_eq!(
        ask(&h, ControlRequest::SetTiltGains(g))
            .await
            .unwrap_err()
            .field,
        "ti_s"
    );
    tokio::time::sleep(std::time::Duration::from_secs(2)).await;
    assert_eq!(h.status.borrow().axes[0].target_urad, before);

    // Applied: a 1 µrad step of the target ramps at the configured rate.
    let ok = ask(&h, ControlRequest::SetTiltTarget([Some(1.0), None]))
        .await
        .unwrap();
    assert!(ok.detail.contains("1"), "{}", ok.detail);
    while rows.try_recv().is_ok() {}
    let a = rows.recv().await.unwrap();
    let b = rows.recv().await.unwrap();
    let step = b.tilt_setpoint_urad[0] - a.tilt_setpoint_urad[0];
    assert!(
        (step - ramp).abs() < 1e-9,
        "setpoint moved {step} µrad in one tick, ramp is {ramp}"
    );
    assert_eq!(b.tilt_target_urad[0], 1.0);

    let ok = ask(&h, ControlRequest::SetMode(Mode::Temperature))
        .await
        .unwrap();
    assert!(ok.detail.contains("temperature"));
    let end = task.await.unwrap().unwrap();
    assert_eq!(end.counters.ticks, 400);
}

#[tokio::test(start_paused = true)]
async fn shutdown_stops_the_loop_and_records_why() {
    let cfg = demo();
    let (_h, stop, task) = runtime::start(
        cfg.clone(),
        Box::new(SimBackend::new(&cfg)),
        Box::new(MemorySink::default()),
        RuntimeOptions::real_time(0),
    );
    tokio::time::sleep(std::time::Duration::from_secs_f64(30.5)).await;
    stop.trigger();
    let end = task.await.unwrap().unwrap();
    assert_eq!(end.reason, "shutdown requested");
    assert_eq!(end.counters.ticks, 30);
}

#[tokio::test(start_paused = true)]
async fn reload_without_a_file_is_refused() {
    let cfg = demo();
    let opts = RuntimeOptions {
        duration_s: Some(5.0),
        ..RuntimeOptions::real_time(0)
    };
    let (h, _s, task) = runtime::start(
        cfg.clone(),
        Box::new(SimBackend::new(&cfg)),
        Box::new(MemorySink::default()),
        opts,
    );
    let r = ask(&h, ControlRequest::Reload).await.unwrap_err();
    assert!(r.message.contains("no configuration file"));
    task.await.unwrap().unwrap();
}

#[tokio::test(start_paused = true)]
async fn reload_applies_gains_and_setpoints_refuses_structure_and_audits() {
    let dir = std::env::temp_dir().join(format!("stilt-reload-{}", std::process::id()));
    std::fs::create_dir_all(&dir).unwrap();
    let path = dir.join("stage.toml");
    std::fs::write(&path, stilt_config::DEMO_SCENARIO).unwrap();
    let cfg = demo();
    let sink = stilt_daemon::rows::SharedSink::default();
    let opts = RuntimeOptions {
        duration_s: Some(60.0),
        config_path: Some(path.clone()),
        ..RuntimeOptions::real_time(0)
    };
    let (h, _s, task) = runtime::start(
        cfg.clone(),
        Box::new(SimBackend::new(&cfg)),
        Box::new(sink.clone()),
        opts,
    );
    tokio::time::sleep(std::time::Duration::from_secs(10)).await;
    // A change through the API shows in the published settings at once.
    let mut g = cfg.control.leg_loop;
    g.kp = 7.0;
    ask(&h, ControlRequest::SetLegGains(g)).await.unwrap();
    assert_eq!(h.settings.borrow().control.leg_loop.kp, 7.0);
    assert_eq!(h.settings.borrow().file.control.leg_loop.kp, 8.0);

    // A bad file: refused with the located errors, running configuration kept.
    std::fs::write(
        &path,
        stilt_config::DEMO_SCENARIO.replace("kp_w_per_k = 8.0", "kp_w_per_k = -8.0"),
    )
    .unwrap();
    let r = ask(&h, ControlRequest::Reload).await.unwrap_err();
    assert!(
        r.message.contains("control.leg_loop.kp_w_per_k"),
        "{}",
        r.message
    );
    assert_eq!(h.settings.borrow().control.leg_loop.kp, 7.0, "refused: kept");
    // A structural change: refused.
    std::fs::write(
        &path,
        stilt_config::DEMO_SCENARIO.replace("length_m = 0.30", "length_m = 0.31"),
    )
    .unwrap();
    assert!(
        ask(&h, ControlRequest::Reload)
            .await
            .unwrap_err()
            .message
            .contains("restart")
    );
    // Gains and a setpoint: applied.
    let text = stilt_config::DEMO_SCENARIO
        .replace("kp_w_per_k = 8.0", "kp_w_per_k = 6.0")
        .replace("setpoint_y_urad = 0.0", "setpoint_y_urad = 0.5");
    std::fs::write(&path, text).unwrap();
    let ok = ask(&h, ControlRequest::Reload).await.unwrap();
    assert!(
        ok.detail.contains("leg loop gains") && ok.detail.contains("tilt target"),
        "{}",
        ok.detail
    );
    tokio::time::sleep(std::time::Duration::from_secs(2)).await;
    assert_eq!(h.status.borrow().axes[1].target_urad, 0.5);
    // What the API's /v1/config reads: the reloaded file, and the gains now in force.
    let s = h.settings.borrow().clone();
    assert_eq!(s.control.leg_loop.kp, 6.0);
    assert_eq!(s.file.control.leg_loop.kp, 6.0);
    assert_eq!(s.control.setpoint_urad[1], 0.5);
    task.await.unwrap().unwrap();

    let events = sink.events();
    let audited: Vec<_> = events.iter().filter(|e| e.source == "api:tester").collect();
    assert!(
        audited
            .iter()
            .any(|e| e.detail.contains("leg_loop: kp=7") && e.detail.contains("kp=6")),
        "{audited:#?}"
    );
    assert!(audited.iter().any(|e| e.detail.contains("reload refused")));
    assert!(
        events
            .iter()
            .any(|e| e.detail.contains("heaters commanded to zero"))
    );
    let _ = std::fs::remove_dir_all(&dir);
}

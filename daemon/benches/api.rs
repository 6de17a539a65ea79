//! Benchmark of the HTTP API (figures in daemon/BENCHMARKS-api.md).
//!
//! Part 1, a load experiment (not a timed test: it prints figures and asserts nothing):
//! the real control loop on the simulated stage at 20× (a 50 ms period), the API on its
//! own thread and runtime (`api::spawn_thread`), and
//! - idle: no clients, for `PHASE_S` seconds;
//! - loaded: 32 client threads on loopback, each sending `GET /v1/status` back to back
//!   on its own keep-alive connection, for `PHASE_S` seconds (at most `MAX_PER_CLIENT`
//!   requests each).
//!
//! It reports the status latency p50/p99/max under load, and the control loop's timing
//! jitter, |tick interval − period|, idle and loaded, with their ratio. The tick times are
//! taken with `std::time::Instant::now()` in the backend's `poll`, the first thing each
//! tick does. (`Status.timing` is printed beside it; at the time of writing it measures
//! intervals between the interval's *scheduled* deadlines, so it reads 0 — reported to
//! the runtime's owner.) Each phase runs on a fresh loop.
//!
//! Part 2, divan micro-benchmarks without sockets: one `GET /v1/status` through the router
//! (`oneshot`), the metrics text, and one streamed sample's JSON.
//!
//! Run: `cargo bench -p stilt-daemon --bench api` (`STILT_BENCH_MICRO=1` for part 2 only).

use std::sync::Arc;
use std::time::{Duration, Instant};

use stilt_config::Config;
use stilt_daemon::api::{self, auth::Access};
use stilt_daemon::rows::CountingSink;
use stilt_daemon::runtime::{self, Backend, Readings, RuntimeOptions, SimBackend};
use stilt_daemon::status::LoopTiming;

const CLIENTS: usize = 32;
const PHASE_S: f64 = 12.0;
const MAX_PER_CLIENT: usize = 50_000;
const SPEED: f64 = 20.0;

fn config() -> Config {
    let mut c = stilt_config::load_str(stilt_config::DEMO_SCENARIO, "demo.toml").unwrap();
    c.network.bind = "127.0.0.1:0".parse().unwrap();
    c
}

/// The simulated stage, noting the wall time at which each tick starts.
struct Timed {
    inner: SimBackend,
    ticks: Arc<std::sync::Mutex<Vec<Instant>>>,
}

impl Backend for Timed {
    fn poll(&mut self, now_s: f64) -> Readings {
        if let Ok(mut t) = self.ticks.lock() {
            t.push(Instant::now());
        }
        self.inner.poll(now_s)
    }
    fn apply(&mut self, now_s: f64, p: &[f64], v: &[f64]) {
        self.inner.apply(now_s, p, v);
    }
    fn safe_off(&mut self) {
        self.inner.safe_off();
    }
}

/// |interval − period| of each tick after the first, sorted, s.
fn jitter(ticks: &[Instant], period_s: f64) -> Vec<f64> {
    let mut j: Vec<f64> = ticks
        .windows(2)
        .map(|w| ((w[1] - w[0]).as_secs_f64() - period_s).abs())
        .collect();
    j.sort_by(f64::total_cmp);
    j
}

struct Phase {
    timing: LoopTiming,
    jitter_s: Vec<f64>,
    latencies_s: Vec<f64>,
    wall_s: f64,
    errors: usize,
}

fn pct(sorted: &[f64], p: f64) -> f64 {
    if sorted.is_empty() {
        return f64::NAN;
    }
    let i = ((p / 100.0) * (sorted.len() - 1) as f64).round() as usize;
    sorted[i.min(sorted.len() - 1)]
}

fn phase(clients: usize) -> Phase {
    let cfg = config();
    // The control loop's runtime: one thread, as a daemon would give it.
    let rt = tokio::runtime::Builder::new_current_thread()
        .enable_all()
        .build()
        .unwrap();
    let ticks = Arc::new(std::sync::Mutex::new(Vec::with_capacity(1024)));
    let backend = Timed {
        inner: SimBackend::new(&cfg),
        ticks: ticks.clone(),
    };
    let (handles, shutdown, task) = rt.block_on(async {
        let opts = RuntimeOptions {
            speed: SPEED,
            duration_s: None,
            config_path: None,
            recording: None,
            start_utc_ns: 0,
            catch_up: false,
        };
        runtime::start(
            cfg.clone(),
            Box::new(backend),
            Box::new(CountingSink::default()),
            opts,
        )
    });
    let server = api::spawn_thread(&cfg, handles.clone(), 2).expect("API thread");
    let url = format!("http://{}/v1/status", server.local_addr());
    let status = handles.status.clone();
    let t0 = Instant::now();
    let deadline = t0 + Duration::from_secs_f64(PHASE_S);
    let workers: Vec<_> = (0..clients)
        .map(|_| {
            let url = url.clone();
            std::thread::spawn(move || {
                let agent = ureq::Agent::config_builder()
                    .http_status_as_error(false)
                    .timeout_global(Some(Duration::from_secs(5)))
                    .build()
                    .new_agent();
                let mut lat = Vec::with_capacity(4096);
                let mut errors = 0;
                while Instant::now() < deadline && lat.len() < MAX_PER_CLIENT {
                    let t = Instant::now();
                    match agent.get(&url).call() {
                        Ok(mut r) if r.status() == 200 => {
                            let _ = r.body_mut().read_to_vec();
                            lat.push(t.elapsed().as_secs_f64());
                        }
                        _ => errors += 1,
                    }
                }
                (lat, errors)
            })
        })
        .collect();
    // The loop runs on this thread while the clients work.
    rt.block_on(async {
        tokio::time::sleep_until(tokio::time::Instant::from_std(deadline)).await;
    });
    let mut latencies_s = Vec::new();
    let mut errors = 0;
    for w in workers {
        let (l, e) = w.join().unwrap();
        latencies_s.extend(l);
        errors += e;
    }
    let wall_s = t0.elapsed().as_secs_f64();
    let timing = status.borrow().timing.clone();
    let period_wall = cfg.control.period_s() / SPEED;
    let jitter_s = match ticks.lock() {
        Ok(t) => jitter(&t, period_wall),
        Err(_) => Vec::new(),
    };
    shutdown.trigger();
    rt.block_on(async {
        let _ = task.await;
    });
    server.stop().expect("API stopped");
    latencies_s.sort_by(f64::total_cmp);
    Phase {
        timing,
        jitter_s,
        latencies_s,
        wall_s,
        errors,
    }
}

fn cpu_model() -> String {
    std::fs::read_to_string("/proc/cpuinfo")
        .ok()
        .and_then(|t| {
            t.lines()
                .find(|l| l.starts_with("model name"))
                .and_then(|l| l.split(':').nth(1))
                .map(|s| s.trim().to_string())
        })
        .unwrap_or_else(|| "unknown".into())
}

fn load_experiment() {
    let cores = std::thread::available_parallelism().map_or(0, |n| n.get());
    println!("machine: {cores} cores available, {}", cpu_model());
    println!(
        "loop: simulated stage at {SPEED}× (period {:.0} ms wall); API on its own 2-thread runtime; \
         phases of {PHASE_S} s",
        1e3 / SPEED
    );
    let idle = phase(0);
    let loaded = phase(CLIENTS);
    let ms = |s: f64| s * 1e3;
    let l = &loaded.latencies_s;
    println!(
        "status latency, {CLIENTS} clients: {} requests in {:.1} s ({:.0}/s), {} errors; \
         p50 {:.3} ms, p99 {:.3} ms, max {:.3} ms",
        l.len(),
        loaded.wall_s,
        l.len() as f64 / loaded.wall_s,
        loaded.errors,
        ms(pct(l, 50.0)),
        ms(pct(l, 99.0)),
        ms(l.last().copied().unwrap_or(f64::NAN))
    );
    for (name, p) in [("idle", &idle), ("loaded", &loaded)] {
        let j = &p.jitter_s;
        let t = &p.timing;
        println!(
            "loop jitter {name:>6}: {} intervals, p50 {:.3} ms, p99 {:.3} ms, max {:.3} ms \
             (Status.timing: {} ticks, {} overruns, p99 {:.3} ms)",
            j.len(),
            ms(pct(j, 50.0)),
            ms(pct(j, 99.0)),
            ms(j.last().copied().unwrap_or(f64::NAN)),
            t.ticks,
            t.overruns,
            ms(t.jitter_p99_s)
        );
    }
    println!(
        "jitter ratio loaded/idle: p50 {:.2}, p99 {:.2}, max {:.2}",
        pct(&loaded.jitter_s, 50.0) / pct(&idle.jitter_s, 50.0),
        pct(&loaded.jitter_s, 99.0) / pct(&idle.jitter_s, 99.0),
        loaded.jitter_s.last().unwrap_or(&f64::NAN) / idle.jitter_s.last().unwrap_or(&f64::NAN)
    );
}

fn main() {
    // STILT_BENCH_MICRO=1 runs only the divan part (quick); the default runs both.
    if std::env::var_os("STILT_BENCH_MICRO").is_none() {
        load_experiment();
    }
    divan::main();
}

mod micro {
    use super::*;
    use axum::body::Body;
    use axum::http::Request;
    use stilt_daemon::api::wire::SampleWire;
    use stilt_daemon::status::{Handles, Status};
    use tower::ServiceExt;

    fn handles(cfg: &Config) -> (Handles, tokio::sync::watch::Sender<Arc<Status>>) {
        // A status as the runtime publishes it before the first tick.
        let rt = tokio::runtime::Builder::new_current_thread()
            .enable_all()
            .build()
            .unwrap();
        let (h, shutdown, task) = rt.block_on(async {
            runtime::start(
                cfg.clone(),
                Box::new(SimBackend::new(cfg)),
                Box::new(CountingSink::default()),
                RuntimeOptions::real_time(0),
            )
        });
        let s = h.status.borrow().clone();
        shutdown.trigger();
        rt.block_on(async {
            let _ = task.await;
        });
        let (tx, rx) = tokio::sync::watch::channel(s);
        let (rows, _) = tokio::sync::broadcast::channel(4);
        let (req, _r) = tokio::sync::mpsc::channel(4);
        (
            Handles {
                status: rx,
                settings: h.settings.clone(),
                rows,
                requests: req,
            },
            tx,
        )
    }

    #[divan::bench]
    fn status_oneshot(b: divan::Bencher) {
        let cfg = config();
        let (h, _keep) = handles(&cfg);
        let rt = tokio::runtime::Builder::new_current_thread()
            .enable_all()
            .build()
            .unwrap();
        let st = api::AppState::new(
            Arc::new(cfg),
            h,
            Access::NoTokens { loopback: true },
            tokio_util::sync::CancellationToken::new(),
        );
        let app = api::app(st);
        b.bench_local(|| {
            rt.block_on(async {
                let r = app
                    .clone()
                    .oneshot(Request::get("/v1/status").body(Body::empty()).unwrap())
                    .await
                    .unwrap();
                axum::body::to_bytes(r.into_body(), 1 << 20).await.unwrap()
            })
        });
    }

    #[divan::bench]
    fn metrics_text(b: divan::Bencher) {
        let cfg = config();
        let (h, _keep) = handles(&cfg);
        let s = h.status.borrow().clone();
        let c = api::metrics::ApiCounters::default();
        b.bench_local(|| api::metrics::render(&s, &cfg, &c, false));
    }

    #[divan::bench]
    fn sample_json(b: divan::Bencher) {
        let row = stilt_daemon::rows::ControlRow {
            tick: 1,
            stamp: stilt_daemon::rows::Stamp {
                t_mono_s: 1.0,
                t_utc_ns: 0,
            },
            mode: stilt_config::Mode::Level,
            tilt_raw: [0.0; 2],
            tilt_urad: [0.1, 0.2],
            tilt_quality: stilt_daemon::rows::Quality::Ok,
            tilt_count: 10,
            tilt_setpoint_urad: [0.0; 2],
            tilt_target_urad: [0.0; 2],
            axis_terms: Default::default(),
            legs: vec![
                stilt_daemon::rows::LegRow {
                    temp_c: 24.0,
                    temp_quality: stilt_daemon::rows::Quality::Ok,
                    setpoint_c: 24.0,
                    power_w: 1.0,
                    drive_v: 7.0,
                    terms: Default::default(),
                };
                3
            ],
        };
        b.bench_local(|| serde_json::to_string(&SampleWire::from(&row)).unwrap());
    }
}

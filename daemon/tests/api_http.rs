//! The API over real HTTP on loopback (port 0), in front of the real control loop
//! (`runtime::start`) on the simulated stage, recording to HDF5: the access matrix on
//! every changing endpoint, bad inputs changing nothing, a setpoint change seen ramping
//! in the streamed samples, the audit trail in the recording's events, the `stiltctl`
//! binary as a person would use it, and shutdown with a stream open.

mod api_common;

use std::path::PathBuf;
use std::process::Command;
use std::sync::mpsc;
use std::time::{Duration, Instant};

use api_common::{OBSERVER, OPERATOR, UNKNOWN, token_file_text};
use serde_json::Value;
use stilt_config::Config;
use stilt_daemon::api::auth::Need;
use stilt_daemon::api::client::{Client, ClientError};
use stilt_daemon::api::wire::SampleWire;
use stilt_daemon::api::{Server, routes};
use stilt_daemon::record::{Recorder, RecorderOptions, SegmentSet, TimeWindow};
use stilt_daemon::rows::EventKind;
use stilt_daemon::runtime::{self, RuntimeOptions, SimBackend};
use stilt_daemon::status::RecordingStatus;

fn scratch(name: &str) -> PathBuf {
    let d = std::env::temp_dir().join(format!("stilt-{name}-{}", std::process::id()));
    let _ = std::fs::remove_dir_all(&d);
    std::fs::create_dir_all(&d).unwrap();
    d
}

fn write_tokens(dir: &std::path::Path) -> PathBuf {
    use std::os::unix::fs::PermissionsExt;
    let p = dir.join("tokens.toml");
    std::fs::write(&p, token_file_text()).unwrap();
    std::fs::set_permissions(&p, std::fs::Permissions::from_mode(0o600)).unwrap();
    p
}

/// Speed factor of the simulated stage: 20 control ticks per wall second.
const SPEED: f64 = 20.0;
/// Three control ticks of wall time at that speed, and a margin.
const TICKS_3: Duration = Duration::from_millis(200);
/// Ramp rate used here, µrad/s of run time.
const RAMP: f64 = 0.25;

fn config(dir: &std::path::Path) -> Config {
    let mut c =
        stilt_config::load_str(stilt_config::DEMO_SCENARIO, "demo.toml").expect("demo config");
    c.network.bind = "127.0.0.1:0".parse().unwrap();
    c.network.token_file = Some(write_tokens(dir));
    c.control.setpoint_ramp_urad_per_s = RAMP;
    c.recording.dir = dir.join("runs");
    c
}

fn now_ns() -> i64 {
    std::time::SystemTime::now()
        .duration_since(std::time::UNIX_EPOCH)
        .unwrap()
        .as_nanos() as i64
}

fn client(base: &str, token: Option<&str>) -> Client {
    Client::new(base, token.map(String::from), None, Duration::from_secs(5)).unwrap()
}

/// Runs a blocking client call off the async runtime.
async fn blocking<T: Send + 'static>(f: impl FnOnce() -> T + Send + 'static) -> T {
    tokio::task::spawn_blocking(f).await.unwrap()
}

fn http_status(r: Result<impl Sized, ClientError>) -> u16 {
    match r {
        Ok(_) => 200,
        Err(ClientError::Http { status, .. }) => status,
        Err(e) => panic!("transport failure: {e}"),
    }
}

fn valid_body(path: &str) -> Value {
    serde_json::from_str(match path {
        "/v1/setpoint/tilt" => r#"{"y_urad": -1.0}"#,
        "/v1/tilt-correction" => r#"{"x_urad": 0.5}"#,
        "/v1/setpoint/leg-bias" => r#"{"bias_c": 24.5}"#,
        "/v1/manual-power" => r#"{"power_w": 0.8}"#,
        "/v1/mode" => r#"{"mode": "level"}"#,
        "/v1/gains/tilt" => r#"{"kp": 1.4}"#,
        "/v1/gains/leg" => r#"{"ti_s": 280}"#,
        "/v1/alarms/acknowledge" => r#"{}"#,
        other => panic!("no valid body for {other}: add one to this test"),
    })
    .unwrap()
}

fn change(c: &Client, method: &axum::http::Method, path: &str, body: &Value) -> u16 {
    if *method == axum::http::Method::PUT {
        http_status(c.put(path, body))
    } else {
        http_status(c.post(path, body))
    }
}

/// The parts of status a change would move.
fn settable(c: &Client) -> (String, f64, f64, f64) {
    let s: Value = c.get("/v1/status").unwrap();
    (
        s["mode"].as_str().unwrap().to_string(),
        s["axes"][0]["target_urad"].as_f64().unwrap(),
        s["axes"][1]["target_urad"].as_f64().unwrap(),
        s["leg_bias_target_c"].as_f64().unwrap(),
    )
}

fn stiltctl(base: &str, token: Option<&str>, args: &[&str]) -> (i32, String, String) {
    let mut c = Command::new(env!("CARGO_BIN_EXE_stiltctl"));
    c.args(["--url", base, "--timeout-s", "5"]).args(args);
    c.env_remove("STILT_TOKEN").env_remove("STILT_URL");
    if let Some(t) = token {
        c.env("STILT_TOKEN", t);
    }
    let o = c.output().expect("run stiltctl");
    (
        o.status.code().unwrap_or(-1),
        String::from_utf8_lossy(&o.stdout).into_owned(),
        String::from_utf8_lossy(&o.stderr).into_owned(),
    )
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn the_api_in_front_of_the_simulated_stage() {
    let dir = scratch("api-http");
    let cfg = config(&dir);
    let start = now_ns();

    let mut ro = RecorderOptions::from_config(&cfg);
    ro.start_utc_ns = Some(start);
    ro.fsync = false;
    ro.flush_interval = Duration::from_millis(200);
    let (sink, rec) = Recorder::start(&cfg, ro).expect("recorder");
    let opts = RuntimeOptions {
        speed: SPEED,
        duration_s: None,
        config_path: None,
        recording: Some(Box::new(move || {
            RecordingStatus::from_health(&rec.health())
        })),
        start_utc_ns: start,
        catch_up: true,
    };
    let (handles, shutdown, task) = runtime::start(
        cfg.clone(),
        Box::new(SimBackend::new(&cfg)),
        Box::new(sink),
        opts,
    );
    let server = Server::bind(&cfg, handles).await.expect("bind");
    assert!(!server.is_tls());
    let base = format!("http://{}", server.local_addr());
    let (stop_tx, stop_rx) = tokio::sync::oneshot::channel::<()>();
    let served = tokio::spawn(server.run(async move {
        let _ = stop_rx.await;
    }));

    // --- The stream is opened first, so the ramp is seen from its start.
    let (tx, rx) = mpsc::channel::<SampleWire>();
    let b = base.clone();
    let reader = std::thread::spawn(move || {
        let c = client(&b, Some(OBSERVER));
        let mut ev = c.stream(1).expect("stream");
        let mut n = 0;
        while let Ok(Some(e)) = ev.next_event() {
            if e.event == "sample" {
                let s: SampleWire = serde_json::from_str(&e.data).unwrap();
                if tx.send(s).is_err() {
                    break;
                }
                n += 1;
                if n > 400 {
                    break;
                }
            }
        }
    });
    let first = blocking({
        let rx_wait = Duration::from_secs(10);
        move || (rx.recv_timeout(rx_wait).expect("a first sample"), rx)
    })
    .await;
    let (first, rx) = first;
    assert_eq!(first.target_urad, [0.0, 0.0]);

    // --- A setpoint change by the operator, then its ramp in the samples.
    let c = client(&base, Some(OPERATOR));
    let reply = blocking(move || c.put("/v1/setpoint/tilt", &serde_json::json!({"x_urad": 3.0})))
        .await
        .expect("setpoint accepted");
    assert_eq!(reply.by, "api:alice");
    let samples = blocking(move || {
        let mut v: Vec<SampleWire> = Vec::new();
        let t0 = Instant::now();
        while t0.elapsed() < Duration::from_secs(20) {
            let Ok(s) = rx.recv_timeout(Duration::from_secs(5)) else {
                break;
            };
            let done = s.setpoint_urad[0] >= 3.0 - 1e-9;
            v.push(s);
            if done {
                break;
            }
        }
        v
    })
    .await;
    let after: Vec<&SampleWire> = samples.iter().filter(|s| s.target_urad[0] == 3.0).collect();
    assert!(
        after.len() >= 10,
        "{} samples with the new target",
        after.len()
    );
    let period = cfg.control.period_s();
    let mut between = 0;
    for w in after.windows(2) {
        let dt_ticks = (w[1].tick - w[0].tick) as f64;
        let step = w[1].setpoint_urad[0] - w[0].setpoint_urad[0];
        // Ramping, not stepping: never more than the configured rate allows per tick.
        assert!(step >= -1e-12, "setpoint went back: {step}");
        assert!(
            step <= RAMP * period * dt_ticks + 1e-9,
            "step {step} over {dt_ticks} ticks"
        );
        if w[1].setpoint_urad[0] > 0.0 && w[1].setpoint_urad[0] < 3.0 {
            between += 1;
        }
    }
    // 3 µrad at 0.25 µrad/s and 1 s per tick: 12 ticks of ramp, so ≥ 10 values between.
    assert!(between >= 10, "only {between} ramp values between 0 and 3");
    assert!((after.last().unwrap().setpoint_urad[0] - 3.0).abs() < 1e-9);

    // --- The access matrix on every changing endpoint, over HTTP.
    let b = base.clone();
    blocking(move || {
        let anon = client(&b, None);
        let bad = client(&b, Some(UNKNOWN));
        let obs = client(&b, Some(OBSERVER));
        let op = client(&b, Some(OPERATOR));
        for r in routes().into_iter().filter(|r| r.need == Need::Change) {
            let body = valid_body(r.path);
            if r.path == "/v1/tilt-correction" {
                // Held in temperature mode only: in level mode the loop answers 409.
                assert_eq!(change(&op, &r.method, r.path, &body), 409);
                let t = serde_json::json!({"mode": "temperature"});
                assert_eq!(change(&op, &axum::http::Method::PUT, "/v1/mode", &t), 200);
            }
            // Status is published after each tick: wait a few ticks (50 ms each at this
            // speed) so earlier changes show before, and wrong ones would show after.
            std::thread::sleep(TICKS_3);
            let before = settable(&op);
            assert_eq!(change(&anon, &r.method, r.path, &body), 401, "{}", r.path);
            assert_eq!(change(&bad, &r.method, r.path, &body), 401, "{}", r.path);
            assert_eq!(change(&obs, &r.method, r.path, &body), 403, "{}", r.path);
            std::thread::sleep(TICKS_3);
            assert_eq!(
                settable(&op),
                before,
                "{}: a refused request changed state",
                r.path
            );
            assert_eq!(change(&op, &r.method, r.path, &body), 200, "{}", r.path);
        }
        // Reads: observer yes, nobody no.
        assert_eq!(http_status(obs.get::<Value>("/v1/status")), 200);
        assert_eq!(http_status(anon.get::<Value>("/v1/status")), 401);
        assert_eq!(http_status(anon.get::<Value>("/v1/health/live")), 200);

        // Bad inputs over the wire change nothing.
        std::thread::sleep(TICKS_3);
        let before = settable(&op);
        for (path, body, code) in [
            ("/v1/setpoint/tilt", r#"{"x_urad": 450}"#, 422),
            ("/v1/setpoint/tilt", r#"{"x_urad": "NaN"}"#, 400),
            ("/v1/setpoint/tilt", r#"{"x_urad": 1e999}"#, 400),
            ("/v1/setpoint/leg-bias", r#"{"bias_c": 40}"#, 422),
            ("/v1/gains/tilt", r#"{"ti_s": 0}"#, 422),
            ("/v1/mode", r#"{"mode": "auto"}"#, 422),
        ] {
            let v: Result<Value, _> = serde_json::from_str(body);
            let got = match v {
                // Bodies JSON can carry go through the client as they are.
                Ok(v) => http_status(op.put(path, &v)),
                // `1e999` is not JSON serde can hold: send the text raw.
                Err(_) => raw_put(&b, path, body),
            };
            assert_eq!(got, code, "{path} {body}");
        }
        let big = format!(r#"{{"x_urad": 1, "pad": "{}"}}"#, "x".repeat(8000));
        assert_eq!(raw_put(&b, "/v1/setpoint/tilt", &big), 413);
        std::thread::sleep(TICKS_3);
        assert_eq!(settable(&op), before);
    })
    .await;

    // --- stiltctl, as a person would use it.
    let b = base.clone();
    blocking(move || {
        let (code, out, err) = stiltctl(&b, Some(OBSERVER), &["status"]);
        assert_eq!(code, 0, "{err}");
        assert!(out.contains("mode level"), "{out}");
        println!("stiltctl status:\n{out}");
        assert!(out.contains("tilt") && out.contains("legs"), "{out}");
        let (code, out, _) = stiltctl(&b, Some(OBSERVER), &["status", "--json"]);
        assert_eq!(code, 0);
        let v: Value = serde_json::from_str(&out).unwrap();
        assert_eq!(v["axes"][0]["target_urad"], 3.0);

        let (code, out, err) = stiltctl(&b, Some(OPERATOR), &["set", "tilt", "--y-urad", "-1.5"]);
        assert_eq!(code, 0, "{err}");
        assert!(out.contains("by api:alice"), "{out}");
        let (code, _, err) = stiltctl(&b, None, &["set", "tilt", "--y-urad", "2"]);
        assert_eq!(code, 1);
        assert!(err.contains("401") && err.contains("STILT_TOKEN"), "{err}");
        let (code, _, err) = stiltctl(&b, Some(OBSERVER), &["mode", "off"]);
        assert_eq!(code, 1);
        assert!(err.contains("403") && err.contains("operator"), "{err}");
        let (code, _, err) = stiltctl(&b, Some(OPERATOR), &["gains", "leg", "--kp", "-2"]);
        assert_eq!(code, 1);
        assert!(err.contains("422") && err.contains("kp"), "{err}");
        let (code, out, err) = stiltctl(&b, Some(OPERATOR), &["gains", "tilt", "--kp", "1.3"]);
        assert_eq!(code, 0, "{err}");
        assert!(out.contains("by api:alice"), "{out}");
        let (code, out, err) = stiltctl(
            &b,
            Some(OBSERVER),
            &["watch", "--count", "3", "--every", "2"],
        );
        assert_eq!(code, 0, "{err}");
        let lines: Vec<&str> = out.lines().filter(|l| l.starts_with("tick")).collect();
        assert_eq!(lines.len(), 3, "{out}");
        let (code, out, _) = stiltctl(&b, Some(OBSERVER), &["metrics"]);
        assert_eq!(code, 0);
        assert!(out.contains("# TYPE stiltd_control_ticks_total counter"));
    })
    .await;
    let y = blocking({
        let c = client(&base, Some(OBSERVER));
        move || {
            std::thread::sleep(TICKS_3);
            settable(&c).2
        }
    })
    .await;
    assert_eq!(y, -1.5, "stiltctl's setpoint reached the loop");

    // A daemon that is not there: a clear message.
    let closed = std::net::TcpListener::bind("127.0.0.1:0").unwrap();
    let dead = format!("http://{}", closed.local_addr().unwrap());
    drop(closed);
    let (code, _, err) = blocking(move || stiltctl(&dead, None, &["status"])).await;
    assert_eq!(code, 1);
    assert!(
        err.contains("cannot connect") && err.contains("is stiltd running"),
        "{err}"
    );

    // --- Shutdown with the stream still open: the server ends promptly.
    let t0 = Instant::now();
    let _ = stop_tx.send(());
    tokio::time::timeout(Duration::from_secs(10), served)
        .await
        .expect("server stopped in time")
        .unwrap()
        .unwrap();
    assert!(t0.elapsed() < Duration::from_secs(5));
    shutdown.trigger();
    let end = tokio::time::timeout(Duration::from_secs(20), task)
        .await
        .expect("loop stopped")
        .unwrap()
        .unwrap();
    reader.join().unwrap();

    // --- The audit trail in the recording: who, when, old → new.
    assert!(!end.report.files.is_empty());
    let set = SegmentSet::open(&end.report.files).expect("open the recording");
    let events: Vec<_> = set.events(TimeWindow::ALL).map(|e| e.unwrap()).collect();
    let by_alice: Vec<_> = events.iter().filter(|e| e.source == "api:alice").collect();
    let tilt = by_alice
        .iter()
        .find(|e| e.kind == EventKind::Setpoint && e.detail.contains('3'))
        .unwrap_or_else(|| panic!("no setpoint event by alice in {events:#?}"));
    assert!(tilt.detail.contains('→'), "{}", tilt.detail);
    assert!(tilt.stamp.t_utc_ns >= start && tilt.stamp.t_utc_ns <= now_ns() + 60_000_000_000);
    assert!(
        by_alice.iter().any(|e| e.kind == EventKind::Gains),
        "{by_alice:#?}"
    );
    assert!(
        by_alice
            .iter()
            .any(|e| e.kind == EventKind::Mode || e.kind == EventKind::Setpoint)
    );
    // Nothing refused left a trace as a change by bob (the observer).
    assert!(!events.iter().any(|e| e.source == "api:bob"), "{events:#?}");
    let _ = std::fs::remove_dir_all(&dir);
}

/// PUTs raw text as JSON (for bodies the client's serializer cannot produce).
fn raw_put(base: &str, path: &str, body: &str) -> u16 {
    use std::io::{Read, Write};
    let addr = base.trim_start_matches("http://");
    let mut s = std::net::TcpStream::connect(addr).unwrap();
    s.set_read_timeout(Some(Duration::from_secs(5))).unwrap();
    let req = format!(
        "PUT {path} HTTP/1.1\r\nHost: {addr}\r\nAuthorization: Bearer {OPERATOR}\r\n\
         Content-Type: application/json\r\nContent-Length: {}\r\nConnection: close\r\n\r\n{body}",
        body.len()
    );
    s.write_all(req.as_bytes()).unwrap();
    let mut out = String::new();
    let _ = s.read_to_string(&mut out);
    out.split_whitespace()
        .nth(1)
        .and_then(|c| c.parse().ok())
        .unwrap_or(0)
}

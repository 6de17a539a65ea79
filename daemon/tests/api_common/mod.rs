//! Shared helpers of the API tests: a small fake control loop (publishes an invented
//! `Status`, answers `Request`s the way the contract says, and records what it was
//! asked), token files, and a `oneshot` request helper.
#![allow(dead_code, unreachable_pub)]

use std::sync::{Arc, Mutex};

use axum::Router;
use axum::body::Body;
use axum::http::{HeaderMap, Method, Request as HttpRequest, StatusCode};
use stilt_config::{Config, Mode};
use stilt_daemon::api::auth::{Access, Role, TokenSet, token_entry_toml};
use stilt_daemon::api::{AppState, app};
use stilt_daemon::rows::{ControlRow, LegRow, LoopTerms, Quality, Stamp};
use stilt_daemon::status::{
    AlarmStatus, Applied, AxisStatus, ChannelStatus, ControlRequest, Handles, LegStatus,
    LoopTiming, RecordingStatus, Refused, Request, Settings, Status,
};
use tokio::sync::{broadcast, mpsc, watch};
use tokio_util::sync::CancellationToken;
use tower::ServiceExt;

/// The operator's token in the test token file.
pub const OPERATOR: &str = "stilt_test_operator_token";
/// The observer's token.
pub const OBSERVER: &str = "stilt_test_observer_token";
/// A token not in the file.
pub const UNKNOWN: &str = "stilt_not_a_known_token";

/// 2024-03-01T00:00:00Z, the invented start of every test run.
pub const T0_UTC_NS: i64 = 1_709_251_200_000_000_000;

/// The demo configuration, with a short change timeout.
pub fn config() -> Config {
    let mut c =
        stilt_config::load_str(stilt_config::DEMO_SCENARIO, "demo.toml").expect("demo config");
    c.network.change_timeout_ms = 300;
    c
}

/// The token file text for alice (operator) and bob (observer).
pub fn token_file_text() -> String {
    format!(
        "{}\n{}",
        token_entry_toml("alice", Role::Operator, OPERATOR),
        token_entry_toml("bob", Role::Observer, OBSERVER)
    )
}

/// The parsed test tokens.
pub fn tokens() -> Access {
    Access::Tokens(TokenSet::parse(&token_file_text(), "tokens.toml").unwrap())
}

/// An invented status for the demo stage (demo data, not a measurement).
pub fn initial_status(cfg: &Config) -> Status {
    let axis = |sp: f64, m: f64| AxisStatus {
        measured_urad: Some(m),
        quality: Quality::Ok,
        age_s: Some(0.05),
        setpoint_urad: sp,
        target_urad: sp,
        terms: LoopTerms::default(),
    };
    Status {
        version: "test",
        stage_name: cfg.stage_name.clone(),
        started_utc_ns: T0_UTC_NS,
        now_utc_ns: T0_UTC_NS + 10_000_000_000,
        uptime_s: 10.0,
        mode: cfg.control.mode,
        axes: [
            axis(cfg.control.setpoint_urad[0], 0.25),
            axis(cfg.control.setpoint_urad[1], -0.5),
        ],
        leg_bias_c: cfg.control.leg_bias_c,
        leg_bias_target_c: cfg.control.leg_bias_c,
        legs: cfg
            .legs
            .iter()
            .map(|l| LegStatus {
                name: l.name.clone(),
                temp_c: Some(24.01),
                quality: Quality::Ok,
                age_s: Some(0.5),
                setpoint_c: 24.0,
                power_w: 1.0,
                drive_v: (50.0f64).sqrt(),
                readback_power_w: None,
                terms: LoopTerms::default(),
            })
            .collect(),
        alarms: vec![AlarmStatus {
            id: "thermometer_stale:B".into(),
            message: "leg B's thermometer was stale for 3 s".into(),
            since_utc_ns: T0_UTC_NS + 4_000_000_000,
            active: false,
            latched: true,
            acknowledged_by: None,
        }],
        timing: LoopTiming {
            period_s: 1.0,
            ticks: 10,
            overruns: 0,
            jitter_p50_s: 1e-4,
            jitter_p99_s: 5e-4,
            jitter_max_s: 1e-3,
            last_tick_work_s: 2e-5,
        },
        recording: RecordingStatus {
            enabled: true,
            segment: Some("runs/seg-0001.h5".into()),
            rows_written: 123,
            dropped_rows: 0,
            last_flush_utc_ns: Some(T0_UTC_NS + 5_000_000_000),
            alarm: None,
        },
        channels: vec![ChannelStatus {
            name: "tiltmeter".into(),
            port: "simulated".into(),
            connected: true,
            requests: 100,
            timeouts: 1,
            bad_frames: 2,
            reconnects: 0,
        }],
        ready: true,
    }
}

/// An invented control row for tick `tick`.
pub fn row(tick: u64) -> ControlRow {
    ControlRow {
        tick,
        stamp: Stamp {
            t_mono_s: tick as f64,
            t_utc_ns: T0_UTC_NS + tick as i64 * 1_000_000_000,
        },
        mode: Mode::Level,
        tilt_raw: [0.0, 0.0],
        tilt_urad: [0.1 * tick as f64, f64::NAN],
        tilt_quality: Quality::Ok,
        tilt_count: 10,
        tilt_setpoint_urad: [0.0, 0.0],
        tilt_target_urad: [0.0, 0.0],
        axis_terms: [LoopTerms::default(); 2],
        legs: vec![
            LegRow {
                temp_c: 24.0,
                temp_quality: Quality::Ok,
                setpoint_c: 24.0,
                power_w: 1.0,
                drive_v: 7.0,
                terms: LoopTerms::default(),
            };
            3
        ],
    }
}

/// How the fake loop answers.
#[derive(Clone, Copy, PartialEq, Eq)]
pub enum Behaviour {
    /// Apply (or refuse) and answer at once.
    Answer,
    /// Take requests but never answer (drops the reply after a while).
    Silent,
}

/// A fake control loop.
pub struct Fake {
    /// The handles given to the API.
    pub handles: Handles,
    /// Every request received: (change, who).
    pub received: Arc<Mutex<Vec<(ControlRequest, String)>>>,
    /// To publish rows.
    pub rows: broadcast::Sender<Arc<ControlRow>>,
    /// To publish status.
    pub status: Arc<watch::Sender<Arc<Status>>>,
    /// The fake loop's task.
    pub task: tokio::task::JoinHandle<()>,
}

impl Fake {
    /// Requests received so far.
    pub fn count(&self) -> usize {
        self.received.lock().unwrap().len()
    }

    /// The status published now.
    pub fn now(&self) -> Status {
        (**self.status.borrow()).clone()
    }
}

/// Starts a fake loop that applies requests the way the contract describes.
pub fn fake_loop(cfg: &Config, behaviour: Behaviour, row_capacity: usize) -> Fake {
    let (status_tx, status_rx) = watch::channel(Arc::new(initial_status(cfg)));
    let status_tx = Arc::new(status_tx);
    let (rows_tx, _) = broadcast::channel(row_capacity);
    let (req_tx, mut req_rx) = mpsc::channel::<Request>(8);
    let received = Arc::new(Mutex::new(Vec::new()));
    let rec = received.clone();
    let st = status_tx.clone();
    let (settings_tx, settings_rx) = watch::channel(Arc::new(Settings::from_config(Arc::new(
        cfg.clone(),
    ))));
    let max_power = cfg
        .legs
        .iter()
        .map(|l| l.heater_max_power_w)
        .fold(f64::INFINITY, f64::min);
    let task = tokio::spawn(async move {
        let mut held = Vec::new();
        while let Some(r) = req_rx.recv().await {
            rec.lock().unwrap().push((r.change.clone(), r.who.clone()));
            if behaviour == Behaviour::Silent {
                held.push(r.reply);
                continue;
            }
            let mut s = (**st.borrow()).clone();
            let answer = apply(&mut s, &r.change, &r.who, max_power);
            if answer.is_ok() {
                st.send_replace(Arc::new(s));
                // As the runtime does: the settings in force, published before the answer.
                settings_tx.send_modify(|cur| {
                    let mut n = (**cur).clone();
                    match &r.change {
                        ControlRequest::SetTiltGains(g) => n.control.tilt_loop = *g,
                        ControlRequest::SetLegGains(g) => n.control.leg_loop = *g,
                        ControlRequest::SetManualPower(p) => n.control.manual_power_w = *p,
                        _ => {}
                    }
                    *cur = Arc::new(n);
                });
            }
            let _ = r.reply.send(answer);
        }
    });
    Fake {
        handles: Handles {
            status: status_rx,
            settings: settings_rx,
            rows: rows_tx.clone(),
            requests: req_tx,
        },
        received,
        rows: rows_tx,
        status: status_tx,
        task,
    }
}

fn apply(
    s: &mut Status,
    c: &ControlRequest,
    who: &str,
    max_power: f64,
) -> Result<Applied, Refused> {
    let detail = match c {
        ControlRequest::SetMode(m) => {
            let d = format!("mode: {} → {}", s.mode, m);
            s.mode = *m;
            d
        }
        ControlRequest::SetTiltTarget(t) => {
            let old = [s.axes[0].target_urad, s.axes[1].target_urad];
            for k in 0..2 {
                if let Some(v) = t[k] {
                    s.axes[k].target_urad = v;
                }
            }
            format!(
                "tilt target µrad: {old:?} → {:?}",
                [s.axes[0].target_urad, s.axes[1].target_urad]
            )
        }
        ControlRequest::SetLegBias(b) => {
            let d = format!("leg bias °C: {} → {b}", s.leg_bias_target_c);
            s.leg_bias_target_c = *b;
            d
        }
        ControlRequest::SetManualPower(p) => {
            if s.mode != Mode::Manual {
                return Err(Refused {
                    field: "power_w".into(),
                    message: "manual power applies in manual mode only; switch mode first".into(),
                });
            }
            assert!(*p <= max_power, "the API let an out-of-range power through");
            format!("manual power W: ? → {p}")
        }
        ControlRequest::SetTiltGains(g) => format!("tilt gains: … → kp {}", g.kp),
        ControlRequest::SetLegGains(g) => format!("leg gains: … → kp {}", g.kp),
        ControlRequest::Acknowledge(id) => {
            for a in &mut s.alarms {
                if id.as_deref().is_none_or(|i| i == a.id) {
                    // As the runtime does: the source is `api:` and the name.
                    a.acknowledged_by = Some(format!("api:{who}"));
                }
            }
            format!("acknowledged {}", id.as_deref().unwrap_or("all"))
        }
        ControlRequest::Reload => "reloaded".into(),
    };
    Ok(Applied { detail })
}

/// An app over a fake loop, with the given access policy.
pub fn app_with(cfg: Config, fake: &Fake, access: Access) -> (Router, AppState) {
    let st = AppState::new(
        Arc::new(cfg),
        fake.handles.clone(),
        access,
        CancellationToken::new(),
    );
    (app(st.clone()), st)
}

/// One answer, body parsed as JSON when it is JSON.
pub struct Answer {
    /// Status.
    pub status: StatusCode,
    /// Headers.
    pub headers: HeaderMap,
    /// Body text.
    pub text: String,
    /// Body as JSON (Null when not JSON).
    pub json: serde_json::Value,
}

impl Answer {
    /// `error.field` of an error body.
    pub fn field(&self) -> Option<&str> {
        self.json["error"]["field"].as_str()
    }
    /// `error.code` of an error body.
    pub fn code(&self) -> Option<&str> {
        self.json["error"]["code"].as_str()
    }
}

/// Sends one request through the router without a socket.
pub async fn call(
    app: &Router,
    method: Method,
    path: &str,
    token: Option<&str>,
    content_type: Option<&str>,
    body: &str,
) -> Answer {
    let mut b = HttpRequest::builder().method(method).uri(path);
    if let Some(t) = token {
        b = b.header("authorization", format!("Bearer {t}"));
    }
    if let Some(ct) = content_type {
        b = b.header("content-type", ct);
    }
    let req = b.body(Body::from(body.to_string())).unwrap();
    let resp = app.clone().oneshot(req).await.unwrap();
    let status = resp.status();
    let headers = resp.headers().clone();
    let bytes = axum::body::to_bytes(resp.into_body(), 1 << 20)
        .await
        .unwrap();
    let text = String::from_utf8_lossy(&bytes).into_owned();
    let json = serde_json::from_str(&text).unwrap_or(serde_json::Value::Null);
    Answer {
        status,
        headers,
        text,
        json,
    }
}

/// A JSON request.
pub async fn json(
    app: &Router,
    method: Method,
    path: &str,
    token: Option<&str>,
    body: &str,
) -> Answer {
    call(app, method, path, token, Some("application/json"), body).await
}

/// One Server-Sent Event: its name and data.
#[derive(Debug, Clone, PartialEq)]
pub struct Sse {
    /// `event:` field (empty when absent).
    pub event: String,
    /// `data:` lines joined by newlines.
    pub data: String,
}

/// Splits complete events off the front of `buf` (per the WHATWG HTML "server-sent
/// events" parsing rules: blank line ends an event, `:` starts a comment).
pub fn take_events(buf: &mut String) -> Vec<Sse> {
    let mut out = Vec::new();
    while let Some(i) = buf.find("\n\n") {
        let block: String = buf.drain(..i + 2).collect();
        let mut ev = Sse {
            event: String::new(),
            data: String::new(),
        };
        let mut any = false;
        for line in block.lines() {
            if line.starts_with(':') || line.is_empty() {
                continue;
            }
            let (k, v) = line.split_once(':').unwrap_or((line, ""));
            let v = v.strip_prefix(' ').unwrap_or(v);
            match k {
                "event" => ev.event = v.to_string(),
                "data" => {
                    if !ev.data.is_empty() {
                        ev.data.push('\n');
                    }
                    ev.data.push_str(v);
                }
                _ => {}
            }
            any = true;
        }
        if any {
            out.push(ev);
        }
    }
    out
}

//! The API router without sockets (`oneshot`), against a fake control loop: the full
//! access matrix on every changing endpoint, a table of bad inputs each answered with
//! its 4xx and no change, the loop's refusals and silences, reads, and the policy
//! without a token file.

mod api_common;

use api_common::*;
use axum::http::{Method, StatusCode};
use stilt_daemon::api::auth::{Access, Need};
use stilt_daemon::api::routes;
use stilt_daemon::status::ControlRequest;

/// A valid body for every changing endpoint (the test fails if one is missing).
fn valid_body(path: &str) -> &'static str {
    match path {
        "/v1/setpoint/tilt" => r#"{"x_urad": 1.5}"#,
        "/v1/tilt-correction" => r#"{"y_urad": -2.0}"#,
        "/v1/setpoint/leg-bias" => r#"{"bias_c": 25.0}"#,
        "/v1/manual-power" => r#"{"power_w": 0.5}"#,
        "/v1/mode" => r#"{"mode": "temperature"}"#,
        "/v1/gains/tilt" => r#"{"kp": 1.2, "ti_s": 90}"#,
        "/v1/gains/leg" => r#"{"kp": 6.0}"#,
        "/v1/alarms/acknowledge" => r#"{"id": "thermometer_stale:B"}"#,
        other => panic!("no valid body for {other}: add one to this test"),
    }
}

#[tokio::test]
async fn every_change_needs_an_operator_token() {
    let cfg = config();
    let changes: Vec<_> = routes()
        .into_iter()
        .filter(|r| r.need == Need::Change)
        .collect();
    assert!(changes.len() >= 7, "{changes:?}");
    for r in changes {
        let fake = fake_loop(&cfg, Behaviour::Answer, 16);
        let needs = match r.path {
            "/v1/manual-power" => Some(stilt_config::Mode::Manual),
            "/v1/tilt-correction" => Some(stilt_config::Mode::Temperature),
            _ => None,
        };
        if let Some(m) = needs {
            fake.status.send_modify(|s| {
                let mut n = (**s).clone();
                n.mode = m;
                *s = std::sync::Arc::new(n);
            });
        }
        let (app, _) = app_with(cfg.clone(), &fake, tokens());
        let body = valid_body(r.path);
        let before = fake.now();

        let a = json(&app, r.method.clone(), r.path, None, body).await;
        assert_eq!(
            a.status,
            StatusCode::UNAUTHORIZED,
            "{} no token: {}",
            r.path,
            a.text
        );
        assert!(
            a.headers["www-authenticate"]
                .to_str()
                .unwrap()
                .starts_with("Bearer"),
            "{}",
            r.path
        );
        assert_eq!(a.code(), Some("missing_token"));

        let a = json(&app, r.method.clone(), r.path, Some(UNKNOWN), body).await;
        assert_eq!(a.status, StatusCode::UNAUTHORIZED, "{} bad token", r.path);
        assert!(
            a.headers["www-authenticate"]
                .to_str()
                .unwrap()
                .contains("invalid_token")
        );

        let a = json(&app, r.method.clone(), r.path, Some(OBSERVER), body).await;
        assert_eq!(
            a.status,
            StatusCode::FORBIDDEN,
            "{} observer: {}",
            r.path,
            a.text
        );
        assert!(
            a.json["error"]["message"]
                .as_str()
                .unwrap()
                .contains("operator")
        );

        // Nothing reached the loop, nothing changed.
        assert_eq!(fake.count(), 0, "{}", r.path);
        assert_eq!(fake.now(), before, "{}", r.path);

        let a = json(&app, r.method.clone(), r.path, Some(OPERATOR), body).await;
        assert_eq!(a.status, StatusCode::OK, "{} operator: {}", r.path, a.text);
        assert_eq!(a.json["by"], "api:alice");
        assert!(!a.json["detail"].as_str().unwrap().is_empty());
        let got = fake.received.lock().unwrap().clone();
        assert_eq!(got.len(), 1, "{}", r.path);
        assert_eq!(
            got[0].1, "alice",
            "who reaches the loop for the audit trail"
        );
    }
}

#[tokio::test]
async fn reads_need_a_known_token_when_a_token_file_is_configured() {
    let cfg = config();
    let fake = fake_loop(&cfg, Behaviour::Answer, 16);
    let (app, _) = app_with(cfg, &fake, tokens());
    for r in routes().into_iter().filter(|r| r.method == Method::GET) {
        // The stream is a read too; ask for it with a small decimation.
        let path = r.path;
        let open = r.need == Need::Open;
        if path == "/v1/stream" {
            continue; // streams are checked in api_stream.rs (the body never ends)
        }
        let a = call(&app, Method::GET, path, None, None, "").await;
        if open {
            assert_eq!(a.status, StatusCode::OK, "{path}");
        } else {
            assert_eq!(a.status, StatusCode::UNAUTHORIZED, "{path}");
            let a = call(&app, Method::GET, path, Some(UNKNOWN), None, "").await;
            assert_eq!(a.status, StatusCode::UNAUTHORIZED, "{path}");
        }
        for t in [OBSERVER, OPERATOR] {
            let a = call(&app, Method::GET, path, Some(t), None, "").await;
            assert_eq!(a.status, StatusCode::OK, "{path} {t}: {}", a.text);
        }
    }
}

#[tokio::test]
async fn status_carries_everything_the_loop_published() {
    let cfg = config();
    let fake = fake_loop(&cfg, Behaviour::Answer, 16);
    let (app, _) = app_with(cfg.clone(), &fake, tokens());
    let a = call(&app, Method::GET, "/v1/status", Some(OBSERVER), None, "").await;
    let s = &a.json;
    let want = initial_status(&cfg);
    assert_eq!(s["mode"], "level");
    assert_eq!(s["stage_name"], cfg.stage_name.as_str());
    assert_eq!(s["axes"][0]["axis"], "x");
    assert_eq!(s["axes"][0]["measured_urad"], 0.25);
    assert_eq!(s["axes"][1]["measured_urad"], -0.5);
    assert_eq!(s["axes"][0]["quality"], "ok");
    assert_eq!(s["legs"].as_array().unwrap().len(), 3);
    assert_eq!(s["legs"][1]["name"], "B");
    assert_eq!(s["legs"][1]["temp_c"], 24.01);
    assert_eq!(s["legs"][1]["max_power_w"], 2.0);
    assert_eq!(s["legs"][1]["readback_power_w"], serde_json::Value::Null);
    assert_eq!(s["alarms"][0]["id"], "thermometer_stale:B");
    assert_eq!(s["alarms"][0]["latched"], true);
    assert_eq!(s["timing"]["jitter_p99_s"], want.timing.jitter_p99_s);
    assert_eq!(s["recording"]["segment"], "runs/seg-0001.h5");
    assert_eq!(s["channels"][0]["bad_frames"], 2);
    assert_eq!(s["ready"], true);
    assert_eq!(s["version"], "test");

    let c = call(&app, Method::GET, "/v1/config", Some(OBSERVER), None, "").await;
    assert_eq!(c.status, StatusCode::OK);
    assert_eq!(c.json["limits"]["tilt_range_urad"], 450.0);
    assert_eq!(c.json["control"]["tilt_loop"]["kp"], 1.5);
    assert_eq!(c.json["network"]["tokens_required"], false);
    // No secrets and no file text: neither token hashes nor the configuration source.
    assert!(
        !c.text.contains("sha256") && !c.text.contains("[control]"),
        "{}",
        c.text
    );
}

#[tokio::test]
async fn gain_changes_show_in_the_running_configuration() {
    let cfg = config();
    let fake = fake_loop(&cfg, Behaviour::Answer, 16);
    let (app, _) = app_with(cfg, &fake, tokens());
    let a = json(
        &app,
        Method::PUT,
        "/v1/gains/leg",
        Some(OPERATOR),
        r#"{"ti_s": 200}"#,
    )
    .await;
    assert_eq!(a.status, StatusCode::OK, "{}", a.text);
    // A partial change keeps the other gains: kp stays the configured 8 W/K.
    let got = fake.received.lock().unwrap().clone();
    match &got[0].0 {
        ControlRequest::SetLegGains(g) => {
            assert_eq!(g.kp, 8.0);
            assert_eq!(g.ti_s, Some(200.0));
            assert_eq!(g.slew_per_s, Some(0.2));
        }
        other => panic!("{other:?}"),
    }
    let c = call(&app, Method::GET, "/v1/config", Some(OBSERVER), None, "").await;
    assert_eq!(c.json["control"]["leg_loop"]["ti_s"], 200.0);
    assert_eq!(c.json["changed_through_api"][0], "control.leg_loop");
}

/// (method, path, content type, body, expected status, expected field).
type Case = (
    Method,
    &'static str,
    Option<&'static str>,
    String,
    u16,
    Option<&'static str>,
);

fn bad_inputs() -> Vec<Case> {
    let j = Some("application/json");
    let put = Method::PUT;
    let tilt = "/v1/setpoint/tilt";
    let s = |x: &str| x.to_string();
    vec![
        // Beyond ±limits.tilt_range_urad (450 µrad in the demo), and at it.
        (
            put.clone(),
            tilt,
            j,
            s(r#"{"x_urad": 451}"#),
            422,
            Some("x_urad"),
        ),
        (
            put.clone(),
            tilt,
            j,
            s(r#"{"y_urad": -450}"#),
            422,
            Some("y_urad"),
        ),
        (
            put.clone(),
            tilt,
            j,
            s(r#"{"x_urad": 1, "y_urad": 1e300}"#),
            422,
            Some("y_urad"),
        ),
        // JSON has no NaN or infinity: strings and overflowing numbers are refused.
        (
            put.clone(),
            tilt,
            j,
            s(r#"{"x_urad": "NaN"}"#),
            400,
            Some("x_urad"),
        ),
        (
            put.clone(),
            tilt,
            j,
            s(r#"{"x_urad": "Infinity"}"#),
            400,
            Some("x_urad"),
        ),
        (
            put.clone(),
            tilt,
            j,
            s(r#"{"x_urad": 1e999}"#),
            400,
            Some("x_urad"),
        ),
        (
            put.clone(),
            tilt,
            j,
            s(r#"{"x_urad": NaN}"#),
            400,
            Some("x_urad"),
        ),
        (
            put.clone(),
            tilt,
            j,
            s(r#"{"x_urad": null, "y_urad": null}"#),
            422,
            Some("x_urad"),
        ),
        (put.clone(), tilt, j, s(r#"{}"#), 422, Some("x_urad")),
        // The held correction: within ±control.tilt_output_limit_urad (100 µrad by default).
        (
            put.clone(),
            "/v1/tilt-correction",
            j,
            s(r#"{"x_urad": 100.5}"#),
            422,
            Some("x_urad"),
        ),
        (
            put.clone(),
            "/v1/tilt-correction",
            j,
            s(r#"{}"#),
            422,
            Some("x_urad"),
        ),
        (
            put.clone(),
            "/v1/tilt-correction",
            j,
            s(r#"{"x_urad": 1, "z_urad": 1}"#),
            400,
            Some("z_urad"),
        ),
        (
            put.clone(),
            tilt,
            j,
            s(r#"{"z_urad": 1}"#),
            400,
            Some("z_urad"),
        ),
        (put.clone(), tilt, j, s(r#"{"x_urad": 1"#), 400, None),
        (put.clone(), tilt, j, s(r#"[1, 2]"#), 400, None),
        (put.clone(), tilt, j, s(""), 400, None),
        (
            put.clone(),
            tilt,
            Some("text/plain"),
            s(r#"{"x_urad": 1}"#),
            415,
            None,
        ),
        (put.clone(), tilt, None, s(r#"{"x_urad": 1}"#), 415, None),
        (
            put.clone(),
            tilt,
            j,
            format!(r#"{{"x_urad": 1, "pad": "{}"}}"#, "x".repeat(5000)),
            413,
            None,
        ),
        // Leg bias: below limits.max_leg_temp_c (35 °C).
        (
            put.clone(),
            "/v1/setpoint/leg-bias",
            j,
            s(r#"{"bias_c": 35}"#),
            422,
            Some("bias_c"),
        ),
        (
            put.clone(),
            "/v1/setpoint/leg-bias",
            j,
            s(r#"{"bias_c": -1e6}"#),
            422,
            Some("bias_c"),
        ),
        (
            put.clone(),
            "/v1/setpoint/leg-bias",
            j,
            s(r#"{"bias_c": null}"#),
            400,
            Some("bias_c"),
        ),
        (
            put.clone(),
            "/v1/setpoint/leg-bias",
            j,
            s(r#"{"bias_c": "25"}"#),
            400,
            Some("bias_c"),
        ),
        // Manual power: 0 … the smallest heater_max_power_w (2 W).
        (
            put.clone(),
            "/v1/manual-power",
            j,
            s(r#"{"power_w": -0.1}"#),
            422,
            Some("power_w"),
        ),
        (
            put.clone(),
            "/v1/manual-power",
            j,
            s(r#"{"power_w": 2.01}"#),
            422,
            Some("power_w"),
        ),
        // Mode.
        (
            put.clone(),
            "/v1/mode",
            j,
            s(r#"{"mode": "auto"}"#),
            422,
            Some("mode"),
        ),
        (
            put.clone(),
            "/v1/mode",
            j,
            s(r#"{"mode": 3}"#),
            400,
            Some("mode"),
        ),
        // Gains: finite, non-negative, times and rates positive, weight 0…1.
        (
            put.clone(),
            "/v1/gains/tilt",
            j,
            s(r#"{"kp": -1}"#),
            422,
            Some("kp"),
        ),
        (
            put.clone(),
            "/v1/gains/tilt",
            j,
            s(r#"{"kp": 1, "ti_s": 0}"#),
            422,
            Some("ti_s"),
        ),
        (
            put.clone(),
            "/v1/gains/tilt",
            j,
            s(r#"{"ti_s": -60}"#),
            422,
            Some("ti_s"),
        ),
        (
            put.clone(),
            "/v1/gains/tilt",
            j,
            s(r#"{"td_s": -1}"#),
            422,
            Some("td_s"),
        ),
        (
            put.clone(),
            "/v1/gains/tilt",
            j,
            s(r#"{"setpoint_weight": 1.5}"#),
            422,
            Some("setpoint_weight"),
        ),
        (
            put.clone(),
            "/v1/gains/tilt",
            j,
            s(r#"{"tracking_time_s": 0}"#),
            422,
            Some("tracking_time_s"),
        ),
        (
            put.clone(),
            "/v1/gains/tilt",
            j,
            s(r#"{"slew_per_s": 0}"#),
            422,
            Some("slew_per_s"),
        ),
        (
            put.clone(),
            "/v1/gains/tilt",
            j,
            s(r#"{"kp": "Infinity"}"#),
            400,
            Some("kp"),
        ),
        (
            put.clone(),
            "/v1/gains/tilt",
            j,
            s(r#"{}"#),
            422,
            Some("kp"),
        ),
        (
            put.clone(),
            "/v1/gains/leg",
            j,
            s(r#"{"kp": 1e5}"#),
            422,
            Some("kp"),
        ),
        (
            put.clone(),
            "/v1/gains/leg",
            j,
            s(r#"{"kp_w_per_k": 5}"#),
            400,
            Some("kp_w_per_k"),
        ),
        // Acknowledge: an alarm that is not listed.
        (
            Method::POST,
            "/v1/alarms/acknowledge",
            j,
            s(r#"{"id": "nope"}"#),
            404,
            Some("id"),
        ),
        (
            Method::POST,
            "/v1/alarms/acknowledge",
            j,
            s(r#"{"id": 5}"#),
            400,
            Some("id"),
        ),
        // Wrong method and unknown path.
        (Method::GET, "/v1/mode", None, s(""), 405, None),
        (Method::GET, "/v1/nothing", None, s(""), 404, None),
        // Stream decimation.
        (
            Method::GET,
            "/v1/stream?every=0",
            None,
            s(""),
            422,
            Some("every"),
        ),
        (
            Method::GET,
            "/v1/stream?every=-3",
            None,
            s(""),
            400,
            Some("every"),
        ),
        (
            Method::GET,
            "/v1/stream?every=ten",
            None,
            s(""),
            400,
            Some("every"),
        ),
    ]
}

#[tokio::test]
async fn bad_inputs_get_their_4xx_and_change_nothing() {
    let cfg = config();
    let fake = fake_loop(&cfg, Behaviour::Answer, 16);
    let (app, st) = app_with(cfg, &fake, tokens());
    let before = call(&app, Method::GET, "/v1/status", Some(OPERATOR), None, "")
        .await
        .json;
    for (method, path, ct, body, code, field) in bad_inputs() {
        let a = call(&app, method.clone(), path, Some(OPERATOR), ct, &body).await;
        let shown = &body[..body.len().min(60)];
        assert_eq!(
            a.status.as_u16(),
            code,
            "{method} {path} {shown}: {}",
            a.text
        );
        // One error shape everywhere, with a message a person can act on.
        let msg = a.json["error"]["message"].as_str().unwrap_or("");
        assert!(!msg.is_empty(), "{method} {path} {shown}: {}", a.text);
        assert!(a.code().is_some(), "{path}");
        assert_eq!(a.field(), field, "{method} {path} {shown}: {}", a.text);
        if let Some(f) = field {
            assert!(msg.contains(f), "{path}: message should name {f}: {msg}");
        }
        assert_eq!(fake.count(), 0, "{path} {shown}: reached the loop");
    }
    let after = call(&app, Method::GET, "/v1/status", Some(OPERATOR), None, "")
        .await
        .json;
    assert_eq!(before, after);
    let invalid = st
        .counters()
        .invalid
        .load(std::sync::atomic::Ordering::Relaxed);
    assert!(invalid >= 20, "{invalid}");
}

#[tokio::test]
async fn a_refusal_by_the_loop_is_409_and_changes_nothing() {
    let cfg = config();
    let fake = fake_loop(&cfg, Behaviour::Answer, 16);
    let (app, _) = app_with(cfg, &fake, tokens());
    let before = fake.now();
    // The fake loop refuses manual power outside manual mode, as a controller may.
    let a = json(
        &app,
        Method::PUT,
        "/v1/manual-power",
        Some(OPERATOR),
        r#"{"power_w": 1}"#,
    )
    .await;
    assert_eq!(a.status, StatusCode::CONFLICT, "{}", a.text);
    assert_eq!(a.code(), Some("refused"));
    assert_eq!(a.field(), Some("power_w"));
    assert!(a.text.contains("manual mode"));
    assert_eq!(fake.now(), before);
    let c = call(&app, Method::GET, "/v1/config", Some(OPERATOR), None, "").await;
    assert_eq!(c.json["control"]["manual_power_w"], 1.0, "unchanged mirror");
    assert_eq!(c.json["changed_through_api"], serde_json::json!([]));
}

#[tokio::test]
async fn a_silent_or_stopped_loop_is_503_within_the_timeout() {
    let cfg = config();
    let fake = fake_loop(&cfg, Behaviour::Silent, 16);
    let (app, st) = app_with(cfg.clone(), &fake, tokens());
    let t0 = std::time::Instant::now();
    let a = json(
        &app,
        Method::PUT,
        "/v1/mode",
        Some(OPERATOR),
        r#"{"mode": "off"}"#,
    )
    .await;
    assert_eq!(a.status, StatusCode::SERVICE_UNAVAILABLE, "{}", a.text);
    assert_eq!(a.code(), Some("no_answer"));
    assert!(t0.elapsed() < std::time::Duration::from_secs(5));
    assert_eq!(
        st.counters()
            .unanswered
            .load(std::sync::atomic::Ordering::Relaxed),
        1
    );

    // A loop that has gone: its request queue is closed.
    let (tx, rx) = tokio::sync::mpsc::channel(1);
    drop(rx);
    let mut handles = fake.handles.clone();
    handles.requests = tx;
    let st = stilt_daemon::api::AppState::new(
        std::sync::Arc::new(cfg),
        handles,
        tokens(),
        tokio_util::sync::CancellationToken::new(),
    );
    let app = stilt_daemon::api::app(st);
    let a = json(
        &app,
        Method::PUT,
        "/v1/mode",
        Some(OPERATOR),
        r#"{"mode": "off"}"#,
    )
    .await;
    assert_eq!(a.status, StatusCode::SERVICE_UNAVAILABLE);
    assert_eq!(a.code(), Some("not_running"));
}

#[tokio::test]
async fn without_a_token_file_changes_need_a_loopback_bind() {
    let cfg = config();
    let fake = fake_loop(&cfg, Behaviour::Answer, 16);
    let (app, _) = app_with(cfg.clone(), &fake, Access::NoTokens { loopback: true });
    let a = call(&app, Method::GET, "/v1/status", None, None, "").await;
    assert_eq!(a.status, StatusCode::OK);
    let a = json(
        &app,
        Method::PUT,
        "/v1/setpoint/tilt",
        None,
        r#"{"y_urad": -2}"#,
    )
    .await;
    assert_eq!(a.status, StatusCode::OK, "{}", a.text);
    assert_eq!(a.json["by"], "api:local");
    assert_eq!(fake.now().axes[1].target_urad, -2.0);

    let fake = fake_loop(&cfg, Behaviour::Answer, 16);
    let (app, _) = app_with(cfg, &fake, Access::NoTokens { loopback: false });
    let a = call(&app, Method::GET, "/v1/status", None, None, "").await;
    assert_eq!(a.status, StatusCode::OK);
    for t in [None, Some(OPERATOR)] {
        let a = json(
            &app,
            Method::PUT,
            "/v1/setpoint/tilt",
            t,
            r#"{"y_urad": -2}"#,
        )
        .await;
        assert_eq!(a.status, StatusCode::FORBIDDEN, "{}", a.text);
        assert!(a.text.contains("token_file"));
    }
    assert_eq!(fake.count(), 0);
}

#[tokio::test]
async fn setpoint_and_ack_reach_the_loop_as_asked() {
    let cfg = config();
    let fake = fake_loop(&cfg, Behaviour::Answer, 16);
    let (app, _) = app_with(cfg, &fake, tokens());
    let a = json(
        &app,
        Method::PUT,
        "/v1/setpoint/tilt",
        Some(OPERATOR),
        r#"{"y_urad": 3.25}"#,
    )
    .await;
    assert_eq!(a.status, StatusCode::OK);
    assert!(a.json["detail"].as_str().unwrap().contains("→"));
    let a = json(
        &app,
        Method::POST,
        "/v1/alarms/acknowledge",
        Some(OPERATOR),
        "{}",
    )
    .await;
    assert_eq!(a.status, StatusCode::OK);
    let got = fake.received.lock().unwrap().clone();
    assert_eq!(got[0].0, ControlRequest::SetTiltTarget([None, Some(3.25)]));
    assert_eq!(got[1].0, ControlRequest::Acknowledge(None));
    let s = call(&app, Method::GET, "/v1/status", Some(OBSERVER), None, "").await;
    assert_eq!(s.json["axes"][1]["target_urad"], 3.25);
    assert_eq!(s.json["axes"][0]["target_urad"], 0.0);
    assert_eq!(s.json["alarms"][0]["acknowledged_by"], "api:alice");
}

#[tokio::test]
async fn readiness_follows_the_loop() {
    let cfg = config();
    let fake = fake_loop(&cfg, Behaviour::Answer, 16);
    let (app, _) = app_with(cfg, &fake, tokens());
    let a = call(&app, Method::GET, "/v1/health/ready", None, None, "").await;
    assert_eq!(a.status, StatusCode::OK, "{}", a.text);
    fake.status.send_modify(|s| {
        let mut n = (**s).clone();
        n.ready = false;
        n.legs[2].quality = stilt_daemon::rows::Quality::Timeout;
        *s = std::sync::Arc::new(n);
    });
    let a = call(&app, Method::GET, "/v1/health/ready", None, None, "").await;
    assert_eq!(a.status, StatusCode::SERVICE_UNAVAILABLE);
    assert_eq!(a.json["reasons"][0], "leg C: timeout");
    let a = call(&app, Method::GET, "/v1/health/live", None, None, "").await;
    assert_eq!(a.status, StatusCode::OK);
}

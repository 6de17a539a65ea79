//! `GET /metrics`: the text format's rules, checked line by line, in both the Prometheus
//! 0.0.4 and the OpenMetrics 1.0 flavours, and the values against the status published.
//!
//! Rules checked (Prometheus "Exposition formats" text format 0.0.4 and the OpenMetrics
//! 1.0 specification, both from memory): metric names match `[a-zA-Z_:][a-zA-Z0-9_:]*`;
//! `# HELP` then `# TYPE` precede a family's samples; a counter's samples end in
//! `_total` (in OpenMetrics the TYPE line names the family without it); `# UNIT`
//! (OpenMetrics only) is a suffix of the family name; each series appears once;
//! OpenMetrics ends with `# EOF`; the Content-Type names the format and version.

mod api_common;

use std::collections::{BTreeMap, HashSet};

use api_common::*;
use axum::http::{Method, StatusCode};

fn valid_name(n: &str) -> bool {
    let mut c = n.chars();
    matches!(c.next(), Some(ch) if ch.is_ascii_alphabetic() || ch == '_' || ch == ':')
        && c.all(|ch| ch.is_ascii_alphanumeric() || ch == '_' || ch == ':')
}

/// Checks the text and returns every sample as (name{labels}, value).
fn check(text: &str, om: bool) -> BTreeMap<String, f64> {
    let mut samples = BTreeMap::new();
    let mut family: Option<(String, String)> = None; // (name, type)
    let mut helped: Option<String> = None;
    let mut seen_families = HashSet::new();
    let lines: Vec<&str> = text.lines().collect();
    assert!(text.ends_with('\n'));
    for (i, line) in lines.iter().enumerate() {
        if let Some(rest) = line.strip_prefix("# HELP ") {
            let (name, help) = rest.split_once(' ').expect("HELP name text");
            assert!(valid_name(name), "{line}");
            assert!(!help.trim().is_empty(), "{line}");
            assert!(
                seen_families.insert(name.to_string()),
                "family twice: {name}"
            );
            helped = Some(name.to_string());
        } else if let Some(rest) = line.strip_prefix("# TYPE ") {
            let (name, kind) = rest.split_once(' ').expect("TYPE name kind");
            assert_eq!(helped.as_deref(), Some(name), "TYPE without HELP: {line}");
            assert!(kind == "gauge" || kind == "counter", "{line}");
            if kind == "counter" {
                assert_eq!(name.ends_with("_total"), !om, "{line}");
            }
            family = Some((name.to_string(), kind.to_string()));
        } else if let Some(rest) = line.strip_prefix("# UNIT ") {
            assert!(om, "UNIT only in OpenMetrics: {line}");
            let (name, unit) = rest.split_once(' ').unwrap();
            assert_eq!(family.as_ref().map(|f| f.0.as_str()), Some(name));
            assert!(name.ends_with(&format!("_{unit}")), "{line}");
        } else if *line == "# EOF" {
            assert!(om, "EOF only in OpenMetrics");
            assert_eq!(i, lines.len() - 1, "EOF must be last");
        } else {
            assert!(!line.starts_with('#'), "unknown comment {line}");
            let (series, value) = line.rsplit_once(' ').expect("sample value");
            let name = series.split('{').next().unwrap();
            assert!(valid_name(name), "{line}");
            let (fam, kind) = family.clone().expect("sample before TYPE");
            let want = if kind == "counter" && om {
                format!("{fam}_total")
            } else {
                fam.clone()
            };
            assert_eq!(name, want, "sample outside its family: {line}");
            if let Some(l) = series.strip_prefix(name) {
                if !l.is_empty() {
                    assert!(l.starts_with('{') && l.ends_with('}'), "{line}");
                    for pair in l[1..l.len() - 1].split(',') {
                        let (k, v) = pair.split_once('=').expect("label=value");
                        assert!(valid_name(k) && !k.starts_with("__"), "{line}");
                        assert!(v.starts_with('"') && v.ends_with('"'), "{line}");
                    }
                }
            }
            let v: f64 = match value {
                "+Inf" => f64::INFINITY,
                "-Inf" => f64::NEG_INFINITY,
                v => v.parse().unwrap_or_else(|_| panic!("value of {line}")),
            };
            assert!(
                samples.insert(series.to_string(), v).is_none(),
                "series twice: {series}"
            );
        }
    }
    if om {
        assert_eq!(lines.last(), Some(&"# EOF"));
    }
    samples
}

async fn scrape(accept: Option<&str>) -> (String, String) {
    let cfg = config();
    let fake = fake_loop(&cfg, Behaviour::Answer, 16);
    fake.status.send_modify(|s| {
        let mut n = (**s).clone();
        n.legs[2].temp_c = None;
        *s = std::sync::Arc::new(n);
    });
    let (app, _) = app_with(cfg, &fake, tokens());
    let mut req =
        axum::http::Request::get("/metrics").header("authorization", format!("Bearer {OBSERVER}"));
    if let Some(a) = accept {
        req = req.header("accept", a);
    }
    let resp = tower::ServiceExt::oneshot(app, req.body(axum::body::Body::empty()).unwrap())
        .await
        .unwrap();
    assert_eq!(resp.status(), StatusCode::OK);
    let ct = resp.headers()["content-type"].to_str().unwrap().to_string();
    let b = axum::body::to_bytes(resp.into_body(), 1 << 20)
        .await
        .unwrap();
    (ct, String::from_utf8(b.to_vec()).unwrap())
}

#[tokio::test]
async fn prometheus_text_follows_the_format() {
    let (ct, text) = scrape(None).await;
    assert_eq!(ct, "text/plain; version=0.0.4; charset=utf-8");
    let s = check(&text, false);
    // Values from the invented status in api_common.
    assert!((s["stiltd_tilt_radians{axis=\"x\"}"] - 0.25e-6).abs() < 1e-18);
    assert!((s["stiltd_tilt_radians{axis=\"y\"}"] + 0.5e-6).abs() < 1e-18);
    assert_eq!(s["stiltd_leg_temperature_celsius{leg=\"A\"}"], 24.01);
    assert!(
        !s.contains_key("stiltd_leg_temperature_celsius{leg=\"C\"}"),
        "a missing reading is left out, not sent as NaN"
    );
    assert_eq!(s["stiltd_heater_output_ratio{leg=\"B\"}"], 0.5);
    assert_eq!(s["stiltd_control_ticks_total"], 10.0);
    assert_eq!(
        s["stiltd_channel_bad_frames_total{channel=\"tiltmeter\",port=\"simulated\"}"],
        2.0
    );
    assert_eq!(s["stiltd_mode{mode=\"level\"}"], 1.0);
    assert_eq!(s["stiltd_mode{mode=\"off\"}"], 0.0);
    assert_eq!(s["stiltd_alarms{state=\"latched\"}"], 1.0);
    assert_eq!(s["stiltd_recording_dropped_rows_total"], 0.0);
    assert!(s.keys().any(|k| k.starts_with("stiltd_version{")));
}

#[tokio::test]
async fn openmetrics_when_asked_for() {
    let (ct, text) = scrape(Some(
        "application/openmetrics-text;version=1.0.0,text/plain;q=0.5",
    ))
    .await;
    assert_eq!(
        ct,
        "application/openmetrics-text; version=1.0.0; charset=utf-8"
    );
    let s = check(&text, true);
    assert!(text.contains("# TYPE stiltd_control_ticks counter\n"));
    assert!(text.contains("# UNIT stiltd_tilt_radians radians\n"));
    assert_eq!(s["stiltd_control_ticks_total"], 10.0);
}

#[tokio::test]
async fn metrics_need_a_token_when_tokens_are_configured() {
    let cfg = config();
    let fake = fake_loop(&cfg, Behaviour::Answer, 16);
    let (app, _) = app_with(cfg, &fake, tokens());
    let a = call(&app, Method::GET, "/metrics", None, None, "").await;
    assert_eq!(a.status, StatusCode::UNAUTHORIZED);
}

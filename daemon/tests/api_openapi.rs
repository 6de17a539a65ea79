//! docs/openapi.json stays true: its paths and methods are exactly the router's (from
//! `api::routes()`, the one list), each operation states the access the router enforces,
//! every `$ref` resolves, and the documented properties of the main bodies are exactly
//! the keys the server sends.

mod api_common;

use std::collections::BTreeSet;

use api_common::*;
use axum::http::Method;
use serde_json::Value;
use stilt_daemon::api::auth::Need;
use stilt_daemon::api::routes;

fn doc() -> Value {
    let p = std::path::Path::new(env!("CARGO_MANIFEST_DIR")).join("../docs/openapi.json");
    let text = std::fs::read_to_string(&p).expect("docs/openapi.json");
    serde_json::from_str(&text).expect("valid JSON")
}

#[test]
fn paths_and_methods_match_the_router() {
    let d = doc();
    assert!(d["openapi"].as_str().unwrap().starts_with("3."));
    let mut documented = BTreeSet::new();
    for (path, item) in d["paths"].as_object().unwrap() {
        for (m, op) in item.as_object().unwrap() {
            documented.insert((m.to_uppercase(), path.clone()));
            let route = routes()
                .into_iter()
                .find(|r| r.path == path && r.method.as_str().eq_ignore_ascii_case(m))
                .unwrap_or_else(|| panic!("{m} {path} is documented but not routed"));
            assert_eq!(op["x-stilt-access"], route.need.as_str(), "{m} {path}");
            assert_eq!(op["summary"], route.summary, "{m} {path}");
            let responses = op["responses"].as_object().unwrap();
            assert!(responses.contains_key("200"), "{m} {path}");
            match route.need {
                Need::Change => {
                    for code in ["400", "401", "403", "409", "413", "415", "422", "503"] {
                        assert!(responses.contains_key(code), "{m} {path} lacks {code}");
                    }
                    assert!(op["requestBody"]["content"]["application/json"].is_object());
                }
                Need::Read => assert!(responses.contains_key("401"), "{m} {path}"),
                Need::Open => assert_eq!(op["security"], serde_json::json!([])),
            }
        }
    }
    let routed: BTreeSet<_> = routes()
        .into_iter()
        .map(|r| (r.method.as_str().to_string(), r.path.to_string()))
        .collect();
    assert_eq!(documented, routed);
}

fn refs(v: &Value, out: &mut Vec<String>) {
    match v {
        Value::Object(m) => {
            for (k, x) in m {
                if k == "$ref" {
                    out.push(x.as_str().unwrap().to_string());
                } else {
                    refs(x, out);
                }
            }
        }
        Value::Array(a) => a.iter().for_each(|x| refs(x, out)),
        _ => {}
    }
}

#[test]
fn every_reference_resolves() {
    let d = doc();
    let mut all = Vec::new();
    refs(&d, &mut all);
    assert!(all.len() > 20);
    for r in all {
        let name = r
            .strip_prefix("#/components/schemas/")
            .expect("local schema ref");
        assert!(d["components"]["schemas"][name].is_object(), "{r}");
    }
}

fn props(d: &Value, schema: &str) -> BTreeSet<String> {
    d["components"]["schemas"][schema]["properties"]
        .as_object()
        .unwrap_or_else(|| panic!("{schema}"))
        .keys()
        .cloned()
        .collect()
}

fn keys(v: &Value) -> BTreeSet<String> {
    v.as_object().unwrap().keys().cloned().collect()
}

#[tokio::test]
async fn documented_bodies_are_what_the_server_sends() {
    let d = doc();
    let cfg = config();
    let fake = fake_loop(&cfg, Behaviour::Answer, 16);
    let (app, _) = app_with(cfg, &fake, tokens());
    let s = call(&app, Method::GET, "/v1/status", Some(OBSERVER), None, "")
        .await
        .json;
    assert_eq!(keys(&s), props(&d, "Status"));
    assert_eq!(keys(&s["axes"][0]), props(&d, "Axis"));
    assert_eq!(keys(&s["legs"][0]), props(&d, "Leg"));
    assert_eq!(keys(&s["alarms"][0]), props(&d, "Alarm"));
    assert_eq!(keys(&s["timing"]), props(&d, "Timing"));
    assert_eq!(keys(&s["recording"]), props(&d, "Recording"));
    assert_eq!(keys(&s["channels"][0]), props(&d, "Channel"));
    assert_eq!(keys(&s["axes"][0]["terms"]), props(&d, "Terms"));
    let c = call(&app, Method::GET, "/v1/config", Some(OBSERVER), None, "")
        .await
        .json;
    assert_eq!(keys(&c), props(&d, "Config"));
    assert_eq!(keys(&c["control"]["tilt_loop"]), props(&d, "Gains"));
    let h = call(&app, Method::GET, "/v1/health/ready", None, None, "")
        .await
        .json;
    assert_eq!(keys(&h), props(&d, "Health"));
    let a = json(
        &app,
        Method::PUT,
        "/v1/mode",
        Some(OPERATOR),
        r#"{"mode":"off"}"#,
    )
    .await
    .json;
    assert_eq!(keys(&a), props(&d, "ChangeReply"));
    let e = json(
        &app,
        Method::PUT,
        "/v1/mode",
        Some(OPERATOR),
        r#"{"mode":"x"}"#,
    )
    .await
    .json;
    assert_eq!(keys(&e), props(&d, "Error"));
    assert_eq!(
        keys(&e["error"]),
        d["components"]["schemas"]["Error"]["properties"]["error"]["properties"]
            .as_object()
            .unwrap()
            .keys()
            .cloned()
            .collect()
    );
    // Request bodies: the documented fields are the ones the server accepts.
    let gains: BTreeSet<String> = serde_json::to_value(stilt_daemon::api::wire::GainsBody {
        kp: Some(1.0),
        ti_s: Some(1.0),
        td_s: Some(1.0),
        derivative_filter_s: Some(1.0),
        setpoint_weight: Some(1.0),
        tracking_time_s: Some(1.0),
        slew_per_s: Some(1.0),
    })
    .unwrap()
    .as_object()
    .unwrap()
    .keys()
    .cloned()
    .collect();
    assert_eq!(gains, props(&d, "GainsBody"));
}

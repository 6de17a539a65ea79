//! The endpoint handlers: reads (status, configuration, health, metrics) and changes
//! (setpoints, bias, manual power, gains, mode, acknowledgements).
//!
//! A change goes: body parsed ([`JsonBody`]) → values checked against the configuration
//! (422 naming the field, nothing sent) → a [`Request`] sent on the bounded queue with a
//! timeout (the server never waits on the loop beyond `network.change_timeout_ms`, and
//! the loop never waits on the server) → the loop's answer: `Applied` → 200
//! [`ChangeReply`], `Refused` → 409 naming the field, no answer → 503. Each outcome is
//! logged under the `stiltd::audit` target with who asked, from where, what and the
//! loop's `old → new`; the loop writes the same change, with `who`, to the recording's
//! events.

use std::time::{Duration, Instant};

use axum::Extension;
use axum::Json;
use axum::extract::State;
use axum::http::header::{ACCEPT, CONTENT_TYPE};
use axum::http::{HeaderMap, HeaderValue, StatusCode};
use axum::response::{IntoResponse, Response};
use stilt_config::{LoopGains, Mode};
use tokio::sync::mpsc::error::SendTimeoutError;
use tokio::sync::oneshot;

use super::AppState;
use super::auth::Caller;
use super::body::JsonBody;
use super::error::ApiError;
use super::metrics::{self, ApiCounters};
use super::wire::*;
use crate::status::{ControlRequest, Request};

/// `GET /v1/status`.
pub async fn status(State(st): State<AppState>) -> Json<StatusWire> {
    let s = st.status();
    Json(StatusWire::new(&s, &st.inner.config))
}

/// `GET /v1/config`.
pub async fn config(State(st): State<AppState>) -> Json<ConfigWire> {
    let running = st.running();
    Json(ConfigWire::new(&st.settings().file, &running))
}

/// `GET /v1/health/live`: the server answers, so the process is alive.
pub async fn live(State(st): State<AppState>) -> Json<HealthWire> {
    Json(HealthWire {
        status: "alive".into(),
        reasons: vec![],
        uptime_s: st.status().uptime_s,
    })
}

/// `GET /v1/health/ready`: 200 when the control loop runs and has every reading its mode
/// needs, else 503 with the reasons.
pub async fn ready(State(st): State<AppState>) -> Response {
    let s = st.status();
    let mut reasons = Vec::new();
    if st.inner.handles.status.has_changed().is_err() {
        reasons.push("the control loop has stopped".to_string());
    }
    if !s.ready {
        for (k, a) in s.axes.iter().enumerate() {
            if !a.quality.is_usable() {
                reasons.push(format!("tilt {}: {}", ["x", "y"][k], a.quality.as_str()));
            }
        }
        for l in &s.legs {
            if !l.quality.is_usable() {
                reasons.push(format!("leg {}: {}", l.name, l.quality.as_str()));
            }
        }
        if reasons.is_empty() {
            reasons.push("a sensor the mode needs has no usable reading".into());
        }
    }
    let ok = reasons.is_empty();
    let body = HealthWire {
        status: if ok { "ready" } else { "not_ready" }.into(),
        reasons,
        uptime_s: s.uptime_s,
    };
    let code = if ok {
        StatusCode::OK
    } else {
        StatusCode::SERVICE_UNAVAILABLE
    };
    (code, Json(body)).into_response()
}

/// `GET /metrics`.
pub async fn metrics(State(st): State<AppState>, headers: HeaderMap) -> Response {
    let om = headers
        .get(ACCEPT)
        .and_then(|v| v.to_str().ok())
        .is_some_and(metrics::wants_openmetrics);
    let s = st.status();
    let text = metrics::render(&s, &st.inner.config, &st.inner.counters, om);
    let mut r = text.into_response();
    r.headers_mut().insert(
        CONTENT_TYPE,
        HeaderValue::from_static(metrics::content_type(om)),
    );
    r
}

/// Checks a finite value against a range; `lo_incl`/`hi_incl` say whether the ends count.
fn check(
    field: &str,
    v: f64,
    lo: f64,
    lo_incl: bool,
    hi: f64,
    hi_incl: bool,
    unit: &str,
) -> Result<f64, ApiError> {
    let ok_lo = if lo_incl { v >= lo } else { v > lo };
    let ok_hi = if hi_incl { v <= hi } else { v < hi };
    if v.is_finite() && ok_lo && ok_hi {
        return Ok(v);
    }
    let (a, b) = (
        if lo_incl { "≥" } else { ">" },
        if hi_incl { "≤" } else { "<" },
    );
    Err(ApiError::invalid(
        field,
        format!("{field} = {v} is not allowed; allowed: {a} {lo} and {b} {hi} {unit}"),
    ))
}

/// Sends a change to the loop and waits (bounded) for its answer.
async fn submit(
    st: &AppState,
    caller: &Caller,
    change: ControlRequest,
    asked: String,
) -> Result<ChangeReply, ApiError> {
    let c: &ApiCounters = &st.inner.counters;
    let who = caller.who();
    let peer_s = caller
        .peer
        .map(|p| p.to_string())
        .unwrap_or_else(|| "-".into());
    let (tx, rx) = oneshot::channel();
    let req = Request {
        change,
        who: caller.name.clone(),
        reply: tx,
    };
    let budget = Duration::from_millis(st.inner.config.network.change_timeout_ms);
    let t0 = Instant::now();
    let unanswered = |code: &'static str, message: String| {
        ApiCounters::inc(&c.unanswered);
        tracing::warn!(target: "stiltd::audit", who = %who, peer = %peer_s, asked = %asked, code, "change not taken");
        ApiError::unavailable(code, message)
    };
    match st.inner.handles.requests.send_timeout(req, budget).await {
        Ok(()) => {}
        Err(SendTimeoutError::Timeout(_)) => {
            return Err(unanswered(
                "busy",
                "the control loop's request queue stayed full; nothing was changed, retry".into(),
            ));
        }
        Err(SendTimeoutError::Closed(_)) => {
            return Err(unanswered(
                "not_running",
                "the control loop is not running; nothing was changed".into(),
            ));
        }
    }
    let left = budget.saturating_sub(t0.elapsed());
    match tokio::time::timeout(left, rx).await {
        Ok(Ok(Ok(applied))) => {
            ApiCounters::inc(&c.applied);
            tracing::info!(target: "stiltd::audit", who = %who, peer = %peer_s, asked = %asked, change = %applied.detail, "change applied");
            Ok(ChangeReply {
                detail: applied.detail,
                by: who,
            })
        }
        Ok(Ok(Err(refused))) => {
            ApiCounters::inc(&c.refused);
            tracing::warn!(target: "stiltd::audit", who = %who, peer = %peer_s, asked = %asked, field = %refused.field, reason = %refused.message, "change refused by the controller");
            Err(
                ApiError::new(StatusCode::CONFLICT, "refused", refused.message)
                    .field(refused.field),
            )
        }
        Ok(Err(_)) => Err(unanswered(
            "not_running",
            "the control loop stopped before answering; check /v1/status".into(),
        )),
        Err(_) => Err(unanswered(
            "no_answer",
            format!(
                "the control loop did not answer within {} ms; the change may still be \
                 applied: check /v1/status",
                budget.as_millis()
            ),
        )),
    }
}

/// Counts a change refused before it reached the loop.
fn invalid(st: &AppState, e: ApiError) -> ApiError {
    ApiCounters::inc(&st.inner.counters.invalid);
    e
}

/// The `x_urad` / `y_urad` of a body, each within ±`bound` (`inclusive`: the bound itself
/// allowed); at least one must be given.
fn per_axis(
    st: &AppState,
    given: [Option<f64>; 2],
    bound: f64,
    inclusive: bool,
    unit: &str,
) -> Result<[Option<f64>; 2], ApiError> {
    let mut out = [None, None];
    for (k, field) in ["x_urad", "y_urad"].into_iter().enumerate() {
        if let Some(v) = given[k] {
            out[k] = Some(
                check(field, v, -bound, inclusive, bound, inclusive, unit)
                    .map_err(|e| invalid(st, e))?,
            );
        }
    }
    if out == [None, None] {
        return Err(invalid(
            st,
            ApiError::invalid("x_urad", "give x_urad, y_urad or both"),
        ));
    }
    Ok(out)
}

/// `PUT /v1/setpoint/tilt`.
pub async fn set_tilt(
    State(st): State<AppState>,
    Extension(caller): Extension<Caller>,
    JsonBody(b): JsonBody<TiltSetpointBody>,
) -> Result<Json<ChangeReply>, ApiError> {
    let range = st.inner.config.limits.tilt_range_urad;
    let t = per_axis(
        &st,
        [b.x_urad, b.y_urad],
        range,
        false,
        "µrad (limits.tilt_range_urad)",
    )?;
    let asked = format!("tilt target µrad: x={:?} y={:?}", t[0], t[1]);
    submit(&st, &caller, ControlRequest::SetTiltTarget(t), asked)
        .await
        .map(Json)
}

/// `PUT /v1/tilt-correction`: a tilt correction held in `temperature` mode (the loop
/// refuses it in any other mode).
pub async fn set_tilt_correction(
    State(st): State<AppState>,
    Extension(caller): Extension<Caller>,
    JsonBody(b): JsonBody<TiltCorrectionBody>,
) -> Result<Json<ChangeReply>, ApiError> {
    let lim = st.inner.config.control.tilt_output_limit_urad;
    let c = per_axis(
        &st,
        [b.x_urad, b.y_urad],
        lim,
        true,
        "µrad (control.tilt_output_limit_urad)",
    )?;
    let asked = format!("held tilt correction µrad: x={:?} y={:?}", c[0], c[1]);
    submit(&st, &caller, ControlRequest::SetTiltCorrection(c), asked)
        .await
        .map(Json)
}

/// `PUT /v1/setpoint/leg-bias`.
pub async fn set_bias(
    State(st): State<AppState>,
    Extension(caller): Extension<Caller>,
    JsonBody(b): JsonBody<LegBiasBody>,
) -> Result<Json<ChangeReply>, ApiError> {
    let max = st.inner.config.limits.max_leg_temp_c;
    // The lower end is the configuration's own bound on control.leg_bias_c.
    let v = check(
        "bias_c",
        b.bias_c,
        -50.0,
        true,
        max,
        false,
        "°C (limits.max_leg_temp_c)",
    )
    .map_err(|e| invalid(&st, e))?;
    let asked = format!("leg bias °C: {v}");
    submit(&st, &caller, ControlRequest::SetLegBias(v), asked)
        .await
        .map(Json)
}

/// `PUT /v1/manual-power`.
pub async fn set_manual_power(
    State(st): State<AppState>,
    Extension(caller): Extension<Caller>,
    JsonBody(b): JsonBody<ManualPowerBody>,
) -> Result<Json<ChangeReply>, ApiError> {
    let max = st
        .inner
        .config
        .legs
        .iter()
        .map(|l| l.heater_max_power_w)
        .fold(f64::INFINITY, f64::min);
    let v = check(
        "power_w",
        b.power_w,
        0.0,
        true,
        max,
        true,
        "W (smallest heater_max_power_w)",
    )
    .map_err(|e| invalid(&st, e))?;
    let asked = format!("manual power W: {v}");
    let r = submit(&st, &caller, ControlRequest::SetManualPower(v), asked).await?;
    Ok(Json(r))
}

/// `PUT /v1/mode`.
pub async fn set_mode(
    State(st): State<AppState>,
    Extension(caller): Extension<Caller>,
    JsonBody(b): JsonBody<ModeBody>,
) -> Result<Json<ChangeReply>, ApiError> {
    let Some(m) = Mode::parse(&b.mode) else {
        return Err(invalid(
            &st,
            ApiError::invalid(
                "mode",
                format!(
                    "unknown mode {:?}; allowed: \"off\", \"manual\", \"temperature\", \"level\"",
                    b.mode
                ),
            ),
        ));
    };
    let asked = format!("mode: {m}");
    submit(&st, &caller, ControlRequest::SetMode(m), asked)
        .await
        .map(Json)
}

/// Which loop a gain change is for.
#[derive(Clone, Copy, PartialEq)]
enum Loop {
    Tilt,
    Leg,
}

/// The gains after applying a partial body, each given value checked. Bounds are the
/// configuration's own (config/src/validate.rs): Kp ≥ 0, Ti > 0, Td ≥ 0, filter ≥ 0,
/// setpoint weight 0…1, tracking time > 0, slew > 0.
fn merged_gains(cur: &LoopGains, b: &GainsBody, which: Loop) -> Result<LoopGains, ApiError> {
    if b == &GainsBody::default() {
        return Err(ApiError::invalid(
            "kp",
            "give at least one of kp, ti_s, td_s, derivative_filter_s, setpoint_weight, \
             tracking_time_s, slew_per_s",
        ));
    }
    let (kp_max, kp_unit, slew_max, slew_unit) = match which {
        Loop::Tilt => (1e3, "µrad/µrad", 1e6, "µrad/s"),
        Loop::Leg => (1e4, "W/K", 1e4, "W/s"),
    };
    let mut g = *cur;
    if let Some(v) = b.kp {
        g.kp = check("kp", v, 0.0, true, kp_max, true, kp_unit)?;
    }
    if let Some(v) = b.ti_s {
        g.ti_s = Some(check("ti_s", v, 0.0, false, 1e7, true, "s")?);
    }
    if let Some(v) = b.td_s {
        g.td_s = check("td_s", v, 0.0, true, 1e6, true, "s")?;
    }
    if let Some(v) = b.derivative_filter_s {
        g.derivative_filter_s = check("derivative_filter_s", v, 0.0, true, 1e6, true, "s")?;
    }
    if let Some(v) = b.setpoint_weight {
        g.setpoint_weight = check("setpoint_weight", v, 0.0, true, 1.0, true, "")?;
    }
    if let Some(v) = b.tracking_time_s {
        g.tracking_time_s = check("tracking_time_s", v, 0.0, false, 1e7, true, "s")?;
    }
    if let Some(v) = b.slew_per_s {
        g.slew_per_s = Some(check(
            "slew_per_s",
            v,
            0.0,
            false,
            slew_max,
            true,
            slew_unit,
        )?);
    }
    Ok(g)
}

async fn set_gains(
    st: AppState,
    caller: Caller,
    b: GainsBody,
    which: Loop,
) -> Result<Json<ChangeReply>, ApiError> {
    let cur = st.running();
    let cur = match which {
        Loop::Tilt => cur.tilt_loop,
        Loop::Leg => cur.leg_loop,
    };
    let g = merged_gains(&cur, &b, which).map_err(|e| invalid(&st, e))?;
    let (req, name) = match which {
        Loop::Tilt => (ControlRequest::SetTiltGains(g), "tilt"),
        Loop::Leg => (ControlRequest::SetLegGains(g), "leg"),
    };
    let asked = format!("{name} loop gains: {:?}", GainsWire::from(&g));
    let r = submit(&st, &caller, req, asked).await?;
    Ok(Json(r))
}

/// `PUT /v1/gains/tilt`.
pub async fn set_tilt_gains(
    State(st): State<AppState>,
    Extension(caller): Extension<Caller>,
    JsonBody(b): JsonBody<GainsBody>,
) -> Result<Json<ChangeReply>, ApiError> {
    set_gains(st, caller, b, Loop::Tilt).await
}

/// `PUT /v1/gains/leg`.
pub async fn set_leg_gains(
    State(st): State<AppState>,
    Extension(caller): Extension<Caller>,
    JsonBody(b): JsonBody<GainsBody>,
) -> Result<Json<ChangeReply>, ApiError> {
    set_gains(st, caller, b, Loop::Leg).await
}

/// `POST /v1/alarms/acknowledge`: `{"id": "…"}` for one alarm, `{}` for all.
pub async fn acknowledge(
    State(st): State<AppState>,
    Extension(caller): Extension<Caller>,
    JsonBody(b): JsonBody<AckBody>,
) -> Result<Json<ChangeReply>, ApiError> {
    if let Some(id) = &b.id {
        let known: Vec<String> = st.status().alarms.iter().map(|a| a.id.clone()).collect();
        if !known.iter().any(|k| k == id) {
            let listed = if known.is_empty() {
                "no alarms are listed now".to_string()
            } else {
                format!("listed now: {}", known.join(", "))
            };
            return Err(invalid(
                &st,
                ApiError::new(
                    StatusCode::NOT_FOUND,
                    "unknown_alarm",
                    format!("id: no alarm {id:?}; {listed}"),
                )
                .field("id"),
            ));
        }
    }
    let asked = match &b.id {
        Some(id) => format!("acknowledge {id}"),
        None => "acknowledge all".into(),
    };
    submit(&st, &caller, ControlRequest::Acknowledge(b.id), asked)
        .await
        .map(Json)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn ranges_are_checked_at_both_ends() {
        assert!(check("a", 1.0, 0.0, false, 2.0, false, "").is_ok());
        assert!(check("a", 0.0, 0.0, false, 2.0, false, "").is_err());
        assert!(check("a", 0.0, 0.0, true, 2.0, false, "").is_ok());
        assert!(check("a", 2.0, 0.0, true, 2.0, false, "").is_err());
        assert!(check("a", 2.0, 0.0, true, 2.0, true, "").is_ok());
        assert!(check("a", f64::NAN, -1e9, true, 1e9, true, "").is_err());
        let e = check("kp", -1.0, 0.0, true, 5.0, true, "W/K").unwrap_err();
        assert_eq!(e.field.as_deref(), Some("kp"));
        assert!(e.message.contains("≥ 0"), "{}", e.message);
    }
}

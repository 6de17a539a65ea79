//! The tiltmeter's task: query at `poll_hz` through the configured line protocol and push
//! every outcome into the shared store's bounded tilt buffer.
//!
//! Each sample is raw units (fields `x`, `y`; calibration happens in the pipeline with
//! `Tiltmeter::calibrate`). Quality: `ok`; `out_of_range` when a `bad_status_mask` bit is
//! set; `timeout` or `bad_frame` when the request failed after its retries (raw NaN). While
//! the port is closed no samples are pushed: the loop sees the tilt as missing.

use std::sync::Arc;
use std::time::Duration;

use stilt_config::TiltmeterLink;
use stilt_protocol::line::{LineQuery, Reading};
use stilt_protocol::session::Session;
use tokio::time::{Instant, MissedTickBehavior};

use super::link::{Line, Outcome, session_config};
use super::{Shared, Stamped, now_utc_ns, secs_since};
use crate::rows::Quality;

/// Quiet time before the next query (the line protocol has no framing gap of its own).
const TURNAROUND: Duration = Duration::from_millis(1);

/// Value and quality of one decoded reply.
pub fn classify(link: &TiltmeterLink, r: &Reading) -> ([f64; 2], Quality) {
    let spec = &link.spec;
    let (Some(x), Some(y)) = (spec.value(r, "x"), spec.value(r, "y")) else {
        return ([f64::NAN; 2], Quality::BadFrame);
    };
    if !(x.is_finite() && y.is_finite()) {
        return ([f64::NAN; 2], Quality::BadFrame);
    }
    if let Some(st) = spec.value(r, "status") {
        let bits = if (0.0..=f64::from(u32::MAX)).contains(&st) && st.fract() == 0.0 {
            st as u32
        } else {
            return ([x, y], Quality::BadFrame);
        };
        if bits & link.bad_status_mask != 0 {
            return ([x, y], Quality::OutOfRange);
        }
    }
    ([x, y], Quality::Ok)
}

/// Runs until aborted.
pub async fn run(mut line: Line, link: TiltmeterLink, shared: Shared, origin: Instant) {
    let spec = Arc::new(link.spec.clone());
    let max = spec.max_reply_len() + spec.terminator().len();
    let mut session = Session::<LineQuery>::new(session_config(
        link.link.timeout_ms,
        link.link.retries,
        max,
        TURNAROUND,
    ));
    let mut tick = tokio::time::interval(Duration::from_secs_f64(1.0 / link.poll_hz));
    // A late poll is skipped, not bunched: samples stay evenly spaced.
    tick.set_missed_tick_behavior(MissedTickBehavior::Skip);
    loop {
        tick.tick().await;
        let outcome = line.request(&mut session, LineQuery(spec.clone())).await;
        let (value, quality) = match outcome {
            Outcome::Reply(r) => classify(&link, &r),
            Outcome::Failed { timeout: true, .. } => ([f64::NAN; 2], Quality::Timeout),
            Outcome::Failed { .. } | Outcome::Sent => ([f64::NAN; 2], Quality::BadFrame),
            Outcome::Disconnected => continue,
        };
        let sample = Stamped {
            value,
            quality,
            t_acq_s: secs_since(origin),
            t_utc_ns: now_utc_ns(),
        };
        shared.with(|s| {
            if s.tilt.len() >= s.tilt_capacity {
                s.tilt.pop_front();
                s.tilt_dropped += 1;
            }
            s.tilt.push_back(sample);
        });
    }
}

//! The thermometer's task: every `1/poll_hz`, read the resistances and then the status of
//! the legs' channels (Modbus RTU, our own invented RTD register map) and convert them to
//! °C (IEC 60751 via `stilt_protocol::convert::PlatinumRtd`).
//!
//! A channel whose status says open, over or under range, whose register holds "no
//! reading", or whose resistance lies outside the standard's range is `out_of_range`; a
//! channel still settling (`not ready`) keeps its previous reading. A failed request marks
//! every channel's last failure (timeout or bad frame); see the parent module for how that
//! becomes a quality.

use std::time::Duration;

use stilt_config::ThermometerLink;
use stilt_protocol::convert::PlatinumRtd;
use stilt_protocol::modbus::timing::{CharFormat, silences};
use stilt_protocol::modbus::{MAX_ADU, Transaction, rtd};
use stilt_protocol::session::Session;
use tokio::time::{Instant, MissedTickBehavior};

use super::link::{Line, Outcome, session_config};
use super::{Shared, Stamped, now_utc_ns, secs_since};
use crate::rows::Quality;

/// The temperature and quality of one channel from its resistance and status.
pub fn convert(
    rtd_sensor: &PlatinumRtd,
    ohms: Option<f64>,
    status: rtd::ChannelStatus,
) -> (f64, Quality) {
    if status.open() || status.over_range() || status.under_range() || status.disabled() {
        return (f64::NAN, Quality::OutOfRange);
    }
    match ohms.map(|r| rtd_sensor.temperature(r)) {
        Some(Ok(t)) => (t, Quality::Ok),
        _ => (f64::NAN, Quality::OutOfRange),
    }
}

/// Runs until aborted. `channels` are the legs' thermometer channels (each < 8).
pub async fn run(
    mut line: Line,
    link: ThermometerLink,
    channels: Vec<usize>,
    shared: Shared,
    origin: Instant,
) {
    let first = channels.iter().copied().min().unwrap_or(0) as u8;
    let last = channels.iter().copied().max().unwrap_or(0) as u8;
    let count = last - first + 1;
    // The 3.5-character silence between frames (Modbus over Serial Line §2.5.1.1).
    let turnaround = silences(link.link.baud, CharFormat::RTU_DEFAULT)
        .map(|s| s.inter_frame)
        .unwrap_or(Duration::from_millis(2));
    let mut session = Session::<Transaction>::new(session_config(
        link.link.timeout_ms,
        link.link.retries,
        MAX_ADU,
        turnaround,
    ));
    let sensor = PlatinumRtd::new(link.sensor.r0_ohm()).unwrap_or(PlatinumRtd::PT100);
    let (Ok(read_r), Ok(read_s)) = (
        rtd::read_resistances(first, count).and_then(|r| {
            Transaction::new(link.unit, r).map_err(|e| rtd::RtdError::Mismatch {
                expected: "a valid request",
                got: e.to_string(),
            })
        }),
        rtd::read_status(first, count).and_then(|r| {
            Transaction::new(link.unit, r).map_err(|e| rtd::RtdError::Mismatch {
                expected: "a valid request",
                got: e.to_string(),
            })
        }),
    ) else {
        tracing::error!(
            first,
            count,
            "thermometer channels outside the register map; not polling"
        );
        return;
    };
    let mut tick = tokio::time::interval(Duration::from_secs_f64(1.0 / link.poll_hz));
    tick.set_missed_tick_behavior(MissedTickBehavior::Skip);
    loop {
        tick.tick().await;
        let fail = |q: Quality| {
            let t = secs_since(origin);
            shared.with(|s| {
                for ch in first..=last {
                    if let Some(slot) = s.temps.get_mut(usize::from(ch)) {
                        slot.failure = Some((t, q));
                    }
                }
            });
        };
        let ohms = match line.request(&mut session, read_r.clone()).await {
            Outcome::Reply(resp) => match rtd::parse_resistances(&resp, count) {
                Ok(v) => v,
                Err(e) => {
                    tracing::debug!(error = %e, "thermometer reply unusable");
                    shared.with(|s| s.channels[super::THERMOMETER].bad_frames += 1);
                    fail(Quality::BadFrame);
                    continue;
                }
            },
            Outcome::Failed { timeout, .. } => {
                fail(if timeout {
                    Quality::Timeout
                } else {
                    Quality::BadFrame
                });
                continue;
            }
            Outcome::Sent | Outcome::Disconnected => continue,
        };
        let status = match line.request(&mut session, read_s.clone()).await {
            Outcome::Reply(resp) => match rtd::parse_status(&resp, count) {
                Ok(v) => v,
                Err(_) => {
                    shared.with(|s| s.channels[super::THERMOMETER].bad_frames += 1);
                    fail(Quality::BadFrame);
                    continue;
                }
            },
            Outcome::Failed { timeout, .. } => {
                fail(if timeout {
                    Quality::Timeout
                } else {
                    Quality::BadFrame
                });
                continue;
            }
            Outcome::Sent | Outcome::Disconnected => continue,
        };
        let (t_acq_s, t_utc_ns) = (secs_since(origin), now_utc_ns());
        shared.with(|s| {
            for (k, (r, st)) in ohms.iter().zip(&status).enumerate() {
                if st.not_ready() {
                    continue;
                }
                let (value, quality) = convert(&sensor, *r, *st);
                if let Some(slot) = s.temps.get_mut(usize::from(first) + k) {
                    slot.last = Some(Stamped {
                        value,
                        quality,
                        t_acq_s,
                        t_utc_ns,
                    });
                }
            }
        });
    }
}

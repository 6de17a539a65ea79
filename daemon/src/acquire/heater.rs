//! The heater supply's task: write every new drive command (SCPI, our own invented command
//! set; channel n drives leg n−1), then read each output's current back and compare the
//! power `I²·R` with the commanded `V²/R`. The settings of all outputs and the queries
//! reading them back go in one program message (units joined by `;`, IEEE 488.2), answered
//! in one response message, so a tick costs the line one exchange whatever the number of legs.
//!
//! On every (re)connection the task clears the supply's status (`*CLS`), writes the latest
//! command (zero at start: a supply may still hold a crashed run's setting) to each channel,
//! then switches each output on. Commands never queue up: a `watch`
//! channel holds only the newest, so a slow or absent supply costs the loop nothing and
//! the supply always gets the freshest setting. A readback beyond `readback_tolerance_w`
//! raises a fault event (and counts in the `heater_readback` channel); its return within
//! tolerance clears it.

use stilt_config::HeaterLink;
use stilt_protocol::scpi::heater::{HeaterBatch, HeaterReply, HeaterRequest, MAX_VOLTS};
use stilt_protocol::session::Session;
use tokio::sync::watch;
use tokio::time::Instant;

use super::link::{Line, Outcome, session_config};
use super::{HEATER, HEATER_READBACK, HeaterCommand, Shared, Stamped, now_utc_ns, secs_since};
use crate::rows::Quality;

/// Quiet time between SCPI messages (common practice for ASCII instruments on a serial line).
const TURNAROUND: std::time::Duration = std::time::Duration::from_millis(1);

/// A drive command the supply may be sent: clamped to 0 … `MAX_VOLTS`, zero if not finite.
fn safe_volts(v: f64) -> f64 {
    if v.is_finite() {
        v.clamp(0.0, MAX_VOLTS)
    } else {
        0.0
    }
}

/// Whether a readback disagrees with the command.
pub fn mismatch(commanded_v: f64, measured_a: f64, r_ohm: f64, tolerance_w: f64) -> bool {
    let expected = commanded_v * commanded_v / r_ohm;
    let got = measured_a * measured_a * r_ohm;
    !(got.is_finite() && (expected - got).abs() <= tolerance_w)
}

/// Runs until the command channel closes (the backend is gone); the last command written
/// is then the safe one the daemon sent on its way out.
pub async fn run(
    mut line: Line,
    link: HeaterLink,
    resistances: Vec<f64>,
    mut cmd: watch::Receiver<HeaterCommand>,
    shared: Shared,
    origin: Instant,
) {
    let mut session = Session::<HeaterBatch>::new(session_config(
        link.link.timeout_ms,
        link.link.retries,
        256,
        TURNAROUND,
    ));
    let n = resistances.len();
    let channel = |ch: usize| ch as u8 + 1;
    let mut need_init = true;
    loop {
        if line.ensure_open().await {
            need_init = true;
        }
        if need_init {
            // The latest command (zero at start) goes to every channel *before* its output
            // is switched on: after a crash the supply may still hold the old setting.
            let latest = cmd.borrow().volts.clone();
            let mut init = vec![HeaterRequest::ClearStatus];
            for ch in 0..n {
                init.push(HeaterRequest::SetVoltage {
                    channel: channel(ch),
                    volts: safe_volts(latest.get(ch).copied().unwrap_or(0.0)),
                });
                init.push(HeaterRequest::SetOutput {
                    channel: channel(ch),
                    on: true,
                });
            }
            let r = line.request(&mut session, HeaterBatch(init)).await;
            if matches!(r, Outcome::Disconnected) {
                continue;
            }
            need_init = false;
            cmd.mark_changed();
        }
        if cmd.changed().await.is_err() {
            return;
        }
        let c = cmd.borrow_and_update().clone();
        // Every output's setting, then (with readback) every output's current, in one
        // program message: one write and at most one response per tick. The queries come
        // after the settings, so they read the new setting back.
        let mut units: Vec<HeaterRequest> = (0..n)
            .map(|ch| HeaterRequest::SetVoltage {
                channel: channel(ch),
                volts: safe_volts(c.volts.get(ch).copied().unwrap_or(0.0)),
            })
            .collect();
        if link.readback {
            units.extend((0..n).map(|ch| HeaterRequest::MeasureCurrent {
                channel: channel(ch),
            }));
        }
        let outcome = line.request(&mut session, HeaterBatch(units)).await;
        if matches!(outcome, Outcome::Disconnected) {
            // Reconnect, re-initialise and write the newest command again.
            need_init = true;
            continue;
        }
        // The settings went out (a failed readback is the query's failure, not theirs).
        shared.with(|s| s.applied_generation = s.applied_generation.max(c.generation));
        let Outcome::Reply(replies) = outcome else {
            continue;
        };
        for (ch, ((v, r), reply)) in c.volts.iter().zip(&resistances).zip(replies).enumerate() {
            let HeaterReply::Amps(amps) = reply else {
                continue;
            };
            let bad = mismatch(*v, amps, *r, link.readback_tolerance_w);
            let p = amps * amps * r;
            let (t_acq_s, t_utc_ns) = (secs_since(origin), now_utc_ns());
            let changed = shared.with(|s| {
                s.readback_w[ch] = Some(Stamped {
                    value: p,
                    quality: if bad {
                        Quality::OutOfRange
                    } else {
                        Quality::Ok
                    },
                    t_acq_s,
                    t_utc_ns,
                });
                let rb = &mut s.channels[HEATER_READBACK];
                rb.requests += 1;
                if bad {
                    rb.bad_frames += 1;
                }
                let was = std::mem::replace(&mut s.mismatch[ch], bad);
                was != bad
            });
            if changed {
                let detail = format!(
                    "output {}: commanded {:.3} W ({:.3} V), read back {:.3} W ({:.4} A), tolerance {} W",
                    ch + 1,
                    v * v / r,
                    v,
                    p,
                    amps,
                    link.readback_tolerance_w
                );
                if bad {
                    tracing::warn!(channel = ch + 1, %detail, "heater readback mismatch");
                }
                shared.fault(HEATER, format!("readback mismatch, {detail}"), bad);
            }
        }
    }
}

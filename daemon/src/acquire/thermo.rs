//! The thermometer line's task: every `1/poll_hz`, for each Modbus unit on the line in
//! turn (one unit, or an RS-485 bus of several), read the scan records (resistance and
//! status) of its legs' channels in one transaction (Modbus RTU, our own invented RTD
//! register map) and convert them to °C (IEC 60751 via `stilt_protocol::convert::PlatinumRtd`).
//!
//! A channel whose status says open, over or under range, whose register holds "no
//! reading", or whose resistance lies outside the standard's range is `out_of_range`; a
//! channel still settling (`not ready`) keeps its previous reading; a resistance repeating
//! exactly for `stuck_after_s` (if set) is `stale`. A failed request marks
//! the last failure (timeout or bad frame) of every channel of that unit only; see the
//! parent module for how that becomes a quality. On a bus each unit's requests, timeouts
//! and bad frames also count in its own channel `thermometer@<unit>`.

use std::time::Duration;

use stilt_config::ThermometerLink;
use stilt_protocol::convert::PlatinumRtd;
use stilt_protocol::modbus::timing::silences;
use stilt_protocol::modbus::{MAX_ADU, Transaction, rtd};
use stilt_protocol::session::Session;
use tokio::time::{Instant, MissedTickBehavior};

use super::link::{Line, Outcome, session_config};
use super::{
    CHANNELS_PER_UNIT, FIRST_UNIT_CHANNEL, Shared, Stamped, THERMOMETER, now_utc_ns, secs_since,
};
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

/// One unit of the line: its address, the register window its legs need, the transactions
/// that read it, and where its counters and readings go.
struct Unit {
    address: u8,
    /// First channel read (the lowest of its legs').
    first: u8,
    /// Channels read from `first`.
    count: u8,
    /// Reads the scan records of channels `first .. first + count`.
    read: Transaction,
    /// Its own counters channel, on a line of several units.
    counters: Option<usize>,
    /// Its first slot in the store's `temps` (`k · 8`).
    slot_base: usize,
    stuck: Vec<super::tilt::Stuck<Option<f64>>>,
}

/// The units of `link` and the register windows their legs need; `None` (logged) if a
/// channel is outside the register map.
fn units(link: &ThermometerLink, slots: &[usize]) -> Option<Vec<Unit>> {
    let several = link.units.len() > 1;
    let mut out = Vec::new();
    for (k, &address) in link.units.iter().enumerate() {
        let base = k * CHANNELS_PER_UNIT;
        let chans: Vec<usize> = slots
            .iter()
            .filter(|s| (base..base + CHANNELS_PER_UNIT).contains(*s))
            .map(|s| s - base)
            .collect();
        let (Some(first), Some(last)) = (chans.iter().min(), chans.iter().max()) else {
            continue;
        };
        let (first, count) = (*first as u8, (*last - *first + 1) as u8);
        let tx = |r: Result<stilt_protocol::modbus::Request, rtd::RtdError>| {
            r.ok().and_then(|r| Transaction::new(address, r).ok())
        };
        let Some(read) = tx(rtd::read_scan_records(first, count)) else {
            tracing::error!(
                unit = address,
                first,
                count,
                "thermometer channels outside the register map; not polling"
            );
            return None;
        };
        out.push(Unit {
            address,
            first,
            count,
            read,
            counters: several.then_some(FIRST_UNIT_CHANNEL + k),
            slot_base: base,
            stuck: vec![super::tilt::Stuck::default(); usize::from(count)],
        });
    }
    Some(out)
}

/// Runs until aborted. `slots` are the legs' places in the store's `temps`
/// ([`super::thermo_slots`]: unit index · 8 + channel, each channel < 8).
///
/// Every period each unit is read in turn (one scan-record transaction each) through one session,
/// so the t3.5 silence separates every transaction on the line, whichever unit it is for.
/// A unit whose request fails marks only its own channels and is skipped until the next
/// period; the others are read as usual.
pub async fn run(
    mut line: Line,
    link: ThermometerLink,
    slots: Vec<usize>,
    shared: Shared,
    origin: Instant,
) {
    // The 3.5-character silence between frames (Modbus over Serial Line §2.5.1.1), for the
    // line's actual character format.
    let turnaround = silences(link.link.baud, link.link.framing)
        .map(|s| s.inter_frame)
        .unwrap_or(Duration::from_millis(2));
    let mut session = Session::<Transaction>::new(session_config(
        link.link.timeout_ms,
        link.link.retries,
        MAX_ADU,
        turnaround,
    ));
    let sensor = PlatinumRtd::new(link.sensor.r0_ohm()).unwrap_or(PlatinumRtd::PT100);
    let Some(mut units) = units(&link, &slots) else {
        return;
    };
    let mut tick = tokio::time::interval(Duration::from_secs_f64(1.0 / link.poll_hz));
    tick.set_missed_tick_behavior(MissedTickBehavior::Skip);
    loop {
        tick.tick().await;
        for u in &mut units {
            read_unit(&mut line, &mut session, u, &sensor, &link, &shared, origin).await;
        }
    }
}

/// One unit's scan: one transaction for its channels' resistances and status; the readings
/// (or the failure) go to its slots.
async fn read_unit(
    line: &mut Line,
    session: &mut Session<Transaction>,
    u: &mut Unit,
    sensor: &PlatinumRtd,
    link: &ThermometerLink,
    shared: &Shared,
    origin: Instant,
) {
    let (first, count, base) = (usize::from(u.first), u.count, u.slot_base);
    let fail = |q: Quality| {
        let t = secs_since(origin);
        shared.with(|s| {
            for ch in first..first + usize::from(count) {
                if let Some(slot) = s.temps.get_mut(base + ch) {
                    slot.failure = Some((t, q));
                }
            }
        });
    };
    let bad_frame = |unit: Option<usize>| {
        shared.with(|s| {
            for ch in std::iter::once(THERMOMETER).chain(unit) {
                if let Some(c) = s.channels.get_mut(ch) {
                    c.bad_frames += 1;
                }
            }
        });
        fail(Quality::BadFrame);
    };
    let records = match line
        .request_counted(session, u.read.clone(), u.counters)
        .await
    {
        Outcome::Reply(resp) => match rtd::parse_scan_records(&resp, count) {
            Ok(v) => v,
            Err(e) => {
                tracing::debug!(unit = u.address, error = %e, "thermometer reply unusable");
                bad_frame(u.counters);
                return;
            }
        },
        Outcome::Failed { timeout, .. } => {
            fail(if timeout {
                Quality::Timeout
            } else {
                Quality::BadFrame
            });
            return;
        }
        Outcome::Sent | Outcome::Disconnected => return,
    };
    let (t_acq_s, t_utc_ns) = (secs_since(origin), now_utc_ns());
    shared.with(|s| {
        for (k, (r, st)) in records.iter().enumerate() {
            if st.not_ready() {
                continue;
            }
            let (value, mut quality) = convert(sensor, *r, *st);
            if let Some(limit) = link.stuck_after_s
                && quality == Quality::Ok
                && u.stuck[k].repeats_for(*r, t_acq_s) >= limit
            {
                quality = Quality::Stale;
            }
            if let Some(slot) = s.temps.get_mut(base + first + k) {
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

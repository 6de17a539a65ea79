//! Serial acquisition: one tokio task per instrument line, a shared "latest" store, and the
//! [`SerialBackend`] the control loop reads and commands without ever waiting on a port.
//!
//! ```text
//!  tiltmeter task ──┐ (line protocol, poll_hz)      ┌── poll(): tilt samples since last tick,
//!  thermometer task ┼─> Shared store (Mutex, held ──┤   latest leg temperatures, readback,
//!  heater task <────┘   only to copy values in/out) └── channel counters     apply(): watch
//! ```
//!
//! - [`link`]: opening and reopening a port with back-off, driving a sans-IO session with a
//!   timeout per request and bounded retries, counting timeouts and bad frames.
//! - [`tilt`], [`thermo`], [`heater`]: the three instruments' loops (the thermometer line
//!   may be an RS-485 bus of several Modbus units, polled in turn by its one task, each
//!   unit with its own counters `thermometer@<unit>`).
//! - [`SerialBackend`]: `poll` (copy out, never blocks), `apply` (a `watch` send, never
//!   blocks), `safe_off` (zero volts queued first, ahead of anything else).
//! - [`FaultSink`]: a [`RowSink`] wrapper that writes the acquisition's fault events
//!   (port lost, reconnected, heater readback mismatch) as [`EventKind::Fault`] rows.
//!
//! Every value carries its time on the acquisition clock (monotonic, seconds since the
//! backend started; `poll` maps it onto the caller's run clock) and in UTC, and a
//! [`Quality`]. Rules for leg temperatures, in order: a reading no older than
//! `stale_after_s` is reported with its own quality (ok, or out of range for an open or
//! impossible sensor); else, if the last request failed, that failure (timeout, bad frame);
//! else `stale`; `missing` until the first reading.

pub mod heater;
pub mod link;
pub mod thermo;
pub mod tilt;

use std::collections::VecDeque;
use std::sync::{Arc, Mutex};
use std::time::Duration;

use stilt_config::Config;
use tokio::sync::watch;
use tokio::time::Instant;
use tracing::Instrument;

use crate::rows::{
    ControlRow, EventKind, EventRow, Quality, RowSink, SinkError, SinkReport, Stamp, TiltSample,
};
use crate::status::ChannelStatus;

pub use link::{Backoff, BoxPort, Opener, SerialOpener};

/// Index of each instrument in [`Store::channels`].
pub const TILTMETER: usize = 0;
/// See [`TILTMETER`].
pub const THERMOMETER: usize = 1;
/// See [`TILTMETER`].
pub const HEATER: usize = 2;
/// The heater's readback comparison (requests = comparisons, bad_frames = mismatches).
pub const HEATER_READBACK: usize = 3;
/// On a thermometer bus of several units, unit `units[k]`'s own counters are channel
/// `FIRST_UNIT_CHANNEL + k`, named `thermometer@<unit>` (the `thermometer` channel keeps
/// the line's totals). A line with one unit has no such channels.
pub const FIRST_UNIT_CHANNEL: usize = 4;
/// Thermometer channels per unit in the latest store (the RTD register map's 8).
pub const CHANNELS_PER_UNIT: usize = 8;

/// The name of a thermometer unit's own channel.
pub fn unit_channel_name(unit: u8) -> String {
    format!("thermometer@{unit}")
}

/// Most fault events kept for [`FaultSink`] before the oldest is dropped.
const MAX_EVENTS: usize = 256;

/// A value with its times and quality.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Stamped<T> {
    /// The value (NaN parts when there is none).
    pub value: T,
    /// How far it can be trusted.
    pub quality: Quality,
    /// Seconds since the acquisition started (monotonic).
    pub t_acq_s: f64,
    /// UTC, ns since the Unix epoch.
    pub t_utc_ns: i64,
}

/// One leg-temperature channel's latest state.
#[derive(Debug, Clone, Copy, Default, PartialEq)]
pub struct TempSlot {
    /// Latest decoded reading (ok or out of range).
    pub last: Option<Stamped<f64>>,
    /// Latest communication failure (timeout or bad frame) and when.
    pub failure: Option<(f64, Quality)>,
}

/// A fault or recovery the acquisition noticed, for the event stream.
#[derive(Debug, Clone, PartialEq)]
pub struct AcqEvent {
    /// Acquisition clock, s.
    pub t_acq_s: f64,
    /// UTC, ns.
    pub t_utc_ns: i64,
    /// `tiltmeter`, `thermometer`, `heater`.
    pub source: String,
    /// What happened.
    pub detail: String,
    /// True for a fault, false for a recovery.
    pub fault: bool,
}

/// The heater command the loop last asked for.
#[derive(Debug, Clone, PartialEq, Default)]
pub struct HeaterCommand {
    /// Drive voltage per leg, V.
    pub volts: Vec<f64>,
    /// Increases with every command.
    pub generation: u64,
}

/// Everything the tasks share. Locked only to copy values in or out.
#[derive(Debug, Default)]
pub struct Store {
    /// Counters: tiltmeter, thermometer, heater, heater readback, then one per thermometer
    /// unit when the line holds several ([`FIRST_UNIT_CHANNEL`]).
    pub channels: Vec<ChannelStatus>,
    /// Tilt samples not yet taken by `poll`: raw values.
    pub tilt: VecDeque<Stamped<[f64; 2]>>,
    /// Bound of `tilt`.
    pub tilt_capacity: usize,
    /// Samples dropped because nobody polled.
    pub tilt_dropped: u64,
    /// Per thermometer channel: slot `k · 8 + channel` for the line's `k`-th unit (in
    /// `instruments.thermometer.units` order; the RTD map's 8 channels each).
    pub temps: Vec<TempSlot>,
    /// Power read back per leg, W.
    pub readback_w: Vec<Option<Stamped<f64>>>,
    /// Legs whose readback disagrees with the command now.
    pub mismatch: Vec<bool>,
    /// The last heater command generation fully written to the supply.
    pub applied_generation: u64,
    /// Fault events waiting for the event stream.
    pub events: VecDeque<AcqEvent>,
    /// Offset from the acquisition clock to the caller's run clock, s (set by `poll`).
    pub run_offset_s: Option<f64>,
    /// Start of the acquisition clock.
    pub origin: Option<Instant>,
    /// Fault events raised so far (recoveries not counted).
    pub fault_events: u64,
}

/// The shared store, cloned into every task.
#[derive(Debug, Clone, Default)]
pub struct Shared(Arc<Mutex<Store>>);

impl Shared {
    /// Runs `f` with the store locked (a poisoned lock is used anyway: the data are plain
    /// values and stay consistent field by field).
    pub fn with<R>(&self, f: impl FnOnce(&mut Store) -> R) -> R {
        let mut g = self.0.lock().unwrap_or_else(|e| e.into_inner());
        f(&mut g)
    }

    /// Queues a fault (or recovery) event of channel `channel`.
    pub fn fault(&self, channel: usize, detail: String, fault: bool) {
        let t_utc_ns = now_utc_ns();
        self.with(|s| {
            let source = s
                .channels
                .get(channel)
                .map(|c| c.name.clone())
                .unwrap_or_default();
            if fault {
                s.fault_events += 1;
            }
            if s.events.len() >= MAX_EVENTS {
                s.events.pop_front();
            }
            let t_acq_s = s.origin.map_or(0.0, secs_since);
            s.events.push_back(AcqEvent {
                t_acq_s,
                t_utc_ns,
                source,
                detail,
                fault,
            });
        });
    }
}

/// UTC now, ns since the Unix epoch.
pub fn now_utc_ns() -> i64 {
    std::time::SystemTime::now()
        .duration_since(std::time::UNIX_EPOCH)
        .map_or(0, |d| i64::try_from(d.as_nanos()).unwrap_or(i64::MAX))
}

/// Seconds since `origin`.
pub(crate) fn secs_since(origin: Instant) -> f64 {
    Instant::now()
        .saturating_duration_since(origin)
        .as_secs_f64()
}

/// What one `poll` returns (the fields of the runtime's `Readings`).
#[derive(Debug, Clone, PartialEq, Default)]
pub struct AcqReadings {
    /// Tilt samples since the last poll: (run clock s, raw, quality).
    pub tilt: Vec<(f64, [f64; 2], Quality)>,
    /// Per leg in configuration order: (°C, quality); NaN when there is no value.
    pub leg_temps: Vec<(f64, Quality)>,
    /// Per leg: seconds since the last usable reading.
    pub leg_temp_age_s: Vec<Option<f64>>,
    /// Per leg: heater power read back, W.
    pub readback_power_w: Vec<Option<f64>>,
    /// Counters per instrument.
    pub channels: Vec<ChannelStatus>,
}

/// Errors starting the acquisition.
#[derive(Debug, thiserror::Error)]
pub enum AcqError {
    /// The configuration has no `[instruments]`.
    #[error(
        "the configuration has no [instruments] section, so there is nothing to read (see config/examples/hardware-template.toml)"
    )]
    NoInstruments,
}

/// The three openers of a stage's lines.
pub struct Openers {
    /// Tiltmeter line.
    pub tiltmeter: Box<dyn Opener>,
    /// Thermometer line.
    pub thermometer: Box<dyn Opener>,
    /// Heater supply line.
    pub heater: Box<dyn Opener>,
}

impl Openers {
    /// Serial openers for the configured ports. When the ports came from a port map, each
    /// reopen reads the map again (a restarted simulator writes new pty paths).
    pub fn serial(cfg: &Config) -> Result<Openers, AcqError> {
        let i = cfg.instruments.as_ref().ok_or(AcqError::NoInstruments)?;
        let make = |name: &'static str, link: &stilt_config::SerialLink| -> Box<dyn Opener> {
            let configured = link.port.clone();
            let map = i.port_map.clone();
            let resolve = move || {
                map.as_deref()
                    .and_then(|m| port_from_map(m, name))
                    .unwrap_or_else(|| configured.clone())
            };
            Box::new(SerialOpener {
                resolve: Box::new(resolve),
                baud: link.baud,
                // As configured; the thermometer's default is Modbus RTU's 8E1 (Modbus over
                // Serial Line §2.5.1), the others' 8N1 (stilt-config).
                framing: link.framing,
                last: link.port.clone(),
            })
        };
        Ok(Openers {
            tiltmeter: make("tiltmeter", &i.tiltmeter.link),
            thermometer: make("thermometer", &i.thermometer.link),
            heater: make("heater", &i.heater.link),
        })
    }
}

/// The current path of `name` in a port map file, if the file names one.
fn port_from_map(path: &std::path::Path, name: &str) -> Option<String> {
    stilt_config::port_map_port(path, name)
}

/// The serial instruments as the control loop sees them. See the module docs.
pub struct SerialBackend {
    shared: Shared,
    origin: Instant,
    cmd: watch::Sender<HeaterCommand>,
    legs: Vec<LegMap>,
    stale_after_s: f64,
    tasks: Vec<tokio::task::JoinHandle<()>>,
}

#[derive(Debug, Clone)]
struct LegMap {
    /// Index into [`Store::temps`].
    thermometer_slot: usize,
}

/// Each leg's slot in [`Store::temps`]: `k · 8 + channel`, `k` its unit's place in
/// `instruments.thermometer.units`.
pub fn thermo_slots(cfg: &Config) -> Vec<usize> {
    let th = cfg.instruments.as_ref().map(|i| &i.thermometer);
    cfg.legs
        .iter()
        .enumerate()
        .map(|(i, l)| {
            let k = th
                .and_then(|t| {
                    let u = t.leg_units.get(i)?;
                    t.units.iter().position(|x| x == u)
                })
                .unwrap_or(0);
            k * CHANNELS_PER_UNIT + l.thermometer_channel
        })
        .collect()
}

impl SerialBackend {
    /// Opens the configured serial ports (in the tasks, with back-off) and starts polling.
    /// Must be called inside a tokio runtime.
    pub fn start(cfg: &Config) -> Result<SerialBackend, AcqError> {
        let openers = Openers::serial(cfg)?;
        Self::start_with(cfg, openers)
    }

    /// [`Self::start`] with given openers (tests use in-memory or pty pairs).
    pub fn start_with(cfg: &Config, openers: Openers) -> Result<SerialBackend, AcqError> {
        let inst = cfg.instruments.clone().ok_or(AcqError::NoInstruments)?;
        let origin = Instant::now();
        let shared = Shared::default();
        let per_tick = (inst.tiltmeter.poll_hz / cfg.control.rate_hz).ceil() as usize;
        shared.with(|s| {
            let ch = |name: &str, port: &str| ChannelStatus {
                name: name.into(),
                port: port.into(),
                ..ChannelStatus::default()
            };
            s.channels = vec![
                ch("tiltmeter", &openers.tiltmeter.name()),
                ch("thermometer", &openers.thermometer.name()),
                ch("heater", &openers.heater.name()),
                ch("heater_readback", &openers.heater.name()),
            ];
            if inst.thermometer.units.len() > 1 {
                for u in &inst.thermometer.units {
                    s.channels
                        .push(ch(&unit_channel_name(*u), &openers.thermometer.name()));
                }
            }
            s.origin = Some(origin);
            s.tilt_capacity = (per_tick * 8).max(64);
            s.temps = vec![TempSlot::default(); CHANNELS_PER_UNIT * inst.thermometer.units.len()];
            s.readback_w = vec![None; cfg.legs.len()];
            s.mismatch = vec![false; cfg.legs.len()];
        });
        let (cmd, cmd_rx) = watch::channel(HeaterCommand {
            volts: vec![0.0; cfg.legs.len()],
            generation: 0,
        });
        let mut tasks = Vec::new();
        let line = |o: Box<dyn Opener>, ch: usize| link::Line::new(o, shared.clone(), ch, origin);
        // Debug-level spans: entering an enabled span on every poll costs a few per cent of
        // this task's CPU at 10 Hz; the messages carry their port themselves.
        tasks.push(tokio::spawn(
            tilt::run(
                line(openers.tiltmeter, TILTMETER),
                inst.tiltmeter.clone(),
                shared.clone(),
                origin,
            )
            .instrument(tracing::debug_span!("tiltmeter")),
        ));
        let slots = thermo_slots(cfg);
        tasks.push(tokio::spawn(
            thermo::run(
                line(openers.thermometer, THERMOMETER),
                inst.thermometer.clone(),
                slots.clone(),
                shared.clone(),
                origin,
            )
            .instrument(tracing::debug_span!("thermometer")),
        ));
        let resistances: Vec<f64> = cfg.legs.iter().map(|l| l.heater_resistance_ohm).collect();
        tasks.push(tokio::spawn(
            heater::run(
                line(openers.heater, HEATER),
                inst.heater.clone(),
                resistances,
                cmd_rx,
                shared.clone(),
                origin,
            )
            .instrument(tracing::debug_span!("heater")),
        ));
        Ok(SerialBackend {
            shared,
            origin,
            cmd,
            legs: slots
                .iter()
                .map(|&slot| LegMap {
                    thermometer_slot: slot,
                })
                .collect(),
            stale_after_s: inst.thermometer.stale_after_s,
            tasks,
        })
    }

    /// A handle for the daemon's edges (shutdown, the event sink).
    pub fn handle(&self) -> AcqHandle {
        AcqHandle {
            shared: self.shared.clone(),
            cmd: self.cmd.clone(),
        }
    }

    /// Readings since the last call; `now_s` is the caller's run clock. Never blocks.
    pub fn poll(&mut self, now_s: f64) -> AcqReadings {
        let t_acq = secs_since(self.origin);
        let stale = self.stale_after_s;
        self.shared.with(|s| {
            let offset = *s.run_offset_s.get_or_insert(now_s - t_acq);
            let tilt = s
                .tilt
                .drain(..)
                .map(|x| (x.t_acq_s + offset, x.value, x.quality))
                .collect();
            let mut leg_temps = Vec::with_capacity(self.legs.len());
            let mut ages = Vec::with_capacity(self.legs.len());
            for l in &self.legs {
                let slot = s.temps.get(l.thermometer_slot).copied().unwrap_or_default();
                let (v, q, age) = leg_temp(&slot, t_acq, stale);
                leg_temps.push((v, q));
                ages.push(age);
            }
            AcqReadings {
                tilt,
                leg_temps,
                leg_temp_age_s: ages,
                readback_power_w: s
                    .readback_w
                    .iter()
                    .map(|r| r.filter(|r| t_acq - r.t_acq_s <= stale).map(|r| r.value))
                    .collect(),
                channels: with_derived(&s.channels),
            }
        })
    }

    /// Queues the drive voltages for the heater task (the latest command wins). Never blocks.
    pub fn apply(&mut self, _now_s: f64, _power_w: &[f64], drive_v: &[f64]) {
        self.cmd.send_modify(|c| {
            c.volts = drive_v.to_vec();
            c.generation += 1;
        });
    }

    /// Heaters to zero: queued ahead of any other command; the heater task writes it at
    /// once. Use [`AcqHandle::zero_heaters`] to wait until the supply took it.
    pub fn safe_off(&mut self) {
        let n = self.legs.len();
        self.cmd.send_modify(|c| {
            c.volts = vec![0.0; n];
            c.generation += 1;
        });
    }
}

impl crate::runtime::Backend for SerialBackend {
    fn poll(&mut self, now_s: f64) -> crate::runtime::Readings {
        let r = SerialBackend::poll(self, now_s);
        crate::runtime::Readings {
            tilt: r.tilt,
            leg_temps: r.leg_temps,
            leg_temp_age_s: r.leg_temp_age_s,
            readback_power_w: r.readback_power_w,
            channels: r.channels,
        }
    }

    fn apply(&mut self, now_s: f64, power_w: &[f64], drive_v: &[f64]) {
        SerialBackend::apply(self, now_s, power_w, drive_v);
    }

    fn safe_off(&mut self) {
        SerialBackend::safe_off(self);
    }
}

impl Drop for SerialBackend {
    fn drop(&mut self) {
        // The tiltmeter and thermometer tasks stop with the backend; the heater task runs on
        // until its command channel closes, after writing the last (safe) command.
        for t in self.tasks.iter().take(2) {
            t.abort();
        }
    }
}

/// The channels with the derived ones (heater readback, thermometer units) sharing their
/// line's connection state, port and reconnects.
fn with_derived(channels: &[ChannelStatus]) -> Vec<ChannelStatus> {
    let mut c = channels.to_vec();
    if let Some(h) = c.get(HEATER).map(|h| h.connected)
        && let Some(rb) = c.get_mut(HEATER_READBACK)
    {
        rb.connected = h;
    }
    if let Some(th) = c.get(THERMOMETER).cloned() {
        for u in c.iter_mut().skip(FIRST_UNIT_CHANNEL) {
            u.connected = th.connected;
            u.port.clone_from(&th.port);
            u.reconnects = th.reconnects;
        }
    }
    c
}

/// One leg's reported value by the rules in the module docs: (°C, quality, age of the last
/// usable reading).
fn leg_temp(slot: &TempSlot, t_acq: f64, stale_after_s: f64) -> (f64, Quality, Option<f64>) {
    let age = slot
        .last
        .filter(|l| l.quality == Quality::Ok)
        .map(|l| t_acq - l.t_acq_s);
    match (slot.last, slot.failure) {
        (Some(l), _) if t_acq - l.t_acq_s <= stale_after_s => (l.value, l.quality, age),
        (last, Some((tf, q))) if last.is_none_or(|l| tf > l.t_acq_s) => {
            (last.map_or(f64::NAN, |l| l.value), q, age)
        }
        (Some(l), _) => (l.value, Quality::Stale, age),
        (None, _) => (f64::NAN, Quality::Missing, None),
    }
}

/// A cloneable handle on the acquisition for the daemon's edges.
#[derive(Clone)]
pub struct AcqHandle {
    shared: Shared,
    cmd: watch::Sender<HeaterCommand>,
}

impl AcqHandle {
    /// Sets every heater to 0 V and waits (at most `timeout`) until the supply took it.
    /// Returns whether it was confirmed.
    pub async fn zero_heaters(&self, timeout: Duration) -> bool {
        let mut generation = 0;
        self.cmd.send_modify(|c| {
            c.volts.iter_mut().for_each(|v| *v = 0.0);
            c.generation += 1;
            generation = c.generation;
        });
        let deadline = Instant::now() + timeout;
        while Instant::now() < deadline {
            if self.shared.with(|s| s.applied_generation >= generation) {
                return true;
            }
            tokio::time::sleep(Duration::from_millis(5)).await;
        }
        false
    }

    /// Sets every heater to 0 V without waiting (no runtime needed: usable from a panic
    /// hook). The heater task writes it at its next turn.
    pub fn command_zero_now(&self) {
        self.cmd.send_modify(|c| {
            c.volts.iter_mut().for_each(|v| *v = 0.0);
            c.generation += 1;
        });
    }

    /// Counters now.
    pub fn channels(&self) -> Vec<ChannelStatus> {
        self.shared.with(|s| with_derived(&s.channels))
    }

    /// Fault events raised so far (port lost, readback mismatch …).
    pub fn fault_events(&self) -> u64 {
        self.shared.with(|s| s.fault_events)
    }

    /// Legs whose heater readback disagrees with the command now.
    pub fn mismatches(&self) -> Vec<bool> {
        self.shared.with(|s| s.mismatch.clone())
    }

    /// The shared store (tests and diagnostics).
    pub fn shared(&self) -> &Shared {
        &self.shared
    }
}

/// A [`RowSink`] that first writes the acquisition's pending fault events into `inner`
/// (as [`EventKind::Fault`] rows), then the row it was given.
pub struct FaultSink {
    inner: Box<dyn RowSink>,
    shared: Shared,
    start_utc_ns: i64,
}

impl FaultSink {
    /// Wraps `inner`; `start_utc_ns` is the UTC of run time 0 (for event stamps before the
    /// first poll).
    pub fn new(inner: Box<dyn RowSink>, handle: &AcqHandle, start_utc_ns: i64) -> Self {
        FaultSink {
            inner,
            shared: handle.shared.clone(),
            start_utc_ns,
        }
    }

    fn drain(&mut self) {
        let (events, offset) = self
            .shared
            .with(|s| (s.events.drain(..).collect::<Vec<_>>(), s.run_offset_s));
        for e in events {
            let t_mono_s = match offset {
                Some(o) => e.t_acq_s + o,
                None => (e.t_utc_ns - self.start_utc_ns) as f64 * 1e-9,
            };
            self.inner.event(&EventRow {
                stamp: Stamp {
                    t_mono_s,
                    t_utc_ns: e.t_utc_ns,
                },
                kind: EventKind::Fault,
                source: e.source,
                detail: if e.fault {
                    e.detail
                } else {
                    format!("cleared: {}", e.detail)
                },
            });
        }
    }
}

impl RowSink for FaultSink {
    fn tilt(&mut self, s: &TiltSample) {
        self.inner.tilt(s);
    }
    fn control(&mut self, r: &ControlRow) {
        self.drain();
        self.inner.control(r);
    }
    fn event(&mut self, e: &EventRow) {
        self.drain();
        self.inner.event(e);
    }
    fn finish(&mut self) -> Result<SinkReport, SinkError> {
        self.drain();
        self.inner.finish()
    }
}

#[cfg(test)]
mod tests;

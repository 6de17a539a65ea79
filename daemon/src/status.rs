//! The running daemon's state as the outside world sees it, and the requests people
//! can make of it. Domain types only: the HTTP layer converts them to its own JSON
//! wire types, the metrics layer to OpenMetrics text.
//!
//! Flow: the control loop owns the truth. After every tick it publishes a fresh
//! [`Status`] on a `tokio::sync::watch` channel (readers always see the latest, never
//! wait) and each [`ControlRow`] on a `tokio::sync::broadcast` channel (live streams;
//! a slow reader lags and is told how many rows it missed). Changes go the other way as
//! a [`Request`] on a bounded `mpsc` channel; the loop applies them between ticks, records
//! who asked in the events, and answers on the request's `oneshot`.

use std::path::PathBuf;
use std::sync::Arc;

use stilt_config::{Config, Control, LoopGains, Mode};

use crate::rows::{ControlRow, LoopTerms, Quality};

/// One tilt axis now.
#[derive(Debug, Clone, PartialEq)]
pub struct AxisStatus {
    /// Mean calibrated tilt over the last tick, µrad (None when unusable).
    pub measured_urad: Option<f64>,
    /// Quality of that value.
    pub quality: Quality,
    /// Seconds since the last usable reading (None if never).
    pub age_s: Option<f64>,
    /// Setpoint in use (ramped), µrad.
    pub setpoint_urad: f64,
    /// Target the setpoint ramps towards, µrad.
    pub target_urad: f64,
    /// The axis loop's terms at the last tick.
    pub terms: LoopTerms,
}

/// One leg now.
#[derive(Debug, Clone, PartialEq)]
pub struct LegStatus {
    /// Leg name from the configuration.
    pub name: String,
    /// Latest temperature, °C (None when unusable).
    pub temp_c: Option<f64>,
    /// Quality of that reading.
    pub quality: Quality,
    /// Seconds since the last usable reading (None if never).
    pub age_s: Option<f64>,
    /// Temperature setpoint in use, °C.
    pub setpoint_c: f64,
    /// Commanded heater power, W.
    pub power_w: f64,
    /// Commanded heater drive, V.
    pub drive_v: f64,
    /// Heater power read back from the supply, W, where the supply allows.
    pub readback_power_w: Option<f64>,
    /// The leg loop's terms at the last tick.
    pub terms: LoopTerms,
}

/// One alarm.
#[derive(Debug, Clone, PartialEq)]
pub struct AlarmStatus {
    /// Stable identifier, e.g. `leg_over_temperature:A`.
    pub id: String,
    /// What a person reads.
    pub message: String,
    /// When it was raised, UTC ns.
    pub since_utc_ns: i64,
    /// The condition holds now.
    pub active: bool,
    /// It stays listed until acknowledged, even when no longer active.
    pub latched: bool,
    /// Someone acknowledged it (and who).
    pub acknowledged_by: Option<String>,
}

/// How the control loop keeps time.
#[derive(Debug, Clone, PartialEq, Default)]
pub struct LoopTiming {
    /// Configured period, s.
    pub period_s: f64,
    /// Ticks run since start.
    pub ticks: u64,
    /// Ticks that started later than one period after the previous one.
    pub overruns: u64,
    /// Median of |actual interval − period| over a recent window, s.
    pub jitter_p50_s: f64,
    /// 99th percentile of the same, s.
    pub jitter_p99_s: f64,
    /// Largest seen since start, s.
    pub jitter_max_s: f64,
    /// Time the last tick's work took, s.
    pub last_tick_work_s: f64,
}

/// The recorder's health.
#[derive(Debug, Clone, PartialEq, Default)]
pub struct RecordingStatus {
    /// Whether recording is on.
    pub enabled: bool,
    /// The segment being written.
    pub segment: Option<PathBuf>,
    /// Rows written so far (all streams).
    pub rows_written: u64,
    /// Rows dropped because the writer fell behind or the disk failed.
    pub dropped_rows: u64,
    /// UTC of the last flush that reached the disk, ns.
    pub last_flush_utc_ns: Option<i64>,
    /// An alarm text while recording is impaired.
    pub alarm: Option<String>,
}

/// Counters of one instrument channel (for status and metrics).
#[derive(Debug, Clone, PartialEq, Default)]
pub struct ChannelStatus {
    /// Instrument name: `tiltmeter`, `thermometer`, `heater`.
    pub name: String,
    /// Serial port path (or `simulated`).
    pub port: String,
    /// Whether the port is open now.
    pub connected: bool,
    /// Requests sent.
    pub requests: u64,
    /// Replies that did not come in time.
    pub timeouts: u64,
    /// Replies that could not be decoded.
    pub bad_frames: u64,
    /// Times the port was reopened.
    pub reconnects: u64,
}

/// Everything a status request answers.
#[derive(Debug, Clone, PartialEq)]
pub struct Status {
    /// Software version.
    pub version: &'static str,
    /// Stage name.
    pub stage_name: String,
    /// UTC when the daemon started, ns.
    pub started_utc_ns: i64,
    /// UTC of this snapshot, ns.
    pub now_utc_ns: i64,
    /// Seconds since start (the run's own clock).
    pub uptime_s: f64,
    /// Mode in force.
    pub mode: Mode,
    /// Tilt per axis (x, y).
    pub axes: [AxisStatus; 2],
    /// Common leg bias in use and its target, °C.
    pub leg_bias_c: f64,
    /// The bias target, °C.
    pub leg_bias_target_c: f64,
    /// Legs in configuration order.
    pub legs: Vec<LegStatus>,
    /// Active and latched alarms.
    pub alarms: Vec<AlarmStatus>,
    /// Loop timing.
    pub timing: LoopTiming,
    /// Recording health.
    pub recording: RecordingStatus,
    /// Instrument channels.
    pub channels: Vec<ChannelStatus>,
    /// Whether every sensor the mode needs has a usable reading (readiness).
    pub ready: bool,
}

/// A change asked of the running daemon.
#[derive(Debug, Clone, PartialEq)]
pub enum ControlRequest {
    /// Switch mode.
    SetMode(Mode),
    /// New tilt target; `None` leaves that axis as it is. Ramps at the configured rate.
    SetTiltTarget([Option<f64>; 2]),
    /// New common leg temperature bias, °C (ramped).
    SetLegBias(f64),
    /// New per-leg power for manual mode, W.
    SetManualPower(f64),
    /// New gains for both tilt loops (applied bumplessly).
    SetTiltGains(LoopGains),
    /// New gains for every leg loop (applied bumplessly).
    SetLegGains(LoopGains),
    /// Acknowledge one alarm by id, or all when `None`.
    Acknowledge(Option<String>),
    /// Reread the configuration file.
    Reload,
}

/// What was done, for the caller and the audit trail (`old → new`).
#[derive(Debug, Clone, PartialEq)]
pub struct Applied {
    /// Human-readable change, e.g. `tilt target µrad: [0, 0] → [1.5, 0]`.
    pub detail: String,
}

/// Why a request was refused; nothing was changed.
#[derive(Debug, Clone, PartialEq)]
pub struct Refused {
    /// The offending field (`setpoint_x_urad`, `kp`, …), or empty for the whole request.
    pub field: String,
    /// What was wrong and what is allowed.
    pub message: String,
}

/// A request with who asked and where to answer.
#[derive(Debug)]
pub struct Request {
    /// The change.
    pub change: ControlRequest,
    /// Who asked (e.g. the token's name), for the audit trail.
    pub who: String,
    /// The answer.
    pub reply: tokio::sync::oneshot::Sender<Result<Applied, Refused>>,
}

/// The configuration in force, as the loop publishes it: at start, after every change it
/// accepts and after every reload it applies. The one source of truth for what runs (the
/// API reads gains and manual power from here, never from a copy of its own).
#[derive(Debug, Clone, PartialEq)]
pub struct Settings {
    /// The configuration as last loaded: at start, or by a reload that was applied.
    pub file: Arc<Config>,
    /// The control settings in force: the file's, with the changes accepted since.
    pub control: Control,
}

impl Settings {
    /// Settings straight from a configuration, nothing changed yet.
    pub fn from_config(cfg: Arc<Config>) -> Self {
        Settings {
            control: cfg.control.clone(),
            file: cfg,
        }
    }
}

/// The channels the control loop offers to the outside (HTTP, metrics, systemd).
#[derive(Debug, Clone)]
pub struct Handles {
    /// Latest status.
    pub status: tokio::sync::watch::Receiver<Arc<Status>>,
    /// The configuration in force.
    pub settings: tokio::sync::watch::Receiver<Arc<Settings>>,
    /// Live control rows (one per tick).
    pub rows: tokio::sync::broadcast::Sender<Arc<ControlRow>>,
    /// Requests for changes.
    pub requests: tokio::sync::mpsc::Sender<Request>,
}

impl RecordingStatus {
    /// The recorder's health as status reports it.
    pub fn from_health(h: &crate::record::HealthSnapshot) -> Self {
        RecordingStatus {
            enabled: true,
            segment: h.segment.clone(),
            rows_written: h.tilt_rows + h.control_rows + h.event_rows,
            dropped_rows: h.dropped_rows,
            last_flush_utc_ns: h.last_flush_utc_ns,
            alarm: h.alarm.clone(),
        }
    }
}

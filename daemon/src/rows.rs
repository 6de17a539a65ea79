//! The rows the pipeline emits, and the [`RowSink`] they go to.
//!
//! These are domain types: plain Rust values in the units named by their fields.
//! A sink (the HDF5 recorder, an in-memory collector in tests, a null sink for
//! benchmarks) converts them to its own wire form explicitly.
//!
//! Three streams:
//! - [`TiltSample`]: every tiltmeter reading, at the tiltmeter's rate (10 Hz in the demo);
//! - [`ControlRow`]: one per control tick, with every input, setpoint, loop term and output;
//! - [`EventRow`]: anything that is not a sample: mode, setpoint and gain changes,
//!   faults, alarms, file rotations, dropped rows.

use stilt_config::Mode;

/// How much a reading can be trusted.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
#[repr(u8)]
pub enum Quality {
    /// A fresh, in-range reading.
    Ok = 0,
    /// The latest reading is older than allowed.
    Stale = 1,
    /// The instrument did not answer in time.
    Timeout = 2,
    /// The reply could not be decoded (garbled bytes, bad checksum).
    BadFrame = 3,
    /// The value lies outside the instrument's or the configuration's range.
    OutOfRange = 4,
    /// No reading exists yet.
    Missing = 5,
}

impl Quality {
    /// Whether the value may be used for control.
    pub fn is_usable(self) -> bool {
        self == Quality::Ok
    }

    /// A stable lower-case name for status and files.
    pub fn as_str(self) -> &'static str {
        match self {
            Quality::Ok => "ok",
            Quality::Stale => "stale",
            Quality::Timeout => "timeout",
            Quality::BadFrame => "bad_frame",
            Quality::OutOfRange => "out_of_range",
            Quality::Missing => "missing",
        }
    }

    /// The small integer stored in recordings (the `repr(u8)` value).
    pub fn code(self) -> u8 {
        self as u8
    }

    /// Inverse of [`Quality::code`].
    pub fn from_code(c: u8) -> Option<Quality> {
        Some(match c {
            0 => Quality::Ok,
            1 => Quality::Stale,
            2 => Quality::Timeout,
            3 => Quality::BadFrame,
            4 => Quality::OutOfRange,
            5 => Quality::Missing,
            _ => return None,
        })
    }
}

/// Time of a row: monotonic seconds since the run started, and UTC.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Stamp {
    /// Seconds since the start of the run on the run's own clock (virtual or monotonic).
    pub t_mono_s: f64,
    /// UTC, nanoseconds since the Unix epoch (in virtual time: start time + t_mono_s).
    pub t_utc_ns: i64,
}

/// One tiltmeter reading.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct TiltSample {
    /// When it was taken.
    pub stamp: Stamp,
    /// The instrument's raw reading per axis, in its own units.
    pub raw: [f64; 2],
    /// Calibrated tilt per axis, microradians.
    pub tilt_urad: [f64; 2],
    /// Quality of this reading.
    pub quality: Quality,
}

/// P, I and D contributions and the output of one PID loop at one tick.
#[derive(Debug, Clone, Copy, PartialEq, Default)]
pub struct LoopTerms {
    /// Proportional term.
    pub p: f64,
    /// Integral term.
    pub i: f64,
    /// Derivative term.
    pub d: f64,
    /// Output after clamping and slew limiting.
    pub out: f64,
}

/// One leg at one control tick.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct LegRow {
    /// Measured leg temperature, °C (NaN when no usable reading).
    pub temp_c: f64,
    /// Quality of that reading.
    pub temp_quality: Quality,
    /// Temperature setpoint in use, °C.
    pub setpoint_c: f64,
    /// Commanded heater power, W (always within 0 … max).
    pub power_w: f64,
    /// Commanded heater drive, V (√(P·R)).
    pub drive_v: f64,
    /// The leg loop's terms (output in W).
    pub terms: LoopTerms,
}

/// Everything about one control tick.
#[derive(Debug, Clone, PartialEq)]
pub struct ControlRow {
    /// Tick counter since the run started (0, 1, 2 …); a gap means a missed tick.
    pub tick: u64,
    /// When the tick ran.
    pub stamp: Stamp,
    /// Mode during this tick.
    pub mode: Mode,
    /// Mean raw tiltmeter reading over the tick, per axis.
    pub tilt_raw: [f64; 2],
    /// Mean calibrated tilt over the tick, µrad (NaN when no usable reading).
    pub tilt_urad: [f64; 2],
    /// Quality of the tilt used this tick.
    pub tilt_quality: Quality,
    /// Number of tiltmeter readings averaged into `tilt_urad`.
    pub tilt_count: u32,
    /// The (ramped) tilt setpoint in use, µrad.
    pub tilt_setpoint_urad: [f64; 2],
    /// The target the setpoint ramps towards, µrad.
    pub tilt_target_urad: [f64; 2],
    /// Each tilt loop's terms (output in µrad of commanded correction).
    pub axis_terms: [LoopTerms; 2],
    /// Per-leg values, in configuration order.
    pub legs: Vec<LegRow>,
}

/// What an [`EventRow`] is about.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
#[non_exhaustive]
pub enum EventKind {
    /// The run started (detail: configuration summary).
    RunStart,
    /// The run ended (detail: why).
    RunEnd,
    /// Mode changed (detail: `old → new`).
    Mode,
    /// A setpoint target changed (detail: `key: old → new`).
    Setpoint,
    /// Gains changed (detail: `key: old → new`).
    Gains,
    /// A limit clamped an output (detail: which and how often).
    Limit,
    /// An instrument or sensor fault.
    Fault,
    /// An alarm was raised.
    Alarm,
    /// An alarm was acknowledged.
    Acknowledge,
    /// A recording segment was closed and a new one opened.
    Rotation,
    /// Rows were dropped because the writer fell behind (detail: how many).
    Dropped,
    /// The recording hit an I/O error or recovered from one.
    Recording,
}

impl EventKind {
    /// A stable lower-case name for files and status.
    pub fn as_str(self) -> &'static str {
        match self {
            EventKind::RunStart => "run_start",
            EventKind::RunEnd => "run_end",
            EventKind::Mode => "mode",
            EventKind::Setpoint => "setpoint",
            EventKind::Gains => "gains",
            EventKind::Limit => "limit",
            EventKind::Fault => "fault",
            EventKind::Alarm => "alarm",
            EventKind::Acknowledge => "acknowledge",
            EventKind::Rotation => "rotation",
            EventKind::Dropped => "dropped",
            EventKind::Recording => "recording",
        }
    }

    /// Every kind, for parsing and documentation.
    pub const ALL: [EventKind; 12] = [
        EventKind::RunStart,
        EventKind::RunEnd,
        EventKind::Mode,
        EventKind::Setpoint,
        EventKind::Gains,
        EventKind::Limit,
        EventKind::Fault,
        EventKind::Alarm,
        EventKind::Acknowledge,
        EventKind::Rotation,
        EventKind::Dropped,
        EventKind::Recording,
    ];

    /// Inverse of [`EventKind::as_str`].
    pub fn parse(s: &str) -> Option<EventKind> {
        EventKind::ALL.into_iter().find(|k| k.as_str() == s)
    }
}

/// Something that happened, with who or what caused it.
#[derive(Debug, Clone, PartialEq)]
pub struct EventRow {
    /// When.
    pub stamp: Stamp,
    /// What kind of event.
    pub kind: EventKind,
    /// Who or what: `controller`, `api:alice`, `tiltmeter`, `recorder` …
    pub source: String,
    /// Free text, e.g. `level → off` or `setpoint_x_urad: 0 → 1.5`.
    pub detail: String,
}

/// Where rows go. Implementations must not block the control loop for long: the HDF5
/// recorder hands rows to its own thread through a bounded queue.
///
/// Calls arrive in time order from a single thread.
pub trait RowSink: Send {
    /// One tiltmeter reading.
    fn tilt(&mut self, s: &TiltSample);
    /// One control tick.
    fn control(&mut self, r: &ControlRow);
    /// One event.
    fn event(&mut self, e: &EventRow);
    /// Ends the run: flush everything and report. Called once.
    fn finish(&mut self) -> Result<SinkReport, SinkError>;
}

/// What a sink says when the run ends.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct SinkReport {
    /// Tilt samples accepted.
    pub tilt_rows: u64,
    /// Control rows accepted.
    pub control_rows: u64,
    /// Events accepted.
    pub events: u64,
    /// Rows dropped (each also reported as an event where possible).
    pub dropped_rows: u64,
    /// Files written, if any.
    pub files: Vec<std::path::PathBuf>,
}

/// A sink failed in a way the run should hear about.
#[derive(Debug, thiserror::Error)]
#[error("{0}")]
pub struct SinkError(pub String);

/// A sink that keeps nothing but counts (benchmarks, `--no-record`).
#[derive(Debug, Default)]
pub struct CountingSink {
    report: SinkReport,
}

impl RowSink for CountingSink {
    fn tilt(&mut self, _: &TiltSample) {
        self.report.tilt_rows += 1;
    }
    fn control(&mut self, _: &ControlRow) {
        self.report.control_rows += 1;
    }
    fn event(&mut self, _: &EventRow) {
        self.report.events += 1;
    }
    fn finish(&mut self) -> Result<SinkReport, SinkError> {
        Ok(self.report.clone())
    }
}

/// A sink that keeps every row in memory (tests).
#[derive(Debug, Default, Clone)]
pub struct MemorySink {
    /// Tilt samples, in order.
    pub tilt: Vec<TiltSample>,
    /// Control rows, in order.
    pub control: Vec<ControlRow>,
    /// Events, in order.
    pub events: Vec<EventRow>,
}

impl RowSink for MemorySink {
    fn tilt(&mut self, s: &TiltSample) {
        self.tilt.push(*s);
    }
    fn control(&mut self, r: &ControlRow) {
        self.control.push(r.clone());
    }
    fn event(&mut self, e: &EventRow) {
        self.events.push(e.clone());
    }
    fn finish(&mut self) -> Result<SinkReport, SinkError> {
        Ok(SinkReport {
            tilt_rows: self.tilt.len() as u64,
            control_rows: self.control.len() as u64,
            events: self.events.len() as u64,
            ..SinkReport::default()
        })
    }
}

/// A [`MemorySink`] behind a shared lock, so a test can read the rows while or after a
/// run that owns the sink. Clone it before handing it over.
#[derive(Debug, Default, Clone)]
pub struct SharedSink(pub std::sync::Arc<std::sync::Mutex<MemorySink>>);

impl SharedSink {
    /// A copy of the events so far.
    pub fn events(&self) -> Vec<EventRow> {
        self.0.lock().map(|m| m.events.clone()).unwrap_or_default()
    }
}

impl RowSink for SharedSink {
    fn tilt(&mut self, s: &TiltSample) {
        if let Ok(mut m) = self.0.lock() {
            m.tilt(s);
        }
    }
    fn control(&mut self, r: &ControlRow) {
        if let Ok(mut m) = self.0.lock() {
            m.control(r);
        }
    }
    fn event(&mut self, e: &EventRow) {
        if let Ok(mut m) = self.0.lock() {
            m.event(e);
        }
    }
    fn finish(&mut self) -> Result<SinkReport, SinkError> {
        match self.0.lock() {
            Ok(mut m) => m.finish(),
            Err(_) => Err(SinkError("memory sink poisoned".into())),
        }
    }
}

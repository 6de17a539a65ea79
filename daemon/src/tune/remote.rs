//! Step tests through a running daemon's HTTP API (`stiltd tune --daemon URL`): the real
//! stage, or the hardware-in-the-loop simulator, in the daemon's own time.
//!
//! Main items:
//! - [`DaemonApi`]: what the test needs from a daemon (status, configuration, the changes,
//!   the live sample stream); implemented for [`Client`], and by a fake in the tests;
//! - [`RemoteOptions`] → [`run_remote_step_test`] → [`RemoteRun`] (a [`StepRecord`] and the
//!   [`AnalysisContext`] for [`super::analyse_with`]), or a [`RemoteError`] that says what
//!   went wrong and whether the daemon's previous state was restored;
//! - [`run_remote_relay_test`] → [`RemoteRelayRun`]: the Åström–Hägglund relay test the
//!   same way (the manual power switched between p0 ± d);
//! - [`SavedState`] and [`restore`]: the mode, manual power and setpoints read before the
//!   test, put back at its end whatever happened;
//! - [`confirm`] (the `[y/N]` question, refused without a terminal unless `--yes`) and
//!   [`apply_proposal`] (PUT the gains, read them back).
//!
//! The leg test through the API: the API has one manual power for every heater, so the
//! test holds *all* heaters at their present power (manual mode), waits, records a
//! baseline, steps the manual power and records the chosen leg's temperature. Each leg
//! has its own heater and its own path to the room air, so the stepped leg's response is
//! its own heater's; the room's drift is removed as the baseline's straight line. The
//! step is kept inside every limit the daemon reports (each heater's maximum, the total
//! power limit, and 0 W), and the test stops when a leg comes within
//! [`LEG_TEMP_MARGIN_K`] of `limits.max_leg_temp_c`.
//!
//! A tilt axis cannot be stepped open loop through the API (it has no per-leg setpoint
//! offsets), so [`run_remote_step_test`] takes legs only.

use std::collections::HashSet;
use std::io::{BufRead, Write};
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::mpsc;
use std::time::{Duration, Instant};

use stilt_config::LoopGains;

use super::{
    AnalysisContext, NamedGains, RelayOptions, RelayRecord, StepOptions, StepRecord, Target,
    check_durations_min, clean_record, leg_step_limits,
};
use crate::api::client::{Client, ClientError, EventReader};
use crate::api::wire::{
    ChangeReply, ConfigWire, GainsBody, GainsWire, LegBiasBody, ManualPowerBody, ModeBody,
    SampleWire, StatusWire, TiltSetpointBody,
};

/// The test stops when a leg comes this close to `limits.max_leg_temp_c`, K (before the
/// daemon's own interlock acts).
pub const LEG_TEMP_MARGIN_K: f64 = 0.5;

/// Which gains a change is for.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum LoopKind {
    /// `PUT /v1/gains/leg`.
    Leg,
    /// `PUT /v1/gains/tilt`.
    Tilt,
}

/// A source of the daemon's control rows, blocking.
pub trait SampleSource: Send {
    /// The next sample; `Ok(None)` when the stream ended.
    fn next_sample(&mut self) -> Result<Option<SampleWire>, String>;
}

/// What a remote test needs from a daemon.
pub trait DaemonApi {
    /// The daemon's address, for messages.
    fn describe(&self) -> String;
    /// `GET /v1/status`.
    fn status(&self) -> Result<StatusWire, ClientError>;
    /// `GET /v1/config`.
    fn config(&self) -> Result<ConfigWire, ClientError>;
    /// `PUT /v1/mode`.
    fn set_mode(&self, mode: &str) -> Result<ChangeReply, ClientError>;
    /// `PUT /v1/manual-power`.
    fn set_manual_power(&self, power_w: f64) -> Result<ChangeReply, ClientError>;
    /// `PUT /v1/setpoint/tilt` (both axes).
    fn set_tilt_target(&self, target_urad: [f64; 2]) -> Result<ChangeReply, ClientError>;
    /// `PUT /v1/setpoint/leg-bias`.
    fn set_leg_bias(&self, bias_c: f64) -> Result<ChangeReply, ClientError>;
    /// `PUT /v1/gains/leg` or `/v1/gains/tilt`.
    fn set_gains(&self, which: LoopKind, body: &GainsBody) -> Result<ChangeReply, ClientError>;
    /// `GET /v1/stream?every=1`: every control row.
    fn samples(&self) -> Result<Box<dyn SampleSource>, ClientError>;
}

/// The live stream's `sample` events.
struct StreamSamples {
    reader: EventReader,
}

impl SampleSource for StreamSamples {
    fn next_sample(&mut self) -> Result<Option<SampleWire>, String> {
        loop {
            let ev = self
                .reader
                .next_event()
                .map_err(|e| format!("reading the stream failed: {e}"))?;
            let Some(ev) = ev else { return Ok(None) };
            if ev.event == "sample" {
                return serde_json::from_str(&ev.data)
                    .map(Some)
                    .map_err(|e| format!("a sample event is not what the API promises: {e}"));
            }
            // `start` says what follows; `lagged` means rows were skipped, which the
            // record tolerates (its times are the daemon's own).
        }
    }
}

impl DaemonApi for Client {
    fn describe(&self) -> String {
        self.base().to_string()
    }
    fn status(&self) -> Result<StatusWire, ClientError> {
        self.get("/v1/status")
    }
    fn config(&self) -> Result<ConfigWire, ClientError> {
        self.get("/v1/config")
    }
    fn set_mode(&self, mode: &str) -> Result<ChangeReply, ClientError> {
        self.put("/v1/mode", &ModeBody { mode: mode.into() })
    }
    fn set_manual_power(&self, power_w: f64) -> Result<ChangeReply, ClientError> {
        self.put("/v1/manual-power", &ManualPowerBody { power_w })
    }
    fn set_tilt_target(&self, t: [f64; 2]) -> Result<ChangeReply, ClientError> {
        self.put(
            "/v1/setpoint/tilt",
            &TiltSetpointBody {
                x_urad: Some(t[0]),
                y_urad: Some(t[1]),
            },
        )
    }
    fn set_leg_bias(&self, bias_c: f64) -> Result<ChangeReply, ClientError> {
        self.put("/v1/setpoint/leg-bias", &LegBiasBody { bias_c })
    }
    fn set_gains(&self, which: LoopKind, body: &GainsBody) -> Result<ChangeReply, ClientError> {
        match which {
            LoopKind::Leg => self.put("/v1/gains/leg", body),
            LoopKind::Tilt => self.put("/v1/gains/tilt", body),
        }
    }
    fn samples(&self) -> Result<Box<dyn SampleSource>, ClientError> {
        Ok(Box::new(StreamSamples {
            reader: self.stream(1)?,
        }))
    }
}

/// The daemon's state before the test: what [`restore`] puts back.
#[derive(Debug, Clone, PartialEq)]
pub struct SavedState {
    /// Mode (`off`, `manual`, `temperature`, `level`).
    pub mode: String,
    /// Manual power in force, W.
    pub manual_power_w: f64,
    /// Tilt targets x, y, µrad.
    pub tilt_target_urad: [f64; 2],
    /// Leg bias target, °C.
    pub leg_bias_target_c: f64,
}

impl SavedState {
    /// The state shown by a status and a configuration read together.
    pub fn from_daemon(st: &StatusWire, cfg: &ConfigWire) -> Self {
        SavedState {
            manual_power_w: cfg.control.manual_power_w,
            ..SavedState::from_status(st)
        }
    }

    /// What a status alone shows (the manual power is only in the configuration: NaN).
    fn from_status(st: &StatusWire) -> Self {
        SavedState {
            mode: st.mode.clone(),
            manual_power_w: f64::NAN,
            tilt_target_urad: [
                st.axes.first().map_or(0.0, |a| a.target_urad),
                st.axes.get(1).map_or(0.0, |a| a.target_urad),
            ],
            leg_bias_target_c: st.leg_bias_target_c,
        }
    }

    /// The `stiltctl` commands that put this state back by hand.
    pub fn by_hand(&self) -> String {
        format!(
            "stiltctl set manual-power {}; stiltctl set tilt --x-urad {} --y-urad {}; stiltctl set bias {}; stiltctl mode {}",
            self.manual_power_w,
            self.tilt_target_urad[0],
            self.tilt_target_urad[1],
            self.leg_bias_target_c,
            self.mode
        )
    }
}

/// Tries `f` up to three times, pausing `pause` between tries, on connection trouble only.
fn with_retries<T>(
    pause: Duration,
    mut f: impl FnMut() -> Result<T, ClientError>,
) -> Result<T, ClientError> {
    let mut last = None;
    for attempt in 0..3 {
        if attempt > 0 {
            std::thread::sleep(pause);
        }
        match f() {
            Ok(v) => return Ok(v),
            Err(e @ (ClientError::Connect { .. } | ClientError::Other { .. })) => last = Some(e),
            Err(e) => return Err(e),
        }
    }
    Err(last.unwrap_or_else(|| ClientError::Other {
        url: String::new(),
        detail: "no attempt made".into(),
    }))
}

/// Puts `saved` back: the manual power, then the setpoints if they differ now, then the
/// mode. Every part is tried even when one fails (connection trouble is retried three
/// times, `pause` apart). `Ok` lists what the daemon answered, `Err` what failed.
pub fn restore(
    api: &dyn DaemonApi,
    saved: &SavedState,
    pause: Duration,
) -> Result<Vec<String>, Vec<String>> {
    let mut done = Vec::new();
    let mut failed = Vec::new();
    let mut note = |what: &str, r: Result<ChangeReply, ClientError>| match r {
        Ok(a) => done.push(format!("{what}: {}", a.detail)),
        Err(e) => failed.push(format!("{what}: {e}")),
    };
    note(
        "manual power",
        with_retries(pause, || api.set_manual_power(saved.manual_power_w)),
    );
    match with_retries(pause, || api.status()) {
        Ok(st) => {
            let now = SavedState {
                manual_power_w: saved.manual_power_w,
                ..SavedState::from_status(&st)
            };
            if now.tilt_target_urad != saved.tilt_target_urad {
                note(
                    "tilt target",
                    with_retries(pause, || api.set_tilt_target(saved.tilt_target_urad)),
                );
            }
            if now.leg_bias_target_c != saved.leg_bias_target_c {
                note(
                    "leg bias",
                    with_retries(pause, || api.set_leg_bias(saved.leg_bias_target_c)),
                );
            }
        }
        Err(e) => {
            // The setpoints cannot be compared: put them back anyway.
            note("reading the status to compare the setpoints", Err(e));
            note(
                "tilt target",
                with_retries(pause, || api.set_tilt_target(saved.tilt_target_urad)),
            );
            note(
                "leg bias",
                with_retries(pause, || api.set_leg_bias(saved.leg_bias_target_c)),
            );
        }
    }
    let mode = with_retries(pause, || api.set_mode(&saved.mode));
    let mode_ok = mode.is_ok();
    note("mode", mode);
    // The loop applies a change on its next tick and its status follows one tick later:
    // wait (up to 5 s) until the status shows the mode again, so that the caller's next
    // read sees the restored state.
    if mode_ok {
        let t0 = Instant::now();
        loop {
            match api.status() {
                Ok(st) if st.mode == saved.mode => break,
                Ok(st) if t0.elapsed() >= Duration::from_secs(5) => {
                    failed.push(format!(
                        "mode: the daemon accepted {} but still reports {} after 5 s",
                        saved.mode, st.mode
                    ));
                    break;
                }
                Err(e) if t0.elapsed() >= Duration::from_secs(5) => {
                    failed.push(format!("mode: cannot read the status back: {e}"));
                    break;
                }
                _ => std::thread::sleep(Duration::from_millis(50)),
            }
        }
    }
    if failed.is_empty() {
        Ok(done)
    } else {
        Err(failed)
    }
}

/// How a step test through the daemon runs. Durations are daemon seconds.
#[derive(Debug, Clone, PartialEq)]
pub struct RemoteOptions {
    /// The leg (configuration order) whose temperature is recorded.
    pub leg: usize,
    /// Step of the manual power, W; `None`: a quarter of the headroom.
    pub step: Option<f64>,
    /// Hold at the present power before the baseline begins.
    pub settle_s: f64,
    /// Baseline before the step.
    pub baseline_s: f64,
    /// Record after the step.
    pub record_s: f64,
    /// At most one progress line this often (wall clock).
    pub progress_every: Duration,
    /// No sample for this long (wall clock) counts as a lost connection.
    pub stall_after: Duration,
    /// How often the status (alarms) is read (wall clock).
    pub status_every: Duration,
    /// Pause between retries while restoring.
    pub retry_pause: Duration,
}

impl RemoteOptions {
    /// Defaults for leg `leg`: 10 min settle, 30 min baseline, 3 h record (as on the
    /// simulated stage), a progress line every 10 s, 10 s without a sample is a lost
    /// connection, the status every second.
    pub fn new(leg: usize) -> Self {
        RemoteOptions {
            leg,
            step: None,
            settle_s: 600.0,
            baseline_s: 1800.0,
            record_s: 3.0 * 3600.0,
            progress_every: Duration::from_secs(10),
            stall_after: Duration::from_secs(10),
            status_every: Duration::from_secs(1),
            retry_pause: Duration::from_secs(1),
        }
    }
}

/// A finished remote step test.
#[derive(Debug, Clone)]
pub struct RemoteRun {
    /// The record, on the daemon's clock.
    pub record: StepRecord,
    /// What the analysis needs.
    pub context: AnalysisContext,
    /// What the daemon answered while its state was restored.
    pub restored: Vec<String>,
}

/// Why a remote test did not finish.
#[derive(Debug, thiserror::Error)]
pub enum RemoteError {
    /// Refused before anything changed on the daemon.
    #[error("{0} (nothing was changed on the daemon)")]
    Refused(String),
    /// Stopped after the daemon's state was changed; says whether it was restored.
    #[error("{why}; {}", restore_note(.saved, .restore))]
    Aborted {
        /// What went wrong.
        why: String,
        /// The state the test tried to restore.
        saved: SavedState,
        /// How restoring went.
        restore: Result<Vec<String>, Vec<String>>,
    },
}

fn restore_note(saved: &SavedState, r: &Result<Vec<String>, Vec<String>>) -> String {
    match r {
        Ok(_) => format!(
            "the daemon's previous state was restored (mode {}, manual power {} W)",
            saved.mode, saved.manual_power_w
        ),
        Err(f) => format!(
            "RESTORING THE PREVIOUS STATE FAILED ({}); restore it by hand: {}",
            f.join("; "),
            saved.by_hand()
        ),
    }
}

fn refused(what: &str, e: ClientError) -> RemoteError {
    RemoteError::Refused(format!("{what}: {e}"))
}

/// What was decided before anything changed.
struct Plan {
    leg_name: String,
    p0: f64,
    step: f64,
    period_s: f64,
    max_leg_temp_c: f64,
    max_power_w: f64,
    max_total_w: f64,
    alarms_before: HashSet<String>,
}

fn plan(
    opts: &RemoteOptions,
    st: &StatusWire,
    cfg: &ConfigWire,
    api: &dyn DaemonApi,
) -> Result<Plan, RemoteError> {
    let n = cfg.legs.len();
    let Some(leg) = cfg.legs.get(opts.leg) else {
        let names: Vec<&str> = cfg.legs.iter().map(|l| l.name.as_str()).collect();
        return Err(RemoteError::Refused(format!(
            "the daemon at {} has no leg {} (its legs: {})",
            api.describe(),
            opts.leg + 1,
            names.join(", ")
        )));
    };
    if st.legs.len() != n {
        return Err(RemoteError::Refused(format!(
            "the daemon's status lists {} legs but its configuration {n}",
            st.legs.len()
        )));
    }
    let active: Vec<String> = st
        .alarms
        .iter()
        .filter(|a| a.active)
        .map(|a| format!("{} ({})", a.id, a.message))
        .collect();
    if !active.is_empty() {
        return Err(RemoteError::Refused(format!(
            "the daemon has active alarms: {}; a step test needs a quiet stage",
            active.join(", ")
        )));
    }
    let period_s = 1.0 / cfg.control.rate_hz;
    if !(period_s.is_finite() && period_s > 0.0) {
        return Err(RemoteError::Refused(format!(
            "the daemon reports a control rate of {} Hz",
            cfg.control.rate_hz
        )));
    }
    let durations = StepOptions {
        target: Target::Leg(opts.leg),
        step: opts.step,
        warmup_s: opts.settle_s,
        baseline_s: opts.baseline_s,
        record_s: opts.record_s,
    };
    // At least 10 samples of baseline and 30 of record.
    check_durations_min(&durations, 10.0 * period_s, 30.0 * period_s)
        .map_err(|e| RemoteError::Refused(format!("{e} (settle is the warm-up here)")))?;
    // The API's manual power is one value for every heater, bounded by the smallest.
    let max_power_w = cfg
        .legs
        .iter()
        .map(|l| l.heater_max_power_w)
        .fold(f64::INFINITY, f64::min);
    let p0 = if st.mode == "manual" {
        cfg.control.manual_power_w
    } else {
        st.legs.iter().map(|l| l.power_w).sum::<f64>() / n.max(1) as f64
    }
    .clamp(0.0, max_power_w);
    let max_total_w = cfg.limits.max_total_power_w;
    let (down, up) = leg_step_limits(p0, max_power_w, n, 0.0, max_total_w);
    let d = opts.step.unwrap_or(0.25 * up);
    if !d.is_finite() || d == 0.0 || d > up + 1e-12 || -d > down + 1e-12 {
        return Err(RemoteError::Refused(format!(
            "a manual power step of {d} W is not allowed: from the present {p0:.4} W on all {n} heaters it must be non-zero and between −{down:.4} W and +{up:.4} W (smallest heater maximum {max_power_w} W, total limit {max_total_w} W)"
        )));
    }
    Ok(Plan {
        leg_name: leg.name.clone(),
        p0,
        step: d,
        period_s,
        max_leg_temp_c: cfg.limits.max_leg_temp_c,
        max_power_w,
        max_total_w,
        alarms_before: st.alarms.iter().map(|a| a.id.clone()).collect(),
    })
}

/// Runs a leg step test through the daemon (see the module doc): reads the state, checks
/// the step against every limit, holds the heaters in manual mode at their present power,
/// settles, records a baseline, steps, records, and always restores the previous state.
/// `cancel` (set by a signal handler) stops the test; `log` receives the progress lines.
pub fn run_remote_step_test(
    api: &dyn DaemonApi,
    opts: &RemoteOptions,
    cancel: &AtomicBool,
    log: &mut dyn FnMut(&str),
) -> Result<RemoteRun, RemoteError> {
    let (record, context, restored) = session(api, opts, None, cancel, log, &mut |w, log| {
        drive(w, opts, log)
    })?;
    Ok(RemoteRun {
        record,
        context,
        restored,
    })
}

/// A finished remote relay test.
#[derive(Debug, Clone)]
pub struct RemoteRelayRun {
    /// The record, on the daemon's clock.
    pub record: RelayRecord,
    /// What the daemon answered while its state was restored.
    pub restored: Vec<String>,
}

/// Runs an Åström–Hägglund relay test through the daemon: the same hold and settle as
/// the step test, the operating point as the mean over the baseline, then the manual
/// power of every heater switched between p0 ± d on the recorded leg's error with
/// hysteresis ε, until the asked cycles (plus three) or `relay.max_s`; always restores.
/// The amplitude must fit both ways: p0 − d ≥ 0 and p0 + d inside every limit.
pub fn run_remote_relay_test(
    api: &dyn DaemonApi,
    opts: &RemoteOptions,
    relay: &RelayOptions,
    cancel: &AtomicBool,
    log: &mut dyn FnMut(&str),
) -> Result<RemoteRelayRun, RemoteError> {
    let eps = relay.hysteresis.unwrap_or(0.003);
    if !(eps.is_finite() && eps >= 0.0) {
        return Err(RemoteError::Refused(format!(
            "a hysteresis of {eps} K is not allowed: give a finite value ≥ 0"
        )));
    }
    if !(relay.max_s.is_finite() && relay.max_s > 0.0 && relay.max_s <= 30.0 * 86_400.0) {
        return Err(RemoteError::Refused(format!(
            "a relay time of {} s is not allowed: give up to 30 days",
            relay.max_s
        )));
    }
    let amp = relay.amplitude.or(opts.step);
    let (record, _, restored) = session(api, opts, Some(amp), cancel, log, &mut |w, log| {
        drive_relay(w, opts, relay, eps, log)
    })?;
    Ok(RemoteRelayRun { record, restored })
}

/// What a test driver works with: the plan and a checked source of samples.
struct Watch<'a> {
    api: &'a dyn DaemonApi,
    plan: Plan,
    rx: mpsc::Receiver<Result<SampleWire, String>>,
    cancel: &'a AtomicBool,
    opts: &'a RemoteOptions,
    last_sample: Instant,
    last_status: Instant,
    /// Set once the daemon was seen in manual mode: leaving it then stops the test.
    manual_seen: bool,
}

impl Watch<'_> {
    /// The next sample, after every check: a signal, the alarms (read every
    /// `status_every`), a stalled or closed stream, the mode, and the leg temperature limit.
    fn next(&mut self) -> Result<SampleWire, String> {
        loop {
            if self.cancel.load(Ordering::SeqCst) {
                return Err("stopped by a signal (Ctrl-C or SIGTERM)".into());
            }
            if self.last_status.elapsed() >= self.opts.status_every {
                self.last_status = Instant::now();
                let st = self
                    .api
                    .status()
                    .map_err(|e| format!("cannot read the daemon's status: {e}"))?;
                if let Some(a) = st
                    .alarms
                    .iter()
                    .find(|a| a.active || !self.plan.alarms_before.contains(&a.id))
                {
                    return Err(format!("alarm {} during the test: {}", a.id, a.message));
                }
            }
            let s = match self.rx.recv_timeout(Duration::from_millis(100)) {
                Ok(Ok(s)) => s,
                Ok(Err(e)) => return Err(e),
                Err(mpsc::RecvTimeoutError::Timeout) => {
                    if self.last_sample.elapsed() >= self.opts.stall_after {
                        return Err(format!(
                            "no sample from the daemon for {:.0} s: the connection was lost or its loop stopped",
                            self.opts.stall_after.as_secs_f64()
                        ));
                    }
                    continue;
                }
                Err(mpsc::RecvTimeoutError::Disconnected) => {
                    return Err("the stream reader stopped (connection lost)".into());
                }
            };
            self.last_sample = Instant::now();
            if s.legs.len() <= self.opts.leg {
                return Err(format!(
                    "a sample carries {} legs, not the leg {} under test",
                    s.legs.len(),
                    self.opts.leg + 1
                ));
            }
            if self.manual_seen && s.mode != "manual" {
                return Err(format!(
                    "the daemon left manual mode (now {}): an interlock or another client changed it",
                    s.mode
                ));
            }
            let t_limit = self.plan.max_leg_temp_c - LEG_TEMP_MARGIN_K;
            if let Some((k, t)) = s
                .legs
                .iter()
                .enumerate()
                .filter_map(|(k, l)| l.temp_c.map(|t| (k, t)))
                .find(|(_, t)| *t > t_limit)
            {
                return Err(format!(
                    "leg {} reached {t:.3} °C, within {LEG_TEMP_MARGIN_K} K of limits.max_leg_temp_c = {} °C: test stopped; use a smaller step",
                    k + 1,
                    self.plan.max_leg_temp_c
                ));
            }
            return Ok(s);
        }
    }

    /// Puts the daemon into manual mode at p0 and returns the daemon time of the first
    /// row that shows it.
    fn hold(&mut self, log: &mut dyn FnMut(&str)) -> Result<f64, String> {
        let p0 = self.plan.p0;
        self.api
            .set_manual_power(p0)
            .map_err(|e| format!("setting the manual power to {p0} W failed: {e}"))?;
        self.api
            .set_mode("manual")
            .map_err(|e| format!("switching the daemon to manual mode failed: {e}"))?;
        loop {
            let s = self.next()?;
            if s.mode == "manual" && (s.legs[self.opts.leg].power_w - p0).abs() < 1e-6 {
                self.manual_seen = true;
                log(&format!(
                    "tune: manual mode at {p0:.4} W from daemon time {:.1} s; settling {} s",
                    s.t_s, self.opts.settle_s
                ));
                return Ok(s.t_s);
            }
        }
    }
}

/// Reads the state, plans, opens the stream, runs `body`, and always restores.
/// `relay_amplitude`: `Some` for a relay test (the amplitude must fit both ways).
#[allow(clippy::type_complexity)]
fn session<T>(
    api: &dyn DaemonApi,
    opts: &RemoteOptions,
    relay_amplitude: Option<Option<f64>>,
    cancel: &AtomicBool,
    log: &mut dyn FnMut(&str),
    body: &mut dyn FnMut(&mut Watch<'_>, &mut dyn FnMut(&str)) -> Result<T, String>,
) -> Result<(T, AnalysisContext, Vec<String>), RemoteError> {
    let st = api
        .status()
        .map_err(|e| refused("cannot read the daemon's status", e))?;
    let cfg = api
        .config()
        .map_err(|e| refused("cannot read the daemon's configuration", e))?;
    let plan = match relay_amplitude {
        None => plan(opts, &st, &cfg, api)?,
        Some(amp) => {
            let p = plan(
                &RemoteOptions {
                    step: Some(amp.unwrap_or(f64::NAN)),
                    ..opts.clone()
                },
                &st,
                &cfg,
                api,
            );
            // No amplitude given: the default step size, if it also fits below p0.
            let p = match (amp, p) {
                (None, Err(_)) => plan(opts, &st, &cfg, api)?,
                (_, p) => p?,
            };
            let d = p.step.abs();
            if d > p.p0 + 1e-12 {
                return Err(RemoteError::Refused(format!(
                    "a relay amplitude of {d} W is not allowed: from the present {:.4} W the heaters cannot go below 0 W (hold them at a higher power first, e.g. stiltctl mode manual with a manual power above {d} W)",
                    p.p0
                )));
            }
            Plan { step: d, ..p }
        }
    };
    let saved = SavedState::from_daemon(&st, &cfg);
    let source = api
        .samples()
        .map_err(|e| refused("cannot open the daemon's live stream", e))?;
    let (tx, rx) = mpsc::sync_channel::<Result<SampleWire, String>>(256);
    let reader = std::thread::Builder::new()
        .name("stiltd-tune-stream".into())
        .spawn(move || {
            let mut source = source;
            loop {
                let item = match source.next_sample() {
                    Ok(Some(s)) => Ok(s),
                    Ok(None) => Err(
                        "the daemon closed its live stream (connection lost or daemon stopped)"
                            .to_string(),
                    ),
                    Err(e) => Err(e),
                };
                let end = item.is_err();
                if tx.send(item).is_err() || end {
                    return;
                }
            }
        })
        .map_err(|e| RemoteError::Refused(format!("cannot start the stream reader: {e}")))?;
    log(&format!(
        "tune: daemon at {} (mode {}): holding every heater at {:.4} W (manual mode), {} {:.4} W, recording leg {}",
        api.describe(),
        saved.mode,
        plan.p0,
        if relay_amplitude.is_some() {
            "relay ±"
        } else {
            "step"
        },
        plan.step,
        plan.leg_name
    ));
    let context = AnalysisContext {
        loop_name: format!(
            "leg {} temperature loop (every heater stepped together through the API)",
            plan.leg_name
        ),
        world: format!("daemon at {}, its own time stamps", api.describe()),
        control_period_s: plan.period_s,
        current: gains_from_wire(&cfg.control.leg_loop),
        current_source: "in force (daemon)".into(),
    };
    let mut watch = Watch {
        api,
        plan,
        rx,
        cancel,
        opts,
        last_sample: Instant::now(),
        last_status: Instant::now(),
        manual_seen: false,
    };
    let outcome = body(&mut watch, log);
    // The reader thread ends at the stream's end or when it next sends; it is not joined
    // (a silent connection may block it in a read).
    drop(watch);
    drop(reader);
    log(&format!(
        "tune: restoring mode {}, manual power {} W",
        saved.mode, saved.manual_power_w
    ));
    let restored = restore(api, &saved, opts.retry_pause);
    match (outcome, restored) {
        (Ok(v), Ok(done)) => Ok((v, context, done)),
        (Ok(_), Err(f)) => Err(RemoteError::Aborted {
            why: "the test finished".into(),
            saved,
            restore: Err(f),
        }),
        (Err(why), r) => Err(RemoteError::Aborted {
            why,
            saved,
            restore: r,
        }),
    }
}

/// The wire form of gains as the configuration's type.
pub fn gains_from_wire(g: &GainsWire) -> LoopGains {
    LoopGains {
        kp: g.kp,
        ti_s: g.ti_s,
        td_s: g.td_s,
        derivative_filter_s: g.derivative_filter_s,
        setpoint_weight: g.setpoint_weight,
        tracking_time_s: g.tracking_time_s,
        slew_per_s: g.slew_per_s,
    }
}

#[derive(Debug, Clone, Copy, PartialEq)]
enum Phase {
    Settle,
    Baseline,
    /// The step was asked for; waiting for the first row that carries it.
    Stepping,
    Record,
}

fn drive(
    w: &mut Watch<'_>,
    opts: &RemoteOptions,
    log: &mut dyn FnMut(&str),
) -> Result<StepRecord, String> {
    let i = opts.leg;
    let (p0, step) = (w.plan.p0, w.plan.step);
    let p1 = p0 + step;
    let t0 = w.hold(log)?;
    let mut phase = Phase::Settle;
    let (mut t_asked, mut t_step) = (f64::NAN, f64::NAN);
    let (mut time_s, mut output) = (Vec::new(), Vec::new());
    let mut peak_p = (f64::NEG_INFINITY, w.plan.max_power_w);
    let mut peak_total = f64::NEG_INFINITY;
    let mut peak_temp = f64::NEG_INFINITY;
    let mut last_progress: Option<Instant> = None;
    loop {
        let s = w.next()?;
        let power = s.legs[i].power_w;
        let temp = s.legs[i].temp_c.unwrap_or(f64::NAN);
        match phase {
            Phase::Settle => {
                if s.t_s >= t0 + opts.settle_s {
                    phase = Phase::Baseline;
                }
            }
            Phase::Baseline => {
                if s.t_s >= t0 + opts.settle_s + opts.baseline_s {
                    w.api
                        .set_manual_power(p1)
                        .map_err(|e| format!("stepping the manual power to {p1} W failed: {e}"))?;
                    t_asked = s.t_s;
                    phase = Phase::Stepping;
                    log(&format!(
                        "tune: step to {p1:.4} W asked at daemon time {t_asked:.1} s"
                    ));
                }
            }
            Phase::Stepping => {
                if (power - p1).abs() < 1e-6 {
                    // The row's command goes out at the end of its tick.
                    t_step = s.t_s;
                    phase = Phase::Record;
                } else if s.t_s > t_asked + 50.0 * w.plan.period_s {
                    return Err(format!(
                        "the daemon accepted the step to {p1} W but leg {} still draws {power} W after 50 control periods",
                        w.plan.leg_name
                    ));
                }
            }
            Phase::Record => {}
        }
        if matches!(phase, Phase::Baseline | Phase::Stepping | Phase::Record) {
            time_s.push(s.t_s);
            output.push(temp);
        }
        if phase == Phase::Record {
            for l in &s.legs {
                peak_p.0 = peak_p.0.max(l.power_w);
            }
            peak_total = peak_total.max(s.legs.iter().map(|l| l.power_w).sum());
            peak_temp = s
                .legs
                .iter()
                .filter_map(|l| l.temp_c)
                .fold(peak_temp, f64::max);
        }
        let finished = phase == Phase::Record && s.t_s >= t_step + opts.record_s;
        if finished || last_progress.is_none_or(|t| t.elapsed() >= opts.progress_every) {
            last_progress = Some(Instant::now());
            log(&progress_line(phase, &s, i, t0, t_step, opts));
        }
        if finished {
            break;
        }
    }
    if time_s.iter().filter(|&&t| t < t_step).count() < 5 {
        return Err("fewer than 5 baseline samples arrived: the stream skipped too much".into());
    }
    let (time_s, output, drift) = clean_record(&time_s, &output, t_step);
    Ok(StepRecord {
        target: Target::Leg(i),
        input_unit: "W",
        output_unit: "K",
        input_before: p0,
        input_step: step,
        step_time_s: t_step,
        time_s,
        output,
        drift_per_s: drift,
        limit_ticks: 0,
        peak_power_w: peak_p,
        peak_total_power_w: (peak_total, w.plan.max_total_w),
        peak_leg_temp_c: (peak_temp, w.plan.max_leg_temp_c),
    })
}

fn drive_relay(
    w: &mut Watch<'_>,
    opts: &RemoteOptions,
    relay: &RelayOptions,
    eps: f64,
    log: &mut dyn FnMut(&str),
) -> Result<RelayRecord, String> {
    let i = opts.leg;
    let (p0, d) = (w.plan.p0, w.plan.step);
    let t0 = w.hold(log)?;
    // Settle, then the operating point: the mean over the baseline.
    let (mut sum, mut n) = (0.0, 0usize);
    loop {
        let s = w.next()?;
        if s.t_s >= t0 + opts.settle_s + opts.baseline_s {
            break;
        }
        if s.t_s >= t0 + opts.settle_s
            && let Some(t) = s.legs[i].temp_c
        {
            sum += t;
            n += 1;
        }
    }
    if n < 5 {
        return Err("fewer than 5 baseline samples arrived for the relay's operating point".into());
    }
    let r = sum / n as f64;
    let mut u = d;
    w.api
        .set_manual_power(p0 + u)
        .map_err(|e| format!("the relay's first switch to {} W failed: {e}", p0 + u))?;
    let t_start = w.next()?.t_s;
    log(&format!(
        "tune: relay from daemon time {t_start:.1} s around {r:.4} °C, ±{d:.4} W, ε = {eps} K"
    ));
    let (mut time_s, mut output, mut out_relay) = (Vec::new(), Vec::new(), Vec::new());
    let wanted = 2 * (relay.cycles + 3);
    let mut switches = 0usize;
    let mut last_progress = Instant::now();
    while switches < wanted {
        let s = w.next()?;
        if s.t_s > t_start + relay.max_s {
            return Err(format!(
                "the relay made {switches} of {wanted} switches in {} s: raise --relay-amplitude or lower --relay-hysteresis",
                relay.max_s
            ));
        }
        let Some(t) = s.legs[i].temp_c else { continue };
        let y = t - r;
        // The row shows the power in force during its tick.
        time_s.push(s.t_s);
        output.push(y);
        out_relay.push(s.legs[i].power_w - p0);
        // Relay on the error e = r − y (heating raises y): heat when below.
        let e = -y;
        let next = if e > eps && u < 0.0 {
            Some(d)
        } else if e < -eps && u > 0.0 {
            Some(-d)
        } else {
            None
        };
        if let Some(v) = next {
            u = v;
            switches += 1;
            w.api
                .set_manual_power(p0 + u)
                .map_err(|e| format!("the relay's switch to {} W failed: {e}", p0 + u))?;
        }
        if last_progress.elapsed() >= opts.progress_every {
            last_progress = Instant::now();
            log(&format!(
                "tune: relay switch {switches} of {wanted} (daemon time {:.1} s): leg {} {t:.4} °C at {:.4} W",
                s.t_s,
                i + 1,
                s.legs[i].power_w
            ));
        }
    }
    Ok(RelayRecord {
        amplitude: d,
        hysteresis: eps,
        time_s,
        output,
        relay: out_relay,
    })
}

fn progress_line(
    phase: Phase,
    s: &SampleWire,
    i: usize,
    t0: f64,
    t_step: f64,
    o: &RemoteOptions,
) -> String {
    let (name, done, total) = match phase {
        Phase::Settle => ("settling", s.t_s - t0, o.settle_s),
        Phase::Baseline | Phase::Stepping => ("baseline", s.t_s - t0 - o.settle_s, o.baseline_s),
        Phase::Record => ("recording", s.t_s - t_step, o.record_s),
    };
    let leg = &s.legs[i];
    format!(
        "tune: {name} {:.0} of {:.0} s (daemon time {:.1} s): leg {} {} at {:.4} W",
        done.max(0.0),
        total,
        s.t_s,
        i + 1,
        leg.temp_c
            .map_or("no reading".into(), |t| format!("{t:.4} °C")),
        leg.power_w
    )
}

/// Asks `question [y/N]` on `out` and reads the answer from `input`. With `assume_yes` it
/// says so and answers yes without reading; without a terminal (`is_terminal` false) it
/// refuses, naming `--yes`.
pub fn confirm(
    question: &str,
    assume_yes: bool,
    is_terminal: bool,
    input: &mut dyn BufRead,
    out: &mut dyn Write,
) -> Result<bool, String> {
    if assume_yes {
        let _ = writeln!(out, "{question} [y/N] yes (--yes)");
        return Ok(true);
    }
    if !is_terminal {
        return Err(format!(
            "not applying: \"{question}\" needs a yes from a person at a terminal, and standard input is not one; pass --yes to apply without asking"
        ));
    }
    let _ = write!(out, "{question} [y/N] ");
    let _ = out.flush();
    let mut line = String::new();
    input
        .read_line(&mut line)
        .map_err(|e| format!("cannot read the answer: {e}"))?;
    Ok(matches!(
        line.trim().to_ascii_lowercase().as_str(),
        "y" | "yes"
    ))
}

/// PUTs `p`'s gains for `target`'s loop and reads them back from `/v1/config`; returns
/// the daemon's answer and the gains it now reports.
pub fn apply_proposal(
    api: &dyn DaemonApi,
    target: Target,
    p: &NamedGains,
) -> Result<(ChangeReply, GainsWire), String> {
    let Some(ti_s) = p.ti_s else {
        return Err(format!(
            "`{}` has no integral action and the API cannot switch integral action off; choose a PI or PID rule",
            p.key
        ));
    };
    if !(p.kp.is_finite() && ti_s.is_finite() && p.td_s.is_finite()) {
        return Err(format!("`{}` has no usable numbers", p.key));
    }
    let which = match target {
        Target::Leg(_) => LoopKind::Leg,
        Target::TiltAxis(_) => LoopKind::Tilt,
    };
    let body = GainsBody {
        kp: Some(p.kp),
        ti_s: Some(ti_s),
        td_s: Some(p.td_s),
        ..GainsBody::default()
    };
    let reply = api
        .set_gains(which, &body)
        .map_err(|e| format!("the daemon refused the gains: {e}"))?;
    let cfg = api
        .config()
        .map_err(|e| format!("the gains were accepted, but reading them back failed: {e}"))?;
    let now = match which {
        LoopKind::Leg => cfg.control.leg_loop,
        LoopKind::Tilt => cfg.control.tilt_loop,
    };
    let close = |a: f64, b: f64| (a - b).abs() <= 1e-9 * a.abs().max(b.abs()).max(1e-300);
    if !(close(now.kp, p.kp) && now.ti_s.is_some_and(|t| close(t, ti_s)) && close(now.td_s, p.td_s))
    {
        return Err(format!(
            "the daemon answered \"{}\" but now reports kp = {}, ti_s = {:?}, td_s = {}",
            reply.detail, now.kp, now.ti_s, now.td_s
        ));
    }
    Ok((reply, now))
}

#[cfg(test)]
mod tests {
    use std::sync::{Arc, Mutex};

    use serde_json::json;

    use super::*;

    /// An invented first-order plant behind a fake daemon: every leg's temperature rises
    /// K = 3 K/W × heater power above 21 °C with τ = 2 s, sampled every 0.1 s (invented
    /// data: the checks are that the record, the shared analysis and the restore logic
    /// carry it through, not a physical claim).
    const K: f64 = 3.0;
    const TAU_S: f64 = 2.0;
    const DT_S: f64 = 0.1;

    struct State {
        mode: String,
        manual_w: f64,
        target: [f64; 2],
        bias: f64,
        gains: serde_json::Value,
        calls: Vec<String>,
        status_calls: u32,
        alarm_at_status_call: Option<u32>,
        changes_allowed: Option<usize>,
        stream_ends_after: Option<usize>,
    }

    #[derive(Clone)]
    struct Fake(Arc<Mutex<State>>);

    impl Fake {
        fn new() -> Self {
            Fake(Arc::new(Mutex::new(State {
                mode: "off".into(),
                manual_w: 1.0,
                target: [0.5, -0.25],
                bias: 24.0,
                gains: json!({"kp": 8.0, "ti_s": 300.0, "td_s": 0.0, "derivative_filter_s": 0.0,
                    "setpoint_weight": 1.0, "tracking_time_s": 300.0, "slew_per_s": 0.2}),
                calls: Vec::new(),
                status_calls: 0,
                alarm_at_status_call: None,
                changes_allowed: None,
                stream_ends_after: None,
            })))
        }
        fn with(self, f: impl FnOnce(&mut State)) -> Self {
            f(&mut self.0.lock().unwrap());
            self
        }
        fn state(&self) -> std::sync::MutexGuard<'_, State> {
            self.0.lock().unwrap()
        }
        fn change(
            &self,
            what: String,
            apply: impl FnOnce(&mut State),
        ) -> Result<ChangeReply, ClientError> {
            let mut s = self.state();
            if let Some(n) = s.changes_allowed {
                if n == 0 {
                    return Err(ClientError::Http {
                        status: 503,
                        code: "busy".into(),
                        field: None,
                        message: "the fake refuses".into(),
                    });
                }
                s.changes_allowed = Some(n - 1);
            }
            s.calls.push(what.clone());
            apply(&mut s);
            Ok(ChangeReply {
                detail: what,
                by: "api:test".into(),
            })
        }
    }

    fn power(s: &State) -> f64 {
        if s.mode == "manual" { s.manual_w } else { 0.0 }
    }

    struct Source {
        fake: Fake,
        t_s: f64,
        rise_k: f64,
        n: usize,
    }

    impl SampleSource for Source {
        fn next_sample(&mut self) -> Result<Option<SampleWire>, String> {
            std::thread::sleep(Duration::from_micros(100));
            let s = self.fake.state();
            if s.stream_ends_after.is_some_and(|n| self.n >= n) {
                return Ok(None);
            }
            self.n += 1;
            self.t_s += DT_S;
            let p = power(&s);
            let temp = 21.0 + self.rise_k;
            self.rise_k += (K * p - self.rise_k) * (1.0 - (-DT_S / TAU_S).exp());
            let leg = json!({"temp_c": temp, "quality": "ok", "setpoint_c": 24.0, "power_w": p});
            Ok(Some(
                serde_json::from_value(json!({
                    "tick": self.n, "t_s": self.t_s, "t_utc_ns": 0, "mode": s.mode,
                    "tilt_urad": [0.0, 0.0], "tilt_quality": "ok", "setpoint_urad": [0.0, 0.0],
                    "target_urad": s.target, "legs": [leg, leg, leg]
                }))
                .unwrap(),
            ))
        }
    }

    impl DaemonApi for Fake {
        fn describe(&self) -> String {
            "fake daemon".into()
        }
        fn status(&self) -> Result<StatusWire, ClientError> {
            let mut s = self.state();
            s.status_calls += 1;
            let alarms = if s.alarm_at_status_call.is_some_and(|n| s.status_calls >= n) {
                json!([{"id": "leg_temp_high", "message": "leg A above its limit", "since_utc_ns": 0,
                    "active": true, "latched": true, "acknowledged_by": null}])
            } else {
                json!([])
            };
            let p = power(&s);
            let leg = |n: &str| {
                json!({"name": n, "temp_c": 21.0, "quality": "ok", "age_s": 0.1,
                "setpoint_c": 24.0, "power_w": p, "max_power_w": 2.0, "drive_v": 0.0,
                "readback_power_w": null, "terms": {"p": null, "i": null, "d": null, "out": null}})
            };
            let axis = |n: &str, t: f64| {
                json!({"axis": n, "measured_urad": 0.0, "quality": "ok",
                "age_s": 0.1, "setpoint_urad": t, "target_urad": t,
                "terms": {"p": null, "i": null, "d": null, "out": null}})
            };
            Ok(serde_json::from_value(json!({
                "version": "test", "stage_name": "fake", "started_utc_ns": 0, "now_utc_ns": 0,
                "uptime_s": 1.0, "mode": s.mode, "ready": true,
                "axes": [axis("x", s.target[0]), axis("y", s.target[1])],
                "leg_bias_c": s.bias, "leg_bias_target_c": s.bias,
                "legs": [leg("A"), leg("B"), leg("C")], "alarms": alarms,
                "timing": {"period_s": DT_S, "ticks": 1, "overruns": 0, "jitter_p50_s": 0.0,
                    "jitter_p99_s": 0.0, "jitter_max_s": 0.0, "last_tick_work_s": 0.0},
                "recording": {"enabled": false, "segment": null, "rows_written": 0, "dropped_rows": 0,
                    "last_flush_utc_ns": null, "alarm": null},
                "channels": []
            }))
            .unwrap())
        }
        fn config(&self) -> Result<ConfigWire, ClientError> {
            let s = self.state();
            let leg = |n: &str| {
                json!({"name": n, "x_m": 0.0, "y_m": 0.0, "length_m": 0.3,
                "material": "aluminium", "cte_per_k": 23e-6, "heater_resistance_ohm": 50.0,
                "heater_max_power_w": 2.0, "thermometer_channel": 0})
            };
            Ok(serde_json::from_value(json!({
                "stage_name": "fake", "legs": [leg("A"), leg("B"), leg("C")],
                "tiltmeter_rate_hz": 10.0, "tiltmeter_range_urad": 500.0,
                "control": {"rate_hz": 1.0 / DT_S, "initial_mode": "off",
                    "initial_setpoint_urad": [0.0, 0.0], "setpoint_ramp_urad_per_s": 0.01,
                    "initial_leg_bias_c": 24.0, "leg_bias_ramp_k_per_s": 0.002,
                    "manual_power_w": s.manual_w, "tilt_loop": s.gains, "tilt_output_limit_urad": 60.0,
                    "leg_loop": s.gains},
                "limits": {"max_leg_temp_c": 35.0, "max_total_power_w": 6.0, "tilt_range_urad": 450.0},
                "recording_enabled": false, "recording_flush_interval_s": 5.0,
                "recording_segment_duration_h": 6.0,
                "network": {"bind": "127.0.0.1:0", "tls": false, "tokens_required": false,
                    "max_stream_clients": 16, "change_timeout_ms": 2000},
                "changed_through_api": []
            }))
            .unwrap())
        }
        fn set_mode(&self, mode: &str) -> Result<ChangeReply, ClientError> {
            let m = mode.to_string();
            self.change(format!("mode {mode}"), |s| s.mode = m)
        }
        fn set_manual_power(&self, w: f64) -> Result<ChangeReply, ClientError> {
            self.change(format!("manual-power {w}"), |s| s.manual_w = w)
        }
        fn set_tilt_target(&self, t: [f64; 2]) -> Result<ChangeReply, ClientError> {
            self.change(format!("tilt {t:?}"), |s| s.target = t)
        }
        fn set_leg_bias(&self, c: f64) -> Result<ChangeReply, ClientError> {
            self.change(format!("bias {c}"), |s| s.bias = c)
        }
        fn set_gains(&self, which: LoopKind, b: &GainsBody) -> Result<ChangeReply, ClientError> {
            let b = b.clone();
            self.change(format!("gains {which:?}"), move |s| {
                if let Some(v) = b.kp {
                    s.gains["kp"] = json!(v)
                }
                if let Some(v) = b.ti_s {
                    s.gains["ti_s"] = json!(v)
                }
                if let Some(v) = b.td_s {
                    s.gains["td_s"] = json!(v)
                }
            })
        }
        fn samples(&self) -> Result<Box<dyn SampleSource>, ClientError> {
            let p = power(&self.state());
            Ok(Box::new(Source {
                fake: self.clone(),
                t_s: 100.0,
                rise_k: K * p,
                n: 0,
            }))
        }
    }

    fn opts() -> RemoteOptions {
        RemoteOptions {
            step: Some(0.5),
            settle_s: 0.5,
            baseline_s: 2.0,
            record_s: 16.0,
            progress_every: Duration::from_millis(20),
            stall_after: Duration::from_secs(5),
            status_every: Duration::ZERO,
            retry_pause: Duration::ZERO,
            ..RemoteOptions::new(0)
        }
    }

    fn run(
        f: &Fake,
        o: &RemoteOptions,
        cancel: bool,
    ) -> (Result<RemoteRun, RemoteError>, Vec<String>) {
        let mut lines = Vec::new();
        let flag = AtomicBool::new(cancel);
        let r = run_remote_step_test(f, o, &flag, &mut |l| lines.push(l.to_string()));
        (r, lines)
    }

    fn assert_restored(f: &Fake) {
        let s = f.state();
        assert_eq!(s.mode, "off", "{:?}", s.calls);
        assert_eq!(s.manual_w, 1.0, "{:?}", s.calls);
        assert_eq!(s.target, [0.5, -0.25]);
        assert_eq!(s.bias, 24.0);
    }

    #[test]
    fn a_step_test_records_the_plant_through_the_shared_analysis_and_restores() {
        let f = Fake::new();
        let (r, lines) = run(&f, &opts(), false);
        let run = r.unwrap();
        assert_restored(&f);
        let calls = f.state().calls.clone();
        // Held at the present power (0 W in off mode), then stepped, then put back.
        assert_eq!(
            calls,
            [
                "manual-power 0",
                "mode manual",
                "manual-power 0.5",
                "manual-power 1",
                "mode off"
            ],
        );
        assert_eq!(run.record.input_before, 0.0);
        assert_eq!(run.record.input_step, 0.5);
        let res = super::super::analyse_with(&run.context, &run.record, None).unwrap();
        // The invented plant: K = 3 K/W, τ = 2 s (one sample of delay).
        assert!((res.model.gain - K).abs() < 0.05 * K, "{:?}", res.model);
        assert!(
            (res.model.time_constant_s - TAU_S).abs() < 0.1 * TAU_S,
            "{:?}",
            res.model
        );
        assert!(res.world.contains("fake daemon"), "{}", res.world);
        assert_eq!(res.current.kp, 8.0);
        // Progress lines are bounded in number, and name the phases.
        assert!(lines.iter().any(|l| l.contains("recording")), "{lines:?}");
        assert!(lines.len() < 200, "{}", lines.len());
    }

    #[test]
    fn an_alarm_stops_the_test_and_the_state_is_restored() {
        let f = Fake::new().with(|s| s.alarm_at_status_call = Some(6));
        let e = run(&f, &opts(), false).0.unwrap_err().to_string();
        assert!(
            e.contains("alarm leg_temp_high") && e.contains("previous state was restored"),
            "{e}"
        );
        assert_restored(&f);
    }

    #[test]
    fn a_lost_stream_stops_the_test_and_the_state_is_restored() {
        let f = Fake::new().with(|s| s.stream_ends_after = Some(30));
        let e = run(&f, &opts(), false).0.unwrap_err().to_string();
        assert!(
            e.contains("closed its live stream") && e.contains("restored"),
            "{e}"
        );
        assert_restored(&f);
    }

    #[test]
    fn a_signal_stops_the_test_and_the_state_is_restored() {
        let f = Fake::new();
        let e = run(&f, &opts(), true).0.unwrap_err().to_string();
        assert!(
            e.contains("stopped by a signal") && e.contains("restored"),
            "{e}"
        );
        assert_restored(&f);
    }

    #[test]
    fn a_failed_restore_says_how_to_restore_by_hand() {
        // The two changes that start the test pass; then the stream ends and every
        // change is refused.
        let f = Fake::new().with(|s| {
            s.changes_allowed = Some(2);
            s.stream_ends_after = Some(10);
        });
        let e = run(&f, &opts(), false).0.unwrap_err().to_string();
        assert!(e.contains("RESTORING THE PREVIOUS STATE FAILED"), "{e}");
        assert!(
            e.contains("stiltctl set manual-power 1") && e.contains("stiltctl mode off"),
            "{e}"
        );
    }

    #[test]
    fn a_step_outside_the_limits_or_an_active_alarm_changes_nothing() {
        // 3 heaters of 2 W, 6 W in total, from 0 W: at most +2 W.
        let f = Fake::new();
        let e = run(
            &f,
            &RemoteOptions {
                step: Some(2.5),
                ..opts()
            },
            false,
        )
        .0
        .unwrap_err();
        let m = e.to_string();
        assert!(matches!(e, RemoteError::Refused(_)), "{m}");
        assert!(
            m.contains("+2.0000 W") && m.contains("nothing was changed"),
            "{m}"
        );
        let e = run(
            &f,
            &RemoteOptions {
                step: Some(-0.1),
                ..opts()
            },
            false,
        )
        .0
        .unwrap_err();
        assert!(e.to_string().contains("−0.0000 W"), "{e}");
        let f2 = Fake::new().with(|s| s.alarm_at_status_call = Some(1));
        let e = run(&f2, &opts(), false).0.unwrap_err().to_string();
        assert!(
            e.contains("active alarms") && e.contains("leg_temp_high"),
            "{e}"
        );
        let e = run(&f, &RemoteOptions { leg: 5, ..opts() }, false)
            .0
            .unwrap_err()
            .to_string();
        assert!(e.contains("no leg 6") && e.contains("A, B, C"), "{e}");
        assert!(f.state().calls.is_empty() && f2.state().calls.is_empty());
    }

    #[test]
    fn a_relay_test_oscillates_inside_its_bounds_and_restores() {
        // Held at 1 W in manual mode (the fake's plant starts at equilibrium there).
        let f = Fake::new().with(|s| s.mode = "manual".into());
        let relay = RelayOptions {
            amplitude: Some(0.5),
            hysteresis: Some(0.003),
            max_s: 60.0,
            cycles: 4,
        };
        let flag = AtomicBool::new(false);
        let run = run_remote_relay_test(&f, &opts(), &relay, &flag, &mut |_| {}).unwrap();
        {
            let s = f.state();
            assert_eq!(
                (s.mode.as_str(), s.manual_w),
                ("manual", 1.0),
                "{:?}",
                s.calls
            );
            // Only p0 and p0 ± d were ever asked for.
            for c in &s.calls {
                if let Some(w) = c.strip_prefix("manual-power ") {
                    assert!(["1", "1.5", "0.5"].contains(&w), "{c}");
                }
            }
        }
        let r = &run.record;
        assert!(
            r.relay.iter().all(|u| (u.abs() - 0.5).abs() < 1e-9),
            "{:?}",
            r.relay
        );
        let switches = r.relay.windows(2).filter(|w| w[0] != w[1]).count();
        assert!(switches >= 2 * 4, "{switches} switches");
        // The output stays within what the relay can drive: |y| < K·d.
        assert!(r.output.iter().all(|y| y.abs() < K * 0.5), "{:?}", r.output);
        // The amplitude must also fit below p0: from 0 W (off) it cannot.
        let off = Fake::new();
        let e = run_remote_relay_test(&off, &opts(), &relay, &flag, &mut |_| {}).unwrap_err();
        assert!(e.to_string().contains("below 0 W"), "{e}");
        assert!(off.state().calls.is_empty());
    }

    #[test]
    fn the_confirmation_is_refused_without_a_terminal_unless_yes() {
        let mut out = Vec::new();
        let e = confirm("apply simc?", false, false, &mut &b"y\n"[..], &mut out).unwrap_err();
        assert!(e.contains("--yes") && e.contains("not a"), "{e}");
        assert!(confirm("apply?", true, false, &mut &b""[..], &mut out).unwrap());
        assert!(confirm("apply?", false, true, &mut &b"y\n"[..], &mut out).unwrap());
        assert!(confirm("apply?", false, true, &mut &b"YES\n"[..], &mut out).unwrap());
        assert!(!confirm("apply?", false, true, &mut &b"\n"[..], &mut out).unwrap());
        assert!(!confirm("apply?", false, true, &mut &b"nope\n"[..], &mut out).unwrap());
        assert!(!confirm("apply?", false, true, &mut &b""[..], &mut out).unwrap());
        assert!(String::from_utf8_lossy(&out).contains("apply? [y/N]"));
    }

    #[test]
    fn a_proposal_is_put_and_read_back_and_p_only_is_refused() {
        let f = Fake::new();
        let g = NamedGains {
            key: "simc",
            rule: "SIMC".into(),
            kp: 2.5,
            ti_s: Some(40.0),
            td_s: 0.0,
        };
        let (reply, now) = apply_proposal(&f, Target::Leg(0), &g).unwrap();
        assert!(reply.detail.contains("gains Leg"));
        assert_eq!((now.kp, now.ti_s, now.td_s), (2.5, Some(40.0), 0.0));
        let p = NamedGains {
            key: "zn-p",
            ti_s: None,
            ..g
        };
        let e = apply_proposal(&f, Target::Leg(0), &p).unwrap_err();
        assert!(e.contains("zn-p") && e.contains("PI or PID"), "{e}");
    }
}

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
//! - [`SavedState`] and [`restore`]: the mode, manual power, setpoints and held tilt
//!   correction read before the test, put back at its end whatever happened;
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
//! The tilt-axis test through the API (`Target::TiltAxis`): the daemon is put into
//! `temperature` mode (the leg loops closed around the leg bias, the tilt loops open),
//! settles, records a baseline of the axis's measured tilt, then steps the held tilt
//! correction of that axis (`PUT /v1/tilt-correction`): each leg's setpoint moves at once
//! by the geometry's offset for it — the same open-loop input of the tilt plant as the
//! simulated test's. The step is kept within ±`control.tilt_output_limit_urad` and no leg
//! setpoint may come within [`LEG_TEMP_MARGIN_K`] of `limits.max_leg_temp_c`; if a heater
//! sits at 0 W or its maximum when the step is due (the leg loops could not follow), the
//! test stops. At the end the correction is set back to 0 before the rest is restored.
//! There is no relay test of a tilt axis through the daemon.

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
    ChangeReply, ConfigLegWire, ConfigWire, GainsBody, GainsWire, LegBiasBody, ManualPowerBody,
    ModeBody, SampleWire, StatusWire, TiltSetpointBody,
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
    /// `PUT /v1/tilt-correction` (`None` keeps that axis's held value; temperature mode
    /// only).
    fn set_tilt_correction(&self, c: [Option<f64>; 2]) -> Result<ChangeReply, ClientError>;
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
    fn set_tilt_correction(&self, c: [Option<f64>; 2]) -> Result<ChangeReply, ClientError> {
        Client::set_tilt_correction(self, c[0], c[1])
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
    /// Tilt correction held (temperature mode only, else 0), µrad per axis: the axes'
    /// `terms.out` in temperature mode.
    pub held_correction_urad: [f64; 2],
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
            held_correction_urad: held_correction(st),
        }
    }

    /// The `stiltctl` commands that put this state back by hand.
    pub fn by_hand(&self) -> String {
        let held = self.held();
        format!(
            "(if in temperature mode: stiltctl set correction --x-urad 0 --y-urad 0); stiltctl set manual-power {}; stiltctl set tilt --x-urad {} --y-urad {}; stiltctl set bias {}; stiltctl mode {}{}",
            self.manual_power_w,
            self.tilt_target_urad[0],
            self.tilt_target_urad[1],
            self.leg_bias_target_c,
            self.mode,
            held.map_or(String::new(), |c| format!(
                "; stiltctl set correction --x-urad {} --y-urad {}",
                c[0], c[1]
            ))
        )
    }

    /// The held correction to put back after the mode: only in temperature mode, and only
    /// when it is not zero.
    fn held(&self) -> Option<[f64; 2]> {
        (self.mode == "temperature" && self.held_correction_urad != [0.0; 2])
            .then_some(self.held_correction_urad)
    }
}

/// The tilt correction a status shows held: the axes' `terms.out` in temperature mode
/// (the held value there), else none (0).
fn held_correction(st: &StatusWire) -> [f64; 2] {
    if st.mode != "temperature" {
        return [0.0; 2];
    }
    [0, 1].map(|k| {
        st.axes
            .get(k)
            .and_then(|a| a.terms.out)
            .filter(|v| v.is_finite())
            .unwrap_or(0.0)
    })
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

/// Puts `saved` back: a held tilt correction back to 0 (when the daemon is in
/// temperature mode), the manual power, then the setpoints if they differ now, then the
/// mode, then a correction that was held before the test. Every part is tried even when
/// one fails (connection trouble is retried three times, `pause` apart). `Ok` lists what
/// the daemon answered, `Err` what failed.
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
    let status = with_retries(pause, || api.status());
    match &status {
        Ok(st) if st.mode != "temperature" => {
            // No correction can be held outside temperature mode.
        }
        Ok(_) => note(
            "tilt correction",
            with_retries(pause, || api.set_tilt_correction([Some(0.0), Some(0.0)])),
        ),
        Err(_) => match with_retries(pause, || api.set_tilt_correction([Some(0.0), Some(0.0)])) {
            // Refused because the mode is not temperature: nothing is held.
            Err(ClientError::Http { status: 409, .. }) => {}
            r => note("tilt correction", r),
        },
    }
    note(
        "manual power",
        with_retries(pause, || api.set_manual_power(saved.manual_power_w)),
    );
    match status {
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
    if let Some(c) = saved.held() {
        note(
            "held tilt correction",
            with_retries(pause, || api.set_tilt_correction([Some(c[0]), Some(c[1])])),
        );
    }
    // The loop applies a change at once but its status follows at its next tick: wait
    // (up to 5 s) until the status shows the mode and the held correction again, so that
    // the caller's next read sees the restored state.
    if mode_ok {
        let t0 = Instant::now();
        let want_held = saved.held().unwrap_or([0.0; 2]);
        let held_ok = |st: &StatusWire| {
            let h = held_correction(st);
            (h[0] - want_held[0]).abs() <= 1e-9 && (h[1] - want_held[1]).abs() <= 1e-9
        };
        loop {
            match api.status() {
                Ok(st) if st.mode == saved.mode && held_ok(&st) => break,
                Ok(st) if t0.elapsed() >= Duration::from_secs(5) => {
                    failed.push(format!(
                        "mode: the daemon accepted {} and a held tilt correction of [{}, {}] µrad but still reports {} and [{}, {}] after 5 s",
                        saved.mode,
                        want_held[0],
                        want_held[1],
                        st.mode,
                        held_correction(&st)[0],
                        held_correction(&st)[1]
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
    /// The loop: a leg (configuration order) whose temperature is recorded, or a tilt
    /// axis whose measured tilt is recorded.
    pub target: Target,
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
    /// Defaults for `target`: 10 min settle, then the simulated stage's baseline and
    /// record (30 min and 3 h for a leg, 10 min and 30 min for a tilt axis), a progress
    /// line every 10 s, 10 s without a sample is a lost connection, the status every
    /// second.
    pub fn new(target: Target) -> Self {
        let sim = StepOptions::new(target);
        RemoteOptions {
            target,
            step: None,
            settle_s: 600.0,
            baseline_s: sim.baseline_s,
            record_s: sim.record_s,
            progress_every: Duration::from_secs(10),
            stall_after: Duration::from_secs(10),
            status_every: Duration::from_secs(1),
            retry_pause: Duration::from_secs(1),
        }
    }

    /// The leg under test (a leg test), or the first leg (a tilt test: every sample must
    /// carry at least one leg).
    fn leg(&self) -> usize {
        match self.target {
            Target::Leg(i) => i,
            Target::TiltAxis(_) => 0,
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
        /// The state the test tried to restore (boxed: the error stays small).
        saved: Box<SavedState>,
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
    /// The leg's name (a leg test) or the axis's (`x`, `y`).
    leg_name: String,
    /// The mode the test holds the daemon in: leaving it stops the test.
    hold_mode: &'static str,
    /// What a tilt test needs beyond the rest.
    tilt: Option<TiltPlan>,
    p0: f64,
    step: f64,
    period_s: f64,
    max_leg_temp_c: f64,
    max_power_w: f64,
    max_total_w: f64,
    alarms_before: HashSet<String>,
}

/// Checks common to every step test through the daemon: no active alarm, a sane control
/// rate, and durations of at least 10 periods of baseline and 30 of record. Returns the
/// control period, s.
fn quiet_stage_and_durations(
    opts: &RemoteOptions,
    st: &StatusWire,
    cfg: &ConfigWire,
) -> Result<f64, RemoteError> {
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
        target: opts.target,
        step: opts.step,
        warmup_s: opts.settle_s,
        baseline_s: opts.baseline_s,
        record_s: opts.record_s,
    };
    check_durations_min(&durations, 10.0 * period_s, 30.0 * period_s)
        .map_err(|e| RemoteError::Refused(format!("{e} (settle is the warm-up here)")))?;
    Ok(period_s)
}

fn plan(
    opts: &RemoteOptions,
    st: &StatusWire,
    cfg: &ConfigWire,
    api: &dyn DaemonApi,
) -> Result<Plan, RemoteError> {
    let n = cfg.legs.len();
    let Some(leg) = cfg.legs.get(opts.leg()) else {
        let names: Vec<&str> = cfg.legs.iter().map(|l| l.name.as_str()).collect();
        return Err(RemoteError::Refused(format!(
            "the daemon at {} has no leg {} (its legs: {})",
            api.describe(),
            opts.leg() + 1,
            names.join(", ")
        )));
    };
    if st.legs.len() != n {
        return Err(RemoteError::Refused(format!(
            "the daemon's status lists {} legs but its configuration {n}",
            st.legs.len()
        )));
    }
    let period_s = quiet_stage_and_durations(opts, st, cfg)?;
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
        hold_mode: "manual",
        tilt: None,
        p0,
        step: d,
        period_s,
        max_leg_temp_c: cfg.limits.max_leg_temp_c,
        max_power_w,
        max_total_w,
        alarms_before: st.alarms.iter().map(|a| a.id.clone()).collect(),
    })
}

/// What a tilt-axis test needs beyond [`Plan`].
struct TiltPlan {
    /// 0 (x) or 1 (y).
    axis: usize,
    /// The correction held before the step, µrad per axis.
    c0: [f64; 2],
    /// The step's change of each leg's setpoint, K (the geometry's offsets).
    d_offsets_k: Vec<f64>,
    /// Each heater's maximum, W.
    heater_max_w: Vec<f64>,
}

/// The leg temperature offsets (K) that tilt the plate by `tilt_urad`, from the legs'
/// positions and expansion as the daemon reports them: the least-norm, zero-mean pattern
/// of [`crate::core::geometry::Geometry::temperature_offsets_for_tilt`] (the same
/// formula, on the wire's fields; a unit test checks them equal). Non-finite when the
/// legs' tops are collinear.
fn offsets_for_tilt(legs: &[ConfigLegWire], tilt_urad: [f64; 2]) -> Vec<f64> {
    let n = legs.len().max(1) as f64;
    let cx = legs.iter().map(|l| l.x_m).sum::<f64>() / n;
    let cy = legs.iter().map(|l| l.y_m).sum::<f64>() / n;
    let (a, b) = (tilt_urad[0] * 1e-6, tilt_urad[1] * 1e-6);
    let (mut sxx, mut sxy, mut syy) = (0.0, 0.0, 0.0);
    for l in legs {
        let (x, y) = (l.x_m - cx, l.y_m - cy);
        sxx += x * x;
        sxy += x * y;
        syy += y * y;
    }
    let degenerate = (sxx * syy - sxy * sxy).abs() <= 1e-18 || sxx.is_nan() || syy.is_nan();
    legs.iter()
        .map(|l| {
            if degenerate {
                return f64::NAN;
            }
            (a * (l.x_m - cx) + b * (l.y_m - cy)) / (l.cte_per_k * l.length_m)
        })
        .collect()
}

/// The plan of a tilt-axis step test: the held correction steps from its present value
/// (0 unless the status shows one held in temperature mode) by `opts.step` (default
/// min(2, limit/2) µrad, as on the simulated stage), within ±`tilt_output_limit_urad`,
/// and no leg's setpoint may come within [`LEG_TEMP_MARGIN_K`] of `max_leg_temp_c`.
fn plan_tilt(
    axis: usize,
    opts: &RemoteOptions,
    st: &StatusWire,
    cfg: &ConfigWire,
    api: &dyn DaemonApi,
) -> Result<Plan, RemoteError> {
    let name = match axis {
        0 => "x",
        1 => "y",
        _ => {
            return Err(RemoteError::Refused(format!(
                "no tilt axis {axis}: the axes are x and y"
            )));
        }
    };
    let n = cfg.legs.len();
    if n < 3 || st.legs.len() != n || st.axes.len() < 2 {
        return Err(RemoteError::Refused(format!(
            "the daemon at {} reports {} legs in its configuration, {} in its status and {} tilt axes: a tilt test needs at least 3 legs and both axes",
            api.describe(),
            n,
            st.legs.len(),
            st.axes.len()
        )));
    }
    let period_s = quiet_stage_and_durations(opts, st, cfg)?;
    let lim = cfg.control.tilt_output_limit_urad;
    let c0 = held_correction(st);
    let d = opts.step.unwrap_or(2.0_f64.min(0.5 * lim));
    let c1_k = c0[axis] + d;
    if !d.is_finite() || d == 0.0 || !lim.is_finite() || c1_k.abs() > lim {
        return Err(RemoteError::Refused(format!(
            "a tilt correction step of {d} µrad is not allowed: from the held {:.4} µrad on {name} it must be non-zero and end within the tilt loop's output limit, ±{lim} µrad (control.tilt_output_limit_urad)",
            c0[axis]
        )));
    }
    let mut c1 = c0;
    c1[axis] = c1_k;
    let off0 = offsets_for_tilt(&cfg.legs, c0);
    let off1 = offsets_for_tilt(&cfg.legs, c1);
    if off1.iter().chain(&off0).any(|o| !o.is_finite()) {
        return Err(RemoteError::Refused(
            "the daemon's legs give no tilt map (collinear tops or a zero expansion)".into(),
        ));
    }
    let t_limit = cfg.limits.max_leg_temp_c - LEG_TEMP_MARGIN_K;
    for (l, o) in cfg.legs.iter().zip(&off1) {
        let sp = st.leg_bias_target_c + o;
        if sp > t_limit {
            return Err(RemoteError::Refused(format!(
                "a tilt correction step of {d} µrad on {name} would set leg {} to {sp:.3} °C (bias {} °C {o:+.3} K), within {LEG_TEMP_MARGIN_K} K of limits.max_leg_temp_c = {} °C: use a smaller step",
                l.name, st.leg_bias_target_c, cfg.limits.max_leg_temp_c
            )));
        }
    }
    let heater_max_w: Vec<f64> = cfg.legs.iter().map(|l| l.heater_max_power_w).collect();
    Ok(Plan {
        leg_name: name.into(),
        hold_mode: "temperature",
        tilt: Some(TiltPlan {
            axis,
            c0,
            d_offsets_k: off1.iter().zip(&off0).map(|(a, b)| a - b).collect(),
            heater_max_w: heater_max_w.clone(),
        }),
        p0: c0[axis],
        step: d,
        period_s,
        max_leg_temp_c: cfg.limits.max_leg_temp_c,
        max_power_w: heater_max_w.iter().copied().fold(f64::INFINITY, f64::min),
        max_total_w: cfg.limits.max_total_power_w,
        alarms_before: st.alarms.iter().map(|a| a.id.clone()).collect(),
    })
}

/// Runs a step test through the daemon (see the module doc): reads the state, checks the
/// step against every limit, holds the daemon in the test's mode (a leg: manual mode at
/// the heaters' present power; a tilt axis: temperature mode, the leg loops closed),
/// settles, records a baseline, steps (the manual power, or the held tilt correction),
/// records, and always restores the previous state.
/// `cancel` (set by a signal handler) stops the test; `log` receives the progress lines.
pub fn run_remote_step_test(
    api: &dyn DaemonApi,
    opts: &RemoteOptions,
    cancel: &AtomicBool,
    log: &mut dyn FnMut(&str),
) -> Result<RemoteRun, RemoteError> {
    let (record, context, restored) = session(api, opts, None, cancel, log, &mut |w, log| {
        if w.plan.tilt.is_some() {
            drive_tilt(w, opts, log)
        } else {
            drive(w, opts, log)
        }
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
    /// Set once the daemon was seen in the test's mode (`plan.hold_mode`): leaving it
    /// then stops the test.
    mode_seen: bool,
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
            if s.legs.len() <= self.opts.leg() {
                return Err(format!(
                    "a sample carries {} legs, not the leg {} under test",
                    s.legs.len(),
                    self.opts.leg() + 1
                ));
            }
            if self.mode_seen && s.mode != self.plan.hold_mode {
                return Err(format!(
                    "the daemon left {} mode (now {}): an interlock or another client changed it",
                    self.plan.hold_mode, s.mode
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
            if s.mode == "manual" && (s.legs[self.opts.leg()].power_w - p0).abs() < 1e-6 {
                self.mode_seen = true;
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
    let plan = match (opts.target, relay_amplitude) {
        (Target::TiltAxis(k), None) => plan_tilt(k, opts, &st, &cfg, api)?,
        (Target::TiltAxis(_), Some(_)) => {
            return Err(RemoteError::Refused(
                "a relay test of a tilt axis through the daemon is not available (the step test is); run the tilt relay test on the simulated stage, without --daemon".into(),
            ));
        }
        (Target::Leg(_), None) => plan(opts, &st, &cfg, api)?,
        (Target::Leg(_), Some(amp)) => {
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
    let world = format!("daemon at {}, its own time stamps", api.describe());
    let context = if plan.tilt.is_some() {
        log(&format!(
            "tune: daemon at {} (mode {}): temperature mode (leg loops closed), held tilt correction {} {:.4} → {:.4} µrad, recording tilt {}",
            api.describe(),
            saved.mode,
            plan.leg_name,
            plan.p0,
            plan.p0 + plan.step,
            plan.leg_name
        ));
        AnalysisContext {
            loop_name: format!(
                "tilt {} loop (held tilt correction stepped through the API, leg loops closed)",
                plan.leg_name
            ),
            world,
            control_period_s: plan.period_s,
            current: gains_from_wire(&cfg.control.tilt_loop),
            current_source: "in force (daemon)".into(),
        }
    } else {
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
        AnalysisContext {
            loop_name: format!(
                "leg {} temperature loop (every heater stepped together through the API)",
                plan.leg_name
            ),
            world,
            control_period_s: plan.period_s,
            current: gains_from_wire(&cfg.control.leg_loop),
            current_source: "in force (daemon)".into(),
        }
    };
    let mut watch = Watch {
        api,
        plan,
        rx,
        cancel,
        opts,
        last_sample: Instant::now(),
        last_status: Instant::now(),
        mode_seen: false,
    };
    let watch_tilt = watch.plan.tilt.is_some();
    let outcome = body(&mut watch, log);
    // The reader thread ends at the stream's end or when it next sends; it is not joined
    // (a silent connection may block it in a read).
    drop(watch);
    drop(reader);
    log(&format!(
        "tune: restoring {}mode {}, manual power {} W",
        if watch_tilt {
            "tilt correction 0, "
        } else {
            ""
        },
        saved.mode,
        saved.manual_power_w
    ));
    let restored = restore(api, &saved, opts.retry_pause);
    match (outcome, restored) {
        (Ok(v), Ok(done)) => Ok((v, context, done)),
        (Ok(_), Err(f)) => Err(RemoteError::Aborted {
            why: "the test finished".into(),
            saved: Box::new(saved),
            restore: Err(f),
        }),
        (Err(why), r) => Err(RemoteError::Aborted {
            why,
            saved: Box::new(saved),
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
    let i = opts.leg();
    let (p0, step) = (w.plan.p0, w.plan.step);
    let p1 = p0 + step;
    let t0 = w.hold(log)?;
    let mut phase = Phase::Settle;
    let (mut t_asked, mut t_step) = (f64::NAN, f64::NAN);
    let (mut time_s, mut output) = (Vec::new(), Vec::new());
    let mut peaks = Peaks::default();
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
            peaks.note(&s);
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
        peak_power_w: (peaks.power_w, w.plan.max_power_w),
        peak_total_power_w: (peaks.total_w, w.plan.max_total_w),
        peak_leg_temp_c: (peaks.temp_c, w.plan.max_leg_temp_c),
    })
}

/// Whether any heater is at 0 W or at its maximum, or the total at its limit: the leg
/// loops' outputs are clamped and the tilt plant is not the linear one being measured.
fn heaters_limited(s: &SampleWire, max_w: &[f64], total_w: f64) -> Option<String> {
    const TOL_W: f64 = 1e-6;
    for (k, (l, m)) in s.legs.iter().zip(max_w).enumerate() {
        if l.power_w <= TOL_W || l.power_w >= m - TOL_W {
            return Some(format!(
                "leg {}'s heater is at {:.4} W (its range 0 … {m} W)",
                k + 1,
                l.power_w
            ));
        }
    }
    let sum: f64 = s.legs.iter().map(|l| l.power_w).sum();
    (sum >= total_w - TOL_W).then(|| {
        format!("the heaters draw {sum:.4} W in total (limits.max_total_power_w = {total_w} W)")
    })
}

/// The tilt-axis step test: temperature mode, settle, baseline of the axis's measured
/// tilt, the held correction stepped on that axis, record.
fn drive_tilt(
    w: &mut Watch<'_>,
    opts: &RemoteOptions,
    log: &mut dyn FnMut(&str),
) -> Result<StepRecord, String> {
    let Some(tp) = w.plan.tilt.as_ref() else {
        return Err("internal: a tilt test without its plan".into());
    };
    let k = tp.axis;
    let c0 = tp.c0;
    let d_off = tp.d_offsets_k.clone();
    let heater_max = tp.heater_max_w.clone();
    let (step, name) = (w.plan.step, w.plan.leg_name.clone());
    let c1 = c0[k] + step;
    w.api
        .set_mode("temperature")
        .map_err(|e| format!("switching the daemon to temperature mode failed: {e}"))?;
    let t0 = loop {
        let s = w.next()?;
        if s.mode == "temperature" {
            w.mode_seen = true;
            log(&format!(
                "tune: temperature mode from daemon time {:.1} s; settling {} s",
                s.t_s, opts.settle_s
            ));
            break s.t_s;
        }
    };
    // The setpoint change that shows the step, K: the largest leg offset.
    let big = d_off.iter().fold(0.0_f64, |m, o| m.max(o.abs()));
    let mut phase = Phase::Settle;
    let (mut t_asked, mut t_step) = (f64::NAN, f64::NAN);
    let mut sp_before: Vec<f64> = Vec::new();
    let (mut time_s, mut output) = (Vec::new(), Vec::new());
    let mut peaks = Peaks::default();
    let mut limit_ticks = 0u64;
    let mut last_progress: Option<Instant> = None;
    loop {
        let s = w.next()?;
        if s.legs.len() != d_off.len() {
            return Err(format!(
                "a sample carries {} legs, the configuration {}",
                s.legs.len(),
                d_off.len()
            ));
        }
        let tilt = s.tilt_urad[k].unwrap_or(f64::NAN);
        match phase {
            Phase::Settle => {
                if s.t_s >= t0 + opts.settle_s {
                    phase = Phase::Baseline;
                }
            }
            Phase::Baseline => {
                if s.t_s >= t0 + opts.settle_s + opts.baseline_s {
                    if let Some(why) = heaters_limited(&s, &heater_max, w.plan.max_total_w) {
                        return Err(format!(
                            "{why} at the end of the baseline: the leg loops could not follow a tilt step; raise the leg bias (stiltctl set bias) so that every heater sits inside its range"
                        ));
                    }
                    let mut c = [None, None];
                    c[k] = Some(c1);
                    w.api.set_tilt_correction(c).map_err(|e| {
                        format!(
                            "stepping the held tilt correction on {name} to {c1} µrad failed: {e}"
                        )
                    })?;
                    t_asked = s.t_s;
                    sp_before = s.legs.iter().map(|l| l.setpoint_c).collect();
                    phase = Phase::Stepping;
                    log(&format!(
                        "tune: held tilt correction on {name} → {c1:.4} µrad asked at daemon time {t_asked:.1} s"
                    ));
                }
            }
            Phase::Stepping => {
                let shows = s
                    .legs
                    .iter()
                    .zip(&sp_before)
                    .zip(&d_off)
                    .all(|((l, b), o)| (l.setpoint_c - b - o).abs() <= 0.25 * big);
                if shows {
                    // The row's command goes out at the end of its tick.
                    t_step = s.t_s;
                    phase = Phase::Record;
                } else if s.t_s > t_asked + 50.0 * w.plan.period_s {
                    return Err(format!(
                        "the daemon accepted the held tilt correction {c1} µrad on {name} but the leg setpoints do not show it after 50 control periods"
                    ));
                }
            }
            Phase::Record => {}
        }
        if matches!(phase, Phase::Baseline | Phase::Stepping | Phase::Record) {
            time_s.push(s.t_s);
            output.push(tilt);
            limit_ticks +=
                u64::from(heaters_limited(&s, &heater_max, w.plan.max_total_w).is_some());
        }
        if phase == Phase::Record {
            peaks.note(&s);
        }
        let finished = phase == Phase::Record && s.t_s >= t_step + opts.record_s;
        if finished || last_progress.is_none_or(|t| t.elapsed() >= opts.progress_every) {
            last_progress = Some(Instant::now());
            let (what, done, total) = phase_progress(phase, &s, t0, t_step, opts);
            log(&format!(
                "tune: {what} {:.0} of {total:.0} s (daemon time {:.1} s): tilt {name} {}",
                done.max(0.0),
                s.t_s,
                s.tilt_urad[k].map_or("no reading".into(), |t| format!("{t:.4} µrad"))
            ));
        }
        if finished {
            break;
        }
    }
    if time_s.iter().filter(|&&t| t < t_step).count() < 5 {
        return Err("fewer than 5 baseline samples arrived: the stream skipped too much".into());
    }
    let (time_s, output, drift) = clean_record(&time_s, &output, t_step);
    if output.len() < 10 {
        return Err(format!(
            "only {} samples carry a tilt reading on {name}: is the tiltmeter reading?",
            output.len()
        ));
    }
    Ok(StepRecord {
        target: opts.target,
        input_unit: "µrad",
        output_unit: "µrad",
        input_before: c0[k],
        input_step: step,
        step_time_s: t_step,
        time_s,
        output,
        drift_per_s: drift,
        limit_ticks,
        peak_power_w: (peaks.power_w, w.plan.max_power_w),
        peak_total_power_w: (peaks.total_w, w.plan.max_total_w),
        peak_leg_temp_c: (peaks.temp_c, w.plan.max_leg_temp_c),
    })
}

fn drive_relay(
    w: &mut Watch<'_>,
    opts: &RemoteOptions,
    relay: &RelayOptions,
    eps: f64,
    log: &mut dyn FnMut(&str),
) -> Result<RelayRecord, String> {
    let i = opts.leg();
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

/// The highest heater power, total power and leg temperature seen while recording.
struct Peaks {
    power_w: f64,
    total_w: f64,
    temp_c: f64,
}

impl Default for Peaks {
    fn default() -> Self {
        Peaks {
            power_w: f64::NEG_INFINITY,
            total_w: f64::NEG_INFINITY,
            temp_c: f64::NEG_INFINITY,
        }
    }
}

impl Peaks {
    fn note(&mut self, s: &SampleWire) {
        for l in &s.legs {
            self.power_w = self.power_w.max(l.power_w);
        }
        self.total_w = self.total_w.max(s.legs.iter().map(|l| l.power_w).sum());
        self.temp_c = s
            .legs
            .iter()
            .filter_map(|l| l.temp_c)
            .fold(self.temp_c, f64::max);
    }
}

/// The phase's name, seconds done in it and its length, for a progress line.
fn phase_progress(
    phase: Phase,
    s: &SampleWire,
    t0: f64,
    t_step: f64,
    o: &RemoteOptions,
) -> (&'static str, f64, f64) {
    match phase {
        Phase::Settle => ("settling", s.t_s - t0, o.settle_s),
        Phase::Baseline | Phase::Stepping => ("baseline", s.t_s - t0 - o.settle_s, o.baseline_s),
        Phase::Record => ("recording", s.t_s - t_step, o.record_s),
    }
}

fn progress_line(
    phase: Phase,
    s: &SampleWire,
    i: usize,
    t0: f64,
    t_step: f64,
    o: &RemoteOptions,
) -> String {
    let (name, done, total) = phase_progress(phase, s, t0, t_step, o);
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
        /// Held tilt correction, µrad (temperature mode only).
        held: [f64; 2],
        heater_max_w: f64,
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
                held: [0.0; 2],
                heater_max_w: 2.0,
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
        match s.mode.as_str() {
            "manual" => s.manual_w,
            // The leg loops hold every heater mid-range.
            "temperature" => 1.0,
            _ => 0.0,
        }
    }

    /// The fake's legs: tops on a circle of 0.2 m, 120° apart (invented).
    fn fake_legs(max_w: f64) -> serde_json::Value {
        let leg = |n: &str, x: f64, y: f64| {
            json!({"name": n, "x_m": x, "y_m": y, "length_m": 0.3,
            "material": "aluminium", "cte_per_k": 23e-6, "heater_resistance_ohm": 50.0,
            "heater_max_power_w": max_w, "thermometer_channel": 0})
        };
        let r = 0.2;
        let (c, s) = (r * 0.5, r * 3.0_f64.sqrt() / 2.0);
        json!([leg("A", r, 0.0), leg("B", -c, s), leg("C", -c, -s)])
    }

    /// The fake's leg setpoints: the bias plus the geometry's offsets for the held
    /// correction in temperature mode, 24 °C otherwise.
    fn setpoints(s: &State) -> Vec<f64> {
        if s.mode != "temperature" {
            return vec![24.0; 3];
        }
        let legs: Vec<ConfigLegWire> = serde_json::from_value(fake_legs(2.0)).unwrap();
        offsets_for_tilt(&legs, s.held)
            .iter()
            .map(|o| s.bias + o)
            .collect()
    }

    struct Source {
        fake: Fake,
        t_s: f64,
        rise_k: f64,
        /// The invented tilt plant's state, µrad: gain 1, τ = `TAU_S` after the held
        /// correction.
        tilt: [f64; 2],
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
            let a = 1.0 - (-DT_S / TAU_S).exp();
            self.rise_k += (K * p - self.rise_k) * a;
            let tilt = self.tilt;
            for (t, c) in self.tilt.iter_mut().zip(s.held) {
                *t += (c - *t) * a;
            }
            let legs: Vec<_> = setpoints(&s)
                .into_iter()
                .map(|sp| json!({"temp_c": temp, "quality": "ok", "setpoint_c": sp, "power_w": p}))
                .collect();
            Ok(Some(
                serde_json::from_value(json!({
                    "tick": self.n, "t_s": self.t_s, "t_utc_ns": 0, "mode": s.mode,
                    "tilt_urad": tilt, "tilt_quality": "ok", "setpoint_urad": [0.0, 0.0],
                    "target_urad": s.target, "legs": legs
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
            let axis = |n: &str, t: f64, c: f64| {
                let out = if s.mode == "temperature" {
                    json!(c)
                } else {
                    json!(null)
                };
                json!({"axis": n, "measured_urad": 0.0, "quality": "ok",
                "age_s": 0.1, "setpoint_urad": t, "target_urad": t,
                "terms": {"p": null, "i": null, "d": null, "out": out}})
            };
            Ok(serde_json::from_value(json!({
                "version": "test", "stage_name": "fake", "started_utc_ns": 0, "now_utc_ns": 0,
                "uptime_s": 1.0, "mode": s.mode, "ready": true,
                "axes": [axis("x", s.target[0], s.held[0]), axis("y", s.target[1], s.held[1])],
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
            Ok(serde_json::from_value(json!({
                "stage_name": "fake", "legs": fake_legs(s.heater_max_w),
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
            self.change(format!("mode {mode}"), |s| {
                // A change of mode clears the held correction (as the daemon's loop).
                if s.mode != m {
                    s.held = [0.0; 2];
                }
                s.mode = m
            })
        }
        fn set_tilt_correction(&self, c: [Option<f64>; 2]) -> Result<ChangeReply, ClientError> {
            if self.state().mode != "temperature" {
                return Err(ClientError::Http {
                    status: 409,
                    code: "conflict".into(),
                    field: Some("mode".into()),
                    message: "temperature mode only".into(),
                });
            }
            let show = c.map(|v| v.map_or("-".into(), |v| v.to_string()));
            self.change(format!("correction {} {}", show[0], show[1]), move |s| {
                for (h, v) in s.held.iter_mut().zip(c) {
                    if let Some(v) = v {
                        *h = v;
                    }
                }
            })
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
            let held = self.state().held;
            Ok(Box::new(Source {
                fake: self.clone(),
                t_s: 100.0,
                rise_k: K * p,
                tilt: held,
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
            ..RemoteOptions::new(Target::Leg(0))
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
        let e = run(
            &f,
            &RemoteOptions {
                target: Target::Leg(5),
                ..opts()
            },
            false,
        )
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

    fn tilt_opts() -> RemoteOptions {
        RemoteOptions {
            target: Target::TiltAxis(0),
            ..opts()
        }
    }

    fn assert_tilt_restored(f: &Fake) {
        let s = f.state();
        assert_restored_state(&s);
        assert_eq!(s.held, [0.0, 0.0], "{:?}", s.calls);
    }

    fn assert_restored_state(s: &State) {
        assert_eq!(s.mode, "off", "{:?}", s.calls);
        assert_eq!(s.manual_w, 1.0, "{:?}", s.calls);
        assert_eq!(s.target, [0.5, -0.25]);
        assert_eq!(s.bias, 24.0);
    }

    #[test]
    fn the_tilt_offsets_are_the_geometrys() {
        // The wire's formula against the control core's Geometry, on the demo stage's legs
        // (the same least-norm pattern; geometry.rs has its own hand checks).
        let cfg = stilt_config::load_str(stilt_config::DEMO_SCENARIO, "demo").unwrap();
        let wire: Vec<ConfigLegWire> = cfg
            .legs
            .iter()
            .map(|l| ConfigLegWire {
                name: l.name.clone(),
                x_m: l.x_m,
                y_m: l.y_m,
                length_m: l.length_m,
                material: String::new(),
                cte_per_k: l.material.cte_per_k,
                heater_resistance_ohm: l.heater_resistance_ohm,
                heater_max_power_w: l.heater_max_power_w,
                thermometer_channel: l.thermometer_channel,
            })
            .collect();
        let g = crate::core::geometry::Geometry::new(&cfg.legs);
        for c in [[2.0, 0.0], [0.0, -3.5], [1.25, 0.75]] {
            let ours = offsets_for_tilt(&wire, c);
            let theirs = g.temperature_offsets_for_tilt(c);
            for (a, b) in ours.iter().zip(&theirs) {
                assert!(
                    (a - b).abs() <= 1e-12 * b.abs().max(1e-6),
                    "{ours:?} {theirs:?}"
                );
            }
            // And the pattern produces the asked tilt.
            let back = g.tilt_from_temperature_offsets(&ours);
            assert!((back[0] - c[0]).abs() < 1e-9 && (back[1] - c[1]).abs() < 1e-9);
        }
        // Collinear tops give no tilt map.
        let mut line = wire.clone();
        for (i, l) in line.iter_mut().enumerate() {
            (l.x_m, l.y_m) = (i as f64 * 0.1, 0.0);
        }
        assert!(
            offsets_for_tilt(&line, [1.0, 0.0])
                .iter()
                .all(|o| o.is_nan())
        );
    }

    #[test]
    fn a_tilt_step_test_steps_the_held_correction_fits_and_resets_it() {
        let f = Fake::new();
        let (r, lines) = run(&f, &tilt_opts(), false);
        let run = r.unwrap();
        assert_tilt_restored(&f);
        let calls = f.state().calls.clone();
        // Temperature mode, the correction stepped on x only, then back to 0 before the
        // mode and the rest.
        assert_eq!(
            calls,
            [
                "mode temperature",
                "correction 0.5 -",
                "correction 0 0",
                "manual-power 1",
                "mode off"
            ],
        );
        assert_eq!(run.record.target, Target::TiltAxis(0));
        assert_eq!((run.record.input_before, run.record.input_step), (0.0, 0.5));
        assert_eq!(run.record.limit_ticks, 0);
        let res = super::super::analyse_with(&run.context, &run.record, None).unwrap();
        // The invented tilt plant: gain 1 µrad/µrad, τ = 2 s.
        assert!((res.model.gain - 1.0).abs() < 0.05, "{:?}", res.model);
        assert!(
            (res.model.time_constant_s - TAU_S).abs() < 0.1 * TAU_S,
            "{:?}",
            res.model
        );
        assert!(res.loop_name.contains("tilt x"), "{}", res.loop_name);
        assert_eq!(res.current.kp, 8.0);
        assert!(lines.iter().any(|l| l.contains("tilt x")), "{lines:?}");
        // --apply goes to the tilt loop.
        let g = NamedGains {
            key: "simc",
            rule: "SIMC".into(),
            kp: 0.4,
            ti_s: Some(3.0),
            td_s: 0.0,
        };
        let (reply, now) = apply_proposal(&f, Target::TiltAxis(0), &g).unwrap();
        assert!(reply.detail.contains("gains Tilt"), "{}", reply.detail);
        assert_eq!((now.kp, now.ti_s), (0.4, Some(3.0)));
    }

    #[test]
    fn a_tilt_test_from_a_held_correction_steps_from_it_and_puts_it_back() {
        let f = Fake::new().with(|s| {
            s.mode = "temperature".into();
            s.held = [1.0, -0.5];
        });
        let run = run(&f, &tilt_opts(), false).0.unwrap();
        assert_eq!((run.record.input_before, run.record.input_step), (1.0, 0.5));
        let s = f.state();
        assert_eq!(
            s.calls,
            [
                "mode temperature",
                "correction 1.5 -",
                "correction 0 0",
                "manual-power 1",
                "mode temperature",
                "correction 1 -0.5"
            ]
        );
        assert_eq!((s.mode.as_str(), s.held), ("temperature", [1.0, -0.5]));
    }

    #[test]
    fn an_aborted_tilt_test_resets_the_correction_and_restores() {
        // An alarm, a lost stream, a signal: each after the step was asked or before.
        // (The step is asked after 5 settle and 20 baseline samples.)
        for (f, cancel, want, stepped) in [
            (
                Fake::new().with(|s| s.alarm_at_status_call = Some(60)),
                false,
                "alarm leg_temp_high",
                true,
            ),
            (
                Fake::new().with(|s| s.stream_ends_after = Some(40)),
                false,
                "closed its live stream",
                true,
            ),
            (Fake::new(), true, "stopped by a signal", false),
        ] {
            let e = run(&f, &tilt_opts(), cancel).0.unwrap_err().to_string();
            assert!(
                e.contains(want) && e.contains("previous state was restored"),
                "{e}"
            );
            assert_tilt_restored(&f);
            let calls = f.state().calls.clone();
            // When the correction was stepped, it was set back to 0 before the mode.
            let i = calls.iter().position(|c| c == "correction 0.5 -");
            assert_eq!(i.is_some(), stepped, "{calls:?}");
            if let Some(i) = i {
                let z = calls.iter().position(|c| c == "correction 0 0").unwrap();
                let m = calls.iter().rposition(|c| c == "mode off").unwrap();
                assert!(i < z && z < m, "{calls:?}");
            }
        }
    }

    #[test]
    fn a_tilt_step_outside_the_limits_changes_nothing() {
        let f = Fake::new();
        // tilt_output_limit_urad = 60 in the fake's configuration.
        for step in [60.5, -61.0, 0.0, f64::NAN] {
            let e = run(
                &f,
                &RemoteOptions {
                    step: Some(step),
                    ..tilt_opts()
                },
                false,
            )
            .0
            .unwrap_err();
            let m = e.to_string();
            assert!(matches!(e, RemoteError::Refused(_)), "{m}");
            assert!(
                m.contains("±60 µrad") && m.contains("nothing was changed"),
                "{m}"
            );
        }
        // From a held 59.8 µrad, +0.5 µrad would pass the limit.
        let held = Fake::new().with(|s| {
            s.mode = "temperature".into();
            s.held = [59.8, 0.0];
        });
        let e = run(&held, &tilt_opts(), false).0.unwrap_err().to_string();
        assert!(e.contains("59.8") && e.contains("±60"), "{e}");
        // A leg setpoint near the leg temperature limit (35 °C − 0.5 K margin): from a bias
        // of 34 °C, 40 µrad sets leg A above it (+1.16 K; the geometry's offsets).
        let hot = Fake::new().with(|s| s.bias = 34.0);
        let e = run(
            &hot,
            &RemoteOptions {
                step: Some(40.0),
                ..tilt_opts()
            },
            false,
        )
        .0
        .unwrap_err()
        .to_string();
        assert!(e.contains("leg A") && e.contains("max_leg_temp_c"), "{e}");
        // No relay test of a tilt axis through the daemon.
        let flag = AtomicBool::new(false);
        let e = run_remote_relay_test(
            &f,
            &tilt_opts(),
            &RelayOptions::default(),
            &flag,
            &mut |_| {},
        )
        .unwrap_err()
        .to_string();
        assert!(e.contains("relay test of a tilt axis"), "{e}");
        for x in [&f, &held, &hot] {
            assert!(x.state().calls.is_empty(), "{:?}", x.state().calls);
        }
    }

    #[test]
    fn saturated_heaters_at_the_step_stop_the_tilt_test() {
        // The fake's leg loops hold every heater at 1 W; a manual power of 2 W in
        // temperature mode is not possible, so invent it through the heater maximum:
        // with 1 W as the maximum every heater sits at its limit.
        let f = Fake::new().with(|s| s.heater_max_w = 1.0);
        let e = run(&f, &tilt_opts(), false).0.unwrap_err().to_string();
        assert!(
            e.contains("heater is at 1.0000 W") && e.contains("restored"),
            "{e}"
        );
        assert_tilt_restored(&f);
        assert!(!f.state().calls.iter().any(|c| c == "correction 0.5 -"));
    }
}

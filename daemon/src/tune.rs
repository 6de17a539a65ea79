//! `stiltd tune`'s engine: step and relay tests of one loop on the simulated stage, in
//! virtual time, and the model fit and tuning proposals drawn from them. The same tests
//! through a running daemon's HTTP API are in [`remote`]; both paths hand a
//! [`StepRecord`] to the one [`analyse_with`].
//!
//! Main items:
//! - [`Target`]: which loop — a leg's temperature loop (plant: heater power W → leg
//!   temperature K) or a tilt axis (plant: tilt-loop correction µrad → tilt µrad, with the
//!   leg loops closed, exactly what the tilt PID drives);
//! - [`StepOptions`] → [`run_step_test`] → [`StepRecord`]: warm up, hold a baseline,
//!   apply a bounded step, record;
//! - [`RelayOptions`] → [`run_relay_test`] → [`RelayRecord`]: an Åström–Hägglund relay
//!   test with bounded amplitude and hysteresis;
//! - [`analyse`] → [`TuneResult`]: FOPDT fit (Levenberg–Marquardt seeded by Smith's two-point
//!   estimate), SIMC and Ziegler–Nichols proposals, each with its rule named, the relay's
//!   Ku/Pu, and the `[control.*_loop]` TOML lines to paste; [`AnalysisContext`] says what
//!   the analysis needs to know about the loop (its name, control period, gains in force),
//!   so that the simulated and the daemon paths share it;
//! - [`leg_step_limits`]: how far a heater step may go from a power inside every limit.
//!
//! The world here is the simulated stage ([`SimStage`]) driven by the daemon's own
//! [`Controller`], stepped at the tiltmeter rate with one control tick per control period,
//! as in [`crate::sim::SimLoop`]; the test drivers sit where a person would (mode,
//! setpoints, one heater's power). Two things keep room drift out of the record:
//! - a leg test records the stepped leg's temperature *minus the mean of the other legs*
//!   (held at the same constant power, they see the same room air);
//! - every record has the straight line fitted to its pre-step baseline removed.

use serde::Serialize;
use stilt_config::{Config, LoopGains, Mode};
use stilt_hil_sim::SimStage;

use crate::analysis::fopdt::{FitQuality, FopdtFit, StepTest, fit_step};
use crate::analysis::tuning::{
    Proposal, fopdt_ultimate, relay_estimate, simc_pi, ziegler_nichols_step,
    ziegler_nichols_ultimate,
};
use crate::core::cascade::{Controller, Inputs};
use crate::core::geometry::Geometry;

pub mod remote;

/// Which loop to test.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum Target {
    /// The temperature loop of leg `i` (configuration order).
    Leg(usize),
    /// Tilt axis 0 (x) or 1 (y).
    TiltAxis(usize),
}

impl Target {
    /// Parses `leg:A` / `leg:1` (name or 1-based number) or `tilt:x` / `tilt:y`.
    pub fn parse(s: &str, cfg: &Config) -> Result<Target, String> {
        let bad = || {
            let names: Vec<&str> = cfg.legs.iter().map(|l| l.name.as_str()).collect();
            format!(
                "`{s}` is not a loop: give `tilt:x`, `tilt:y`, or `leg:NAME` / `leg:N` with a leg of this stage ({}; N = 1…{})",
                names.join(", "),
                cfg.legs.len()
            )
        };
        let (kind, what) = s.split_once(':').ok_or_else(bad)?;
        match kind {
            "tilt" => match what {
                "x" => Ok(Target::TiltAxis(0)),
                "y" => Ok(Target::TiltAxis(1)),
                _ => Err(bad()),
            },
            "leg" => {
                if let Some(i) = cfg.legs.iter().position(|l| l.name == what) {
                    return Ok(Target::Leg(i));
                }
                match what.parse::<usize>() {
                    Ok(n) if (1..=cfg.legs.len()).contains(&n) => Ok(Target::Leg(n - 1)),
                    _ => Err(bad()),
                }
            }
            _ => Err(bad()),
        }
    }

    /// A readable name: `leg A temperature loop`, `tilt x loop`.
    pub fn describe(&self, cfg: &Config) -> String {
        match *self {
            Target::Leg(i) => format!(
                "leg {} temperature loop",
                cfg.legs.get(i).map_or("?", |l| l.name.as_str())
            ),
            Target::TiltAxis(k) => format!("tilt {} loop", ["x", "y"][k.min(1)]),
        }
    }

    /// (input unit, output unit) of the plant.
    pub fn units(&self) -> (&'static str, &'static str) {
        match self {
            Target::Leg(_) => ("W", "K"),
            Target::TiltAxis(_) => ("µrad", "µrad"),
        }
    }
}

/// How a step test runs (virtual time, seconds).
#[derive(Debug, Clone, PartialEq)]
pub struct StepOptions {
    /// The loop.
    pub target: Target,
    /// Step size in the plant's input unit (W or µrad); `None`: a default kept inside
    /// every limit (a quarter of the headroom for a leg; 2 µrad for a tilt axis, small
    /// enough that the leg loops' first kick stays below the heater maximum in the demo).
    pub step: Option<f64>,
    /// Time from a cold start until the baseline begins.
    pub warmup_s: f64,
    /// Baseline before the step (its mean is y0; its line is removed as drift).
    pub baseline_s: f64,
    /// Record after the step.
    pub record_s: f64,
}

impl StepOptions {
    /// Defaults for `target`: 3 h warm-up from cold; for a leg (τ ≈ 20 min in the demo) a
    /// 30 min baseline and a 3 h record, for a tilt axis (τ ≈ 1 min) 10 min and 30 min,
    /// short enough that the floor's drift stays small beside the step.
    pub fn new(target: Target) -> Self {
        let (baseline_s, record_s) = match target {
            Target::Leg(_) => (1800.0, 3.0 * 3600.0),
            Target::TiltAxis(_) => (600.0, 1800.0),
        };
        StepOptions {
            target,
            step: None,
            warmup_s: 3.0 * 3600.0,
            baseline_s,
            record_s,
        }
    }
}

/// A recorded step test.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct StepRecord {
    /// The loop.
    pub target: Target,
    /// Plant input unit.
    pub input_unit: &'static str,
    /// Plant output unit.
    pub output_unit: &'static str,
    /// Input before the step (W of the stepped heater; 0 µrad of tilt correction).
    pub input_before: f64,
    /// The step applied.
    pub input_step: f64,
    /// When the step was applied, s on the test's clock.
    pub step_time_s: f64,
    /// Sample times (one per control tick, baseline and record), s.
    pub time_s: Vec<f64>,
    /// Plant output, baseline drift removed.
    pub output: Vec<f64>,
    /// Baseline drift removed, output unit per s.
    pub drift_per_s: f64,
    /// Ticks during baseline and record on which any controller limit acted.
    pub limit_ticks: u64,
    /// Highest heater power seen during the record, W, and the heater's maximum.
    pub peak_power_w: (f64, f64),
    /// Highest total heater power during the record, W, and the limit.
    pub peak_total_power_w: (f64, f64),
    /// Highest leg temperature during the record, °C, and the limit.
    pub peak_leg_temp_c: (f64, f64),
}

/// How a relay test runs.
#[derive(Debug, Clone, PartialEq)]
pub struct RelayOptions {
    /// Relay amplitude d in the plant's input unit; `None`: the step test's default size.
    pub amplitude: Option<f64>,
    /// Hysteresis ε in the plant's output unit; `None`: 3 mK for a leg, 0.05 µrad for tilt.
    pub hysteresis: Option<f64>,
    /// Longest relay run after warm-up, s.
    pub max_s: f64,
    /// Stop after this many full output cycles.
    pub cycles: usize,
}

impl Default for RelayOptions {
    fn default() -> Self {
        RelayOptions {
            amplitude: None,
            hysteresis: None,
            max_s: 6.0 * 3600.0,
            cycles: 8,
        }
    }
}

/// A recorded relay test.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct RelayRecord {
    /// Relay amplitude d (input unit).
    pub amplitude: f64,
    /// Hysteresis ε (output unit).
    pub hysteresis: f64,
    /// Sample times, s.
    pub time_s: Vec<f64>,
    /// Plant output relative to the operating point.
    pub output: Vec<f64>,
    /// Relay output (plant input relative to the operating point).
    pub relay: Vec<f64>,
}

/// Why a test could not run or be evaluated.
#[derive(Debug, thiserror::Error)]
pub enum TuneError {
    /// The options cannot be used (names what is allowed).
    #[error("{0}")]
    Options(String),
    /// The analysis of the record failed.
    #[error("analysis: {0}")]
    Analysis(#[from] crate::analysis::AnalysisError),
}

/// The simulated stage under the daemon's controller, one control tick at a time.
struct World {
    cfg: Config,
    stage: SimStage,
    ctl: Controller,
    geometry: Geometry,
    sample_dt: f64,
    samples_per_tick: u64,
    sample: u64,
    /// Extra power per leg added to the controller's commands (leg step and relay).
    extra_w: Vec<f64>,
    last_tilt: Option<[f64; 2]>,
}

/// What one tick saw and did.
struct Obs {
    t_s: f64,
    tilt_urad: Option<[f64; 2]>,
    temps_c: Vec<f64>,
    power_w: Vec<f64>,
    limited: bool,
}

impl World {
    fn new(cfg: &Config, mode: Mode) -> Self {
        let mut cfg = cfg.clone();
        cfg.control.mode = mode;
        let ratio = (cfg.tiltmeter.rate_hz / cfg.control.rate_hz)
            .round()
            .max(1.0) as u64;
        World {
            stage: SimStage::new(&cfg),
            ctl: Controller::new(&cfg),
            geometry: Geometry::new(&cfg.legs),
            sample_dt: 1.0 / cfg.tiltmeter.rate_hz,
            samples_per_tick: ratio,
            sample: 0,
            extra_w: vec![0.0; cfg.legs.len()],
            last_tilt: None,
            cfg,
        }
    }

    fn time_s(&self) -> f64 {
        self.sample as f64 * self.sample_dt
    }

    fn tick(&mut self) -> Obs {
        let mut acc = ([0.0; 2], 0u32);
        for _ in 0..self.samples_per_tick {
            self.stage.advance(self.sample_dt);
            self.sample += 1;
            let r = self.stage.read_tilt();
            if r.in_range {
                let c = self.cfg.tiltmeter.calibrate(r.raw);
                acc.0[0] += c[0];
                acc.0[1] += c[1];
                acc.1 += 1;
            }
        }
        let tilt = (acc.1 > 0).then(|| [acc.0[0] / f64::from(acc.1), acc.0[1] / f64::from(acc.1)]);
        self.last_tilt = tilt.or(self.last_tilt);
        let temps: Vec<Option<f64>> = self
            .cfg
            .legs
            .iter()
            .map(|l| self.stage.read_thermometer(l.thermometer_channel))
            .collect();
        let t = self.time_s();
        let out = self.ctl.step(&Inputs {
            now_s: t,
            tilt_urad: tilt,
            leg_temp_c: temps.clone(),
        });
        let mut power = out.power_w.clone();
        for (i, p) in power.iter_mut().enumerate() {
            let max = self.cfg.legs[i].heater_max_power_w;
            *p = (*p + self.extra_w[i]).clamp(0.0, max);
            self.stage.set_heater_power(i, *p);
        }
        Obs {
            t_s: t,
            tilt_urad: tilt,
            temps_c: temps.iter().map(|x| x.unwrap_or(f64::NAN)).collect(),
            power_w: power,
            limited: out.limits.any(),
        }
    }

    /// The plant output the test records for `target`.
    fn output(&self, target: Target, o: &Obs) -> f64 {
        match target {
            Target::Leg(i) => {
                let others: Vec<f64> = o
                    .temps_c
                    .iter()
                    .enumerate()
                    .filter(|(j, _)| *j != i)
                    .map(|(_, t)| *t)
                    .collect();
                let mean = others.iter().sum::<f64>() / others.len().max(1) as f64;
                o.temps_c[i] - mean
            }
            Target::TiltAxis(k) => o.tilt_urad.map_or(f64::NAN, |t| t[k]),
        }
    }

    fn run_until(&mut self, t_end: f64, progress: &mut dyn FnMut(f64)) {
        while self.time_s() + 1e-9 < t_end {
            self.tick();
            if self.sample % (600 * self.samples_per_tick) == 0 {
                progress(self.time_s());
            }
        }
    }
}

/// How far a heater step may go from `p0` W on every one of `n_legs` heaters at once
/// (`n_legs = 1` for one heater with the others held elsewhere): returns (down, up), both ≥ 0,
/// keeping each heater within 0 … `heater_max_w` and the sum within `total_max_w`
/// (`others_w` is what the other heaters draw meanwhile).
pub fn leg_step_limits(
    p0: f64,
    heater_max_w: f64,
    stepped: usize,
    others_w: f64,
    total_max_w: f64,
) -> (f64, f64) {
    let n = stepped.max(1) as f64;
    let up = (heater_max_w - p0).min((total_max_w - others_w - n * p0) / n);
    (p0.max(0.0), up.max(0.0))
}

/// The default step size and the checks that keep it inside every limit.
fn checked_step(cfg: &Config, target: Target, step: Option<f64>) -> Result<f64, TuneError> {
    match target {
        Target::Leg(i) => {
            let leg = cfg
                .legs
                .get(i)
                .ok_or_else(|| TuneError::Options(format!("no leg {}", i + 1)))?;
            let n = cfg.legs.len() as f64;
            let p0 = cfg.control.manual_power_w.min(leg.heater_max_power_w);
            // One heater stepped, the others held at p0.
            let (down, up) = leg_step_limits(
                p0,
                leg.heater_max_power_w,
                1,
                p0 * (n - 1.0),
                cfg.limits.max_total_power_w,
            );
            let d = step.unwrap_or(0.25 * up.max(0.0));
            if !d.is_finite() || d == 0.0 || d > up + 1e-12 || -d > down + 1e-12 {
                return Err(TuneError::Options(format!(
                    "a heater step of {d} W is not allowed for leg {}: from the manual power {p0} W it must be non-zero and between −{down} W and +{up:.3} W (heater maximum {} W, total limit {} W for {} legs)",
                    leg.name,
                    leg.heater_max_power_w,
                    cfg.limits.max_total_power_w,
                    cfg.legs.len()
                )));
            }
            Ok(d)
        }
        Target::TiltAxis(k) => {
            if k > 1 {
                return Err(TuneError::Options(format!(
                    "no tilt axis {k}: the axes are 0 (x) and 1 (y)"
                )));
            }
            let lim = cfg.control.tilt_output_limit_urad;
            let d = step.unwrap_or(2.0_f64.min(0.5 * lim));
            if !d.is_finite() || d == 0.0 || d.abs() > lim {
                return Err(TuneError::Options(format!(
                    "a tilt correction step of {d} µrad is not allowed: it must be non-zero and at most the tilt loop's output limit, ±{lim} µrad"
                )));
            }
            Ok(d)
        }
    }
}

fn check_durations(o: &StepOptions) -> Result<(), TuneError> {
    check_durations_min(o, 60.0, 300.0)
}

/// The step test's durations, with the shortest baseline and record allowed.
pub(crate) fn check_durations_min(
    o: &StepOptions,
    min_baseline_s: f64,
    min_record_s: f64,
) -> Result<(), TuneError> {
    for (name, v, min) in [
        ("warm-up", o.warmup_s, 0.0),
        ("baseline", o.baseline_s, min_baseline_s),
        ("record", o.record_s, min_record_s),
    ] {
        if !(v.is_finite() && v >= min && v <= 30.0 * 86_400.0) {
            return Err(TuneError::Options(format!(
                "the {name} time of {v} s is not allowed: give {min} s to 30 days"
            )));
        }
    }
    Ok(())
}

/// Sets the world to its test mode and warms it up; returns the world.
fn warmed_world(
    cfg: &Config,
    target: Target,
    warmup_s: f64,
    progress: &mut dyn FnMut(f64),
) -> World {
    let mode = match target {
        Target::Leg(_) => Mode::Manual,
        Target::TiltAxis(_) => Mode::Temperature,
    };
    let mut w = World::new(cfg, mode);
    w.run_until(warmup_s, progress);
    w
}

/// Removes the least-squares line of the baseline (t < t_step) from the whole record;
/// returns the slope removed.
fn remove_baseline_drift(t: &[f64], y: &mut [f64], t_step: f64) -> f64 {
    let mut reg = crate::analysis::stats::LinearRegression::new();
    for (&ti, &yi) in t.iter().zip(y.iter()) {
        if ti < t_step && yi.is_finite() {
            let _ = reg.push(ti - t_step, yi);
        }
    }
    let Ok(fit) = reg.fit() else { return 0.0 };
    for (ti, yi) in t.iter().zip(y.iter_mut()) {
        *yi -= fit.slope * (ti - t_step);
    }
    fit.slope
}

/// Drops the samples with no usable output and removes the baseline's straight line
/// (samples before `t_step`); returns times, outputs and the slope removed.
pub(crate) fn clean_record(
    time_s: &[f64],
    output: &[f64],
    t_step: f64,
) -> (Vec<f64>, Vec<f64>, f64) {
    // Samples with no usable output cannot be fitted: drop them.
    let keep: Vec<usize> = (0..output.len().min(time_s.len()))
        .filter(|&i| output[i].is_finite() && time_s[i].is_finite())
        .collect();
    let t: Vec<f64> = keep.iter().map(|&i| time_s[i]).collect();
    let mut y: Vec<f64> = keep.iter().map(|&i| output[i]).collect();
    let drift = remove_baseline_drift(&t, &mut y, t_step);
    (t, y, drift)
}

/// Runs a step test (see the module doc). `progress(t, total)` is called now and then
/// with virtual seconds done.
pub fn run_step_test(
    cfg: &Config,
    opts: &StepOptions,
    progress: &mut dyn FnMut(f64, f64),
) -> Result<StepRecord, TuneError> {
    check_durations(opts)?;
    let d = checked_step(cfg, opts.target, opts.step)?;
    let total = opts.warmup_s + opts.baseline_s + opts.record_s;
    let mut prog = |t: f64| progress(t, total);
    let mut w = warmed_world(cfg, opts.target, opts.warmup_s, &mut prog);
    let t_step = opts.warmup_s + opts.baseline_s;
    let (mut time_s, mut output) = (Vec::new(), Vec::new());
    let mut limit_ticks = 0u64;
    let max_leg = |i: usize| cfg.legs[i].heater_max_power_w;
    let mut peak_p = (f64::NEG_INFINITY, 0.0);
    let mut peak_total = f64::NEG_INFINITY;
    let mut peak_temp = f64::NEG_INFINITY;
    let input_before = match opts.target {
        Target::Leg(i) => cfg.control.manual_power_w.min(max_leg(i)),
        Target::TiltAxis(_) => 0.0,
    };
    let mut stepped = false;
    while w.time_s() + 1e-9 < total {
        if !stepped && w.time_s() + 1e-9 >= t_step {
            stepped = true;
            match opts.target {
                Target::Leg(i) => w.extra_w[i] = d,
                Target::TiltAxis(k) => {
                    let mut c = [0.0; 2];
                    c[k] = d;
                    let off = w.geometry.temperature_offsets_for_tilt(c);
                    let sp: Vec<f64> = (0..cfg.legs.len())
                        .map(|i| w.ctl.control().leg_bias_c + off[i])
                        .collect();
                    w.ctl.step_leg_setpoints_c(&sp);
                }
            }
        }
        let o = w.tick();
        time_s.push(o.t_s);
        output.push(w.output(opts.target, &o));
        limit_ticks += u64::from(o.limited);
        if o.t_s >= t_step {
            for (i, p) in o.power_w.iter().enumerate() {
                if *p > peak_p.0 {
                    peak_p = (*p, max_leg(i));
                }
            }
            peak_total = peak_total.max(o.power_w.iter().sum());
            peak_temp = o.temps_c.iter().copied().fold(peak_temp, f64::max);
        }
        if w.sample % (600 * w.samples_per_tick) == 0 {
            progress(w.time_s(), total);
        }
        if peak_temp > cfg.limits.max_leg_temp_c {
            return Err(TuneError::Options(format!(
                "the step drove a leg to {peak_temp:.2} °C, above max_leg_temp_c = {} °C; test stopped: use a smaller step",
                cfg.limits.max_leg_temp_c
            )));
        }
    }
    let (time_s, output, drift) = clean_record(&time_s, &output, t_step + cfg.control.period_s());
    let (iu, ou) = opts.target.units();
    // In manual mode the leg limits are the test's own: count only limits in auto modes.
    let limit_ticks = match opts.target {
        Target::Leg(_) => 0,
        Target::TiltAxis(_) => limit_ticks,
    };
    Ok(StepRecord {
        target: opts.target,
        input_unit: iu,
        output_unit: ou,
        input_before,
        input_step: d,
        // The tick after the change computes the new command and applies it at its end,
        // so the stage sees the step one control period after `t_step`.
        step_time_s: t_step + cfg.control.period_s(),
        time_s,
        output,
        drift_per_s: drift,
        limit_ticks,
        peak_power_w: peak_p,
        peak_total_power_w: (peak_total, cfg.limits.max_total_power_w),
        peak_leg_temp_c: (peak_temp, cfg.limits.max_leg_temp_c),
    })
}

/// Runs a relay test after the same warm-up as a step test.
pub fn run_relay_test(
    cfg: &Config,
    target: Target,
    warmup_s: f64,
    opts: &RelayOptions,
    progress: &mut dyn FnMut(f64, f64),
) -> Result<RelayRecord, TuneError> {
    let d = checked_step(cfg, target, opts.amplitude)?.abs();
    if let Target::Leg(i) = target {
        // The relay swings both ways: it must also fit below the manual power.
        let p0 = cfg
            .control
            .manual_power_w
            .min(cfg.legs[i].heater_max_power_w);
        if d > p0 {
            return Err(TuneError::Options(format!(
                "a relay amplitude of {d} W is not allowed: the heater cannot go below 0 W from the manual power {p0} W"
            )));
        }
    }
    let eps = opts.hysteresis.unwrap_or(match target {
        Target::Leg(_) => 0.003,
        Target::TiltAxis(_) => 0.05,
    });
    if !(eps.is_finite() && eps >= 0.0) {
        return Err(TuneError::Options(format!(
            "a hysteresis of {eps} is not allowed: give a finite value ≥ 0"
        )));
    }
    if !(opts.max_s.is_finite() && opts.max_s >= 600.0 && opts.max_s <= 30.0 * 86_400.0) {
        return Err(TuneError::Options(format!(
            "a relay time of {} s is not allowed: give 600 s to 30 days",
            opts.max_s
        )));
    }
    let total = warmup_s + opts.max_s;
    let mut prog = |t: f64| progress(t, total);
    let mut w = warmed_world(cfg, target, warmup_s, &mut prog);
    // Operating point: the mean output over one minute before the relay starts.
    let mut r = 0.0;
    for _ in 0..60 {
        let o = w.tick();
        r += w.output(target, &o) / 60.0;
    }
    let base_sp: Vec<f64> = vec![w.ctl.control().leg_bias_c; cfg.legs.len()];
    let mut u = d;
    let (mut time_s, mut output, mut relay) = (Vec::new(), Vec::new(), Vec::new());
    // Relay switches (two per cycle; hysteresis makes them immune to noise): stop after the
    // asked cycles plus the two the evaluation skips as transient, and one spare.
    let mut switches = 0usize;
    let wanted = 2 * (opts.cycles + 3);
    let apply = |w: &mut World, u: f64| match target {
        Target::Leg(i) => w.extra_w[i] = u,
        Target::TiltAxis(k) => {
            let mut c = [0.0; 2];
            c[k] = u;
            let off = w.geometry.temperature_offsets_for_tilt(c);
            let sp: Vec<f64> = base_sp.iter().zip(&off).map(|(b, o)| b + o).collect();
            w.ctl.step_leg_setpoints_c(&sp);
        }
    };
    apply(&mut w, u);
    while w.time_s() < total && switches < wanted {
        let o = w.tick();
        let y = w.output(target, &o) - r;
        if !y.is_finite() {
            continue;
        }
        time_s.push(o.t_s);
        output.push(y);
        relay.push(u);
        // Relay on the error e = r − y (direct acting plant, K > 0): heat when below.
        let e = -y;
        if e > eps && u < 0.0 {
            u = d;
            switches += 1;
        } else if e < -eps && u > 0.0 {
            u = -d;
            switches += 1;
        }
        apply(&mut w, u);
        if w.sample % (600 * w.samples_per_tick) == 0 {
            progress(w.time_s(), total);
        }
    }
    Ok(RelayRecord {
        amplitude: d,
        hysteresis: eps,
        time_s,
        output,
        relay,
    })
}

/// One proposal as printed and written to JSON.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct NamedGains {
    /// Short name for `--apply`: `simc`, `zn-p`, `zn-pi`, `zn-pid`, `relay-p`, `relay-pi`,
    /// `relay-pid` (`current` for the gains in force).
    pub key: &'static str,
    /// The rule and its source.
    pub rule: String,
    /// Proportional gain Kc (output unit of the controller per unit of error).
    pub kp: f64,
    /// Integral time, s (`None`: no integral action).
    pub ti_s: Option<f64>,
    /// Derivative time, s.
    pub td_s: f64,
}

impl NamedGains {
    fn from_proposal(p: &Proposal, note: &str, key: &'static str) -> Self {
        NamedGains {
            key,
            rule: format!("{}{note}", p.rule),
            kp: p.gains.kc,
            ti_s: p.gains.ti_s.is_finite().then_some(p.gains.ti_s),
            td_s: p.gains.td_s,
        }
    }
}

/// The fitted model as reported.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct ModelReport {
    /// Gain K, output unit per input unit.
    pub gain: f64,
    /// Standard error of K.
    pub gain_std_err: f64,
    /// Time constant τ, s.
    pub time_constant_s: f64,
    /// Standard error of τ, s.
    pub time_constant_std_err_s: f64,
    /// Dead time θ, s.
    pub dead_time_s: f64,
    /// Standard error of θ, s.
    pub dead_time_std_err_s: f64,
    /// RMS of the residuals after the step, output unit.
    pub residual_rms: f64,
    /// R² after the step.
    pub r_squared: f64,
    /// `good`, `fair` or `poor`.
    pub quality: &'static str,
    /// Whether the record covers at least 3τ after the dead time.
    pub settled: bool,
    /// The two-point (Smith 1972) seed: K, τ, θ.
    pub seed: [f64; 3],
}

/// The relay test's estimate.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct RelayReport {
    /// Relay amplitude d, input unit.
    pub amplitude: f64,
    /// Hysteresis ε, output unit.
    pub hysteresis: f64,
    /// Output amplitude a, output unit.
    pub output_amplitude: f64,
    /// Full cycles used.
    pub cycles: usize,
    /// Ultimate gain Ku = 4d/(π√(a² − ε²)) (Åström & Hägglund 1984).
    pub ultimate_gain: f64,
    /// Ultimate period Pu, s.
    pub ultimate_period_s: f64,
    /// Ku and Pu the fitted FOPDT model predicts, for comparison.
    pub model_ultimate: Option<(f64, f64)>,
}

/// Everything `stiltd tune` prints.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct TuneResult {
    /// The loop, in words.
    pub loop_name: String,
    /// Where the test ran, in words.
    pub world: String,
    /// The loop.
    pub target: Target,
    /// Plant input and output units.
    pub units: (&'static str, &'static str),
    /// Input before the step and the step.
    pub input_before: f64,
    /// The step applied.
    pub input_step: f64,
    /// Baseline drift removed, output unit per s.
    pub drift_per_s: f64,
    /// Samples fitted.
    pub samples: usize,
    /// Ticks on which a controller limit acted during the test (0 = the test stayed linear).
    pub limit_ticks: u64,
    /// Peak heater power and its maximum, W.
    pub peak_power_w: (f64, f64),
    /// Peak total power and its limit, W.
    pub peak_total_power_w: (f64, f64),
    /// Peak leg temperature and its limit, °C.
    pub peak_leg_temp_c: (f64, f64),
    /// The FOPDT fit.
    pub model: ModelReport,
    /// Gains proposed, each with its rule.
    pub proposals: Vec<NamedGains>,
    /// The relay test, if run.
    pub relay: Option<RelayReport>,
    /// The gains in force now (from the configuration).
    pub current: NamedGains,
    /// The recommended gains as TOML lines to paste into the configuration.
    pub toml: String,
}

fn quality_name(q: FitQuality) -> &'static str {
    match q {
        FitQuality::Good => "good",
        FitQuality::Fair => "fair",
        FitQuality::Poor => "poor",
    }
}

/// The recommended proposal (SIMC PI) as `LoopGains`, keeping the configuration's other
/// settings (setpoint weight, filter, tracking, slew).
pub fn recommended_gains(r: &TuneResult, current: &LoopGains) -> LoopGains {
    gains_of(&r.proposals[0], current)
}

/// A proposal as `LoopGains`, keeping `current`'s other settings.
pub fn gains_of(p: &NamedGains, current: &LoopGains) -> LoopGains {
    LoopGains {
        kp: p.kp,
        ti_s: p.ti_s,
        td_s: p.td_s,
        ..*current
    }
}

fn current_gains(cfg: &Config, target: Target) -> LoopGains {
    match target {
        Target::Leg(_) => cfg.control.leg_loop,
        Target::TiltAxis(_) => cfg.control.tilt_loop,
    }
}

/// What the analysis needs to know about the loop besides its record.
#[derive(Debug, Clone, PartialEq)]
pub struct AnalysisContext {
    /// The loop, in words.
    pub loop_name: String,
    /// Where the test ran, in words (the header of the printout).
    pub world: String,
    /// The control period, s (SIMC's τc is at least one period).
    pub control_period_s: f64,
    /// The gains in force for this loop.
    pub current: LoopGains,
    /// Where those gains come from, in words.
    pub current_source: String,
}

impl AnalysisContext {
    /// The context of a test on the simulated stage of `cfg`.
    pub fn simulated(cfg: &Config, target: Target) -> Self {
        AnalysisContext {
            loop_name: target.describe(cfg),
            world: "simulated stage, virtual time".into(),
            control_period_s: cfg.control.period_s(),
            current: current_gains(cfg, target),
            current_source: "in force (configuration)".into(),
        }
    }
}

/// Fits the step record and proposes gains; adds the relay estimate when given. The
/// simulated path's shorthand for [`analyse_with`].
pub fn analyse(
    cfg: &Config,
    rec: &StepRecord,
    relay: Option<&RelayRecord>,
) -> Result<TuneResult, TuneError> {
    analyse_with(&AnalysisContext::simulated(cfg, rec.target), rec, relay)
}

/// Fits the step record and proposes gains; adds the relay estimate when given.
pub fn analyse_with(
    ctx: &AnalysisContext,
    rec: &StepRecord,
    relay: Option<&RelayRecord>,
) -> Result<TuneResult, TuneError> {
    let fit: FopdtFit = fit_step(&StepTest {
        time_s: &rec.time_s,
        output: &rec.output,
        step_time_s: rec.step_time_s,
        input_step: rec.input_step,
    })?;
    let m = fit.model;
    // SIMC's "tight control" τc = θ, but not below one control period: a digital loop adds
    // about that much delay of its own (common practice).
    let period = ctx.control_period_s;
    let simc = if m.dead_time_s >= period {
        NamedGains::from_proposal(&simc_pi(&m, None)?, "", "simc")
    } else {
        NamedGains::from_proposal(
            &simc_pi(&m, Some(period))?,
            &format!(" = one control period, {period} s (theta < period)"),
            "simc",
        )
    };
    let mut proposals = vec![simc];
    match ziegler_nichols_step(&m) {
        Ok(zn) => proposals.extend(
            zn.iter()
                .zip(["zn-p", "zn-pi", "zn-pid"])
                .map(|(p, k)| NamedGains::from_proposal(p, "", k)),
        ),
        Err(e) => proposals.push(NamedGains {
            key: "zn",
            rule: format!("Ziegler–Nichols step response (1942): not applicable: {e}"),
            kp: f64::NAN,
            ti_s: None,
            td_s: 0.0,
        }),
    }
    let relay_report = match relay {
        Some(rr) => {
            let est = relay_estimate(&rr.time_s, &rr.output, &rr.relay, rr.hysteresis, 2)?;
            let zn = ziegler_nichols_ultimate(est.ultimate_gain, est.ultimate_period_s)?;
            proposals.extend(
                zn.iter()
                    .zip(["relay-p", "relay-pi", "relay-pid"])
                    .map(|(p, k)| NamedGains::from_proposal(p, ", from the relay test", k)),
            );
            Some(RelayReport {
                amplitude: rr.amplitude,
                hysteresis: rr.hysteresis,
                output_amplitude: est.output_amplitude,
                cycles: est.cycles,
                ultimate_gain: est.ultimate_gain,
                ultimate_period_s: est.ultimate_period_s,
                model_ultimate: fopdt_ultimate(&m).ok(),
            })
        }
        None => None,
    };
    let cur = ctx.current;
    let current = NamedGains {
        key: "current",
        rule: ctx.current_source.clone(),
        kp: cur.kp,
        ti_s: cur.ti_s,
        td_s: cur.td_s,
    };
    let mut result = TuneResult {
        loop_name: ctx.loop_name.clone(),
        world: ctx.world.clone(),
        target: rec.target,
        units: rec.target.units(),
        input_before: rec.input_before,
        input_step: rec.input_step,
        drift_per_s: rec.drift_per_s,
        samples: rec.time_s.len(),
        limit_ticks: rec.limit_ticks,
        peak_power_w: rec.peak_power_w,
        peak_total_power_w: rec.peak_total_power_w,
        peak_leg_temp_c: rec.peak_leg_temp_c,
        model: ModelReport {
            gain: m.gain,
            gain_std_err: fit.gain_std_err,
            time_constant_s: m.time_constant_s,
            time_constant_std_err_s: fit.time_constant_std_err_s,
            dead_time_s: m.dead_time_s,
            dead_time_std_err_s: fit.dead_time_std_err_s,
            residual_rms: fit.residual_rms,
            r_squared: fit.r_squared,
            quality: quality_name(fit.quality),
            settled: fit.settled,
            seed: [
                fit.seed.model.gain,
                fit.seed.model.time_constant_s,
                fit.seed.model.dead_time_s,
            ],
        },
        proposals,
        relay: relay_report,
        current,
        toml: String::new(),
    };
    result.toml = toml_lines(&result, &cur);
    Ok(result)
}

/// The proposal called `key` (see [`NamedGains::key`]), or an error listing the keys.
pub fn find_proposal<'a>(r: &'a TuneResult, key: &str) -> Result<&'a NamedGains, String> {
    let usable = |p: &&NamedGains| p.kp.is_finite();
    r.proposals
        .iter()
        .filter(usable)
        .find(|p| p.key == key)
        .ok_or_else(|| {
            let keys: Vec<&str> = r.proposals.iter().filter(usable).map(|p| p.key).collect();
            format!(
                "no proposal `{key}` in this result; choose one of: {}{}",
                keys.join(", "),
                if r.relay.is_none() {
                    " (the relay-* rules need --relay)"
                } else {
                    ""
                }
            )
        })
}

/// The recommended gains as the configuration's TOML lines.
fn toml_lines(r: &TuneResult, current: &LoopGains) -> String {
    toml_for(r.target, &gains_of(&r.proposals[0], current))
}

/// `g` as the configuration's TOML lines for `target`'s loop.
pub fn toml_for(target: Target, g: &LoopGains) -> String {
    let (table, kp_key) = match target {
        Target::Leg(_) => ("control.leg_loop", "kp_w_per_k"),
        Target::TiltAxis(_) => ("control.tilt_loop", "kp_urad_per_urad"),
    };
    let mut s = format!("[{table}]\n{kp_key} = {}\n", sig(g.kp));
    if let Some(ti) = g.ti_s {
        s.push_str(&format!("ti_s = {}\n", sig(ti)));
    }
    s.push_str(&format!("td_s = {}\n", sig(g.td_s)));
    s
}

/// Four significant digits, as TOML accepts it.
fn sig(x: f64) -> String {
    if x == 0.0 || !x.is_finite() {
        return format!("{x:?}");
    }
    let digits = (3 - x.abs().log10().floor() as i32).max(0) as usize;
    let s = format!("{x:.digits$}");
    if s.contains('.') { s } else { format!("{s}.0") }
}

/// The result as a readable table.
pub fn render(r: &TuneResult) -> String {
    use std::fmt::Write;
    let (iu, ou) = r.units;
    let mut o = String::new();
    let _ = writeln!(o, "stiltd tune — {} ({})", r.loop_name, r.world);
    let _ = writeln!(
        o,
        "step: {} {iu} → {} {iu} (Δ = {} {iu}); {} samples; baseline drift removed {:.3e} {ou}/s",
        sig(r.input_before),
        sig(r.input_before + r.input_step),
        sig(r.input_step),
        r.samples,
        r.drift_per_s
    );
    let _ = writeln!(
        o,
        "limits: peak heater {:.3} of {} W, peak total {:.3} of {} W, peak leg {:.2} of {} °C, limit ticks {}",
        r.peak_power_w.0,
        r.peak_power_w.1,
        r.peak_total_power_w.0,
        r.peak_total_power_w.1,
        r.peak_leg_temp_c.0,
        r.peak_leg_temp_c.1,
        r.limit_ticks
    );
    let m = &r.model;
    let _ = writeln!(o);
    let _ = writeln!(
        o,
        "FOPDT model (least squares, seeded by Smith's two-point estimate):"
    );
    let _ = writeln!(
        o,
        "  gain K         {:>12} ± {:<10} {ou}/{iu}   (two-point seed {})",
        sig(m.gain),
        sig(m.gain_std_err),
        sig(m.seed[0])
    );
    let _ = writeln!(
        o,
        "  time constant  {:>12} ± {:<10} s        (seed {})",
        sig(m.time_constant_s),
        sig(m.time_constant_std_err_s),
        sig(m.seed[1])
    );
    let _ = writeln!(
        o,
        "  dead time      {:>12} ± {:<10} s        (seed {})",
        sig(m.dead_time_s),
        sig(m.dead_time_std_err_s),
        sig(m.seed[2])
    );
    let _ = writeln!(
        o,
        "  residual RMS {} {ou}, R² {:.5}, quality {}{}",
        sig(m.residual_rms),
        m.r_squared,
        m.quality,
        if m.settled {
            ""
        } else {
            " (record shorter than 3τ: not settled)"
        }
    );
    if let Some(rl) = &r.relay {
        let _ = writeln!(o);
        let _ = writeln!(
            o,
            "relay test (Åström–Hägglund 1984): d = {} {iu}, ε = {} {ou}, a = {} {ou}, {} cycles",
            sig(rl.amplitude),
            sig(rl.hysteresis),
            sig(rl.output_amplitude),
            rl.cycles
        );
        let _ = writeln!(
            o,
            "  Ku = {} {iu}/{ou}, Pu = {} s{}",
            sig(rl.ultimate_gain),
            sig(rl.ultimate_period_s),
            rl.model_ultimate.map_or(String::new(), |(k, p)| format!(
                "   (the FOPDT model predicts Ku = {}, Pu = {} s)",
                sig(k),
                sig(p)
            ))
        );
    }
    let _ = writeln!(o);
    let _ = writeln!(
        o,
        "{:>12} {:>12} {:>10}   rule",
        format!("Kp {iu}/{ou}"),
        "Ti s",
        "Td s"
    );
    for p in std::iter::once(&r.current).chain(&r.proposals) {
        let _ = writeln!(
            o,
            "{:>12} {:>12} {:>10}   {}",
            sig(p.kp),
            p.ti_s.map_or("none".into(), sig),
            sig(p.td_s),
            p.rule
        );
    }
    let _ = writeln!(o);
    let _ = writeln!(
        o,
        "Recommended: the SIMC PI line (`--apply simc` with `--daemon` puts it into a running daemon);"
    );
    let _ = writeln!(
        o,
        "to keep it across restarts, paste these lines into the configuration (they replace the keys shown):"
    );
    let _ = writeln!(o);
    o.push_str(&r.toml);
    o
}

#[cfg(test)]
mod tests {
    use super::*;

    fn demo() -> Config {
        stilt_config::load_str(stilt_config::DEMO_SCENARIO, "demo").unwrap()
    }

    #[test]
    fn targets_parse_and_errors_name_the_choices() {
        let cfg = demo();
        assert_eq!(Target::parse("tilt:x", &cfg), Ok(Target::TiltAxis(0)));
        assert_eq!(Target::parse("leg:B", &cfg), Ok(Target::Leg(1)));
        assert_eq!(Target::parse("leg:3", &cfg), Ok(Target::Leg(2)));
        for bad in ["", "leg:4", "leg:Z", "tilt:z", "pressure:1"] {
            let e = Target::parse(bad, &cfg).unwrap_err();
            assert!(e.contains("tilt:x") && e.contains("A, B, C"), "{bad}: {e}");
        }
    }

    #[test]
    fn steps_outside_the_limits_are_refused() {
        let cfg = demo();
        // Demo: 1 W manual, 2 W heaters, 6 W total → at most +1 W up.
        assert!(checked_step(&cfg, Target::Leg(0), Some(1.5)).is_err());
        assert!(checked_step(&cfg, Target::Leg(0), Some(0.0)).is_err());
        assert!(checked_step(&cfg, Target::Leg(0), Some(f64::NAN)).is_err());
        assert_eq!(checked_step(&cfg, Target::Leg(0), None).unwrap(), 0.25);
        assert!(checked_step(&cfg, Target::TiltAxis(0), Some(100.0)).is_err());
        assert!(checked_step(&cfg, Target::TiltAxis(2), None).is_err());
        assert!(checked_step(&cfg, Target::Leg(3), None).is_err());
        assert_eq!(checked_step(&cfg, Target::TiltAxis(1), None).unwrap(), 2.0);
    }

    #[test]
    fn sig_writes_toml_numbers() {
        assert_eq!(sig(12.3456), "12.35");
        assert_eq!(sig(0.0012345), "0.001234");
        assert_eq!(sig(1500.0), "1500.0");
        assert_eq!(sig(0.0), "0.0");
    }
}

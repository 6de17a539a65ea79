//! `stiltd report`: what a recorded run says about the stage, computed in one streaming
//! pass over its segments (memory does not grow with the length of the run).
//!
//! Main items: [`ReportOptions`], [`compute`] → [`Report`] (serialisable to JSON), the
//! table [`render`], and the plots in [`plot`] (PNG and SVG). Bounded series for plots
//! come from [`series::Decimator`].
//!
//! What is computed, and from which rows:
//! - per tilt axis, from every usable tiltmeter row: mean, RMS, standard deviation and
//!   peak-to-peak (µrad); the amplitude spectral density by Welch's method (periodic Hann
//!   window, 50 % overlap, one-sided, in **rad/√Hz**: the recording holds µrad and is
//!   converted before the transform); the overlapping and the modified Allan deviation
//!   over octave averaging times (in **rad**). A gap in the tiltmeter rows (more than 1.5
//!   sample periods, or a new run) starts a new Welch segment; unusable samples are skipped
//!   (the Allan deviation concatenates across them);
//! - from the control rows (one per tick, tilt averaged over the tick): the regression of
//!   tilt on the mean leg temperature and on each leg's temperature, slope in µrad/K with
//!   its ordinary-least-squares standard error (which assumes independent residuals and so
//!   understates the uncertainty of slowly varying data); heater duty per leg (mean, min,
//!   max power, fraction of ticks at 0 W and at the heater's maximum); the tick intervals
//!   from the rows' monotonic times (mean, min, max, missed ticks);
//! - from the events: counts by kind and the alarms, faults and recording problems.

pub mod plot;
pub mod series;

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};

use serde::Serialize;
use stilt_config::Config;

use crate::analysis::allan::{AllanAccumulator, AllanConfig};
use crate::analysis::psd::{Detrend, Welch, WelchConfig};
use crate::analysis::stats::{LinearFit, LinearRegression, Summary};
use crate::record::layout::iso8601_utc;
use crate::record::{RecordError, SegmentSet, TimeWindow};
use crate::rows::EventKind;
use series::{Bucket, Decimator};

/// Radians per microradian.
pub const RAD_PER_URAD: f64 = 1e-6;

/// How a report is computed.
#[derive(Debug, Clone, PartialEq)]
pub struct ReportOptions {
    /// The UTC window.
    pub window: TimeWindow,
    /// Welch segment length, s (rounded down to a power of two of samples, and shortened
    /// to a quarter of the run when the run is shorter).
    pub asd_segment_s: f64,
    /// A configuration to take the heater limits and rates from; default: the one
    /// recorded in the first segment.
    pub config: Option<Config>,
    /// Points kept for each plot's series.
    pub plot_points: usize,
}

impl Default for ReportOptions {
    fn default() -> Self {
        ReportOptions {
            window: TimeWindow::ALL,
            asd_segment_s: 3600.0,
            config: None,
            plot_points: 2000,
        }
    }
}

/// Why a report could not be made.
#[derive(Debug, thiserror::Error)]
pub enum ReportError {
    /// Reading the recording failed.
    #[error(transparent)]
    Record(#[from] RecordError),
    /// There is nothing to report on.
    #[error("{0}")]
    NoData(String),
    /// A plot could not be drawn or written.
    #[error("plot {path}: {message}")]
    Plot {
        /// The file.
        path: PathBuf,
        /// What went wrong.
        message: String,
    },
}

/// Mean, RMS, standard deviation and extremes of one series.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct Stats {
    /// Samples.
    pub n: u64,
    /// Mean.
    pub mean: f64,
    /// Root mean square (about zero).
    pub rms: f64,
    /// Standard deviation (RMS about the mean, n − 1).
    pub std_dev: f64,
    /// Minimum.
    pub min: f64,
    /// Maximum.
    pub max: f64,
    /// Maximum − minimum.
    pub peak_to_peak: f64,
}

impl Stats {
    fn of(s: &Summary) -> Option<Stats> {
        Some(Stats {
            n: s.count(),
            mean: s.mean()?,
            rms: s.rms()?,
            std_dev: s.std_dev().unwrap_or(0.0),
            min: s.min()?,
            max: s.max()?,
            peak_to_peak: s.peak_to_peak()?,
        })
    }
}

/// The amplitude spectral density of one axis.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Asd {
    /// Unit of `asd`.
    pub unit: &'static str,
    /// Sample rate, Hz.
    pub sample_rate_hz: f64,
    /// Segment length, samples.
    pub segment_len: usize,
    /// Periodograms averaged.
    pub segments: u64,
    /// Bin spacing, Hz.
    pub resolution_hz: f64,
    /// Bin frequencies, Hz.
    pub frequencies_hz: Vec<f64>,
    /// One-sided ASD per bin, rad/√Hz.
    pub asd: Vec<f64>,
    /// ∫PSD df over all bins (the detrended, windowed mean square), rad².
    pub integrated_power_rad2: f64,
}

/// One averaging time of the Allan deviations.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct AllanRow {
    /// Averaging time τ, s.
    pub tau_s: f64,
    /// Overlapping Allan deviation, rad.
    pub adev_rad: f64,
    /// Terms in the overlapping variance.
    pub adev_terms: u64,
    /// Modified Allan deviation, rad.
    pub mdev_rad: Option<f64>,
    /// Terms in the modified variance.
    pub mdev_terms: u64,
    /// Stride of the terms used (1 = fully overlapping).
    pub stride: u64,
}

/// Everything about one tilt axis.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct AxisReport {
    /// `x` or `y`.
    pub axis: &'static str,
    /// Tilt statistics over the usable tiltmeter rows, µrad.
    pub tilt_urad: Option<Stats>,
    /// ASD, or why there is none.
    pub asd: Result<Asd, String>,
    /// Allan deviations (octave τ); empty when the run is too short.
    pub allan: Vec<AllanRow>,
}

/// A regression slope.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct Slope {
    /// Slope, µrad/K.
    pub slope_urad_per_k: f64,
    /// Its standard error (OLS), µrad/K.
    pub std_err_urad_per_k: f64,
    /// Intercept, µrad (at 0 °C).
    pub intercept_urad: f64,
    /// R².
    pub r_squared: f64,
    /// Pairs used.
    pub n: u64,
}

impl Slope {
    fn of(f: &LinearFit) -> Slope {
        Slope {
            slope_urad_per_k: f.slope,
            std_err_urad_per_k: f.slope_std_err,
            intercept_urad: f.intercept,
            r_squared: f.r_squared,
            n: f.count,
        }
    }
}

/// Tilt–temperature coupling, per axis.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Coupling {
    /// Tilt (x, y) on the mean leg temperature; `Err`: why not.
    pub on_mean_leg: [Result<Slope, String>; 2],
    /// Tilt (x, y) on each leg's temperature, by leg name.
    pub on_each_leg: Vec<(String, [Result<Slope, String>; 2])>,
    /// Control ticks used (usable tilt and every leg temperature).
    pub ticks_used: u64,
}

/// One heater's duty.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Heater {
    /// Leg name.
    pub leg: String,
    /// Power statistics, W.
    pub power_w: Option<Stats>,
    /// The heater's maximum, W, if a configuration was available.
    pub max_allowed_w: Option<f64>,
    /// Fraction of ticks at 0 W.
    pub fraction_at_zero: f64,
    /// Fraction of ticks at the maximum (`None` without a configuration).
    pub fraction_at_max: Option<f64>,
    /// Leg temperature statistics, °C.
    pub temp_c: Option<Stats>,
}

/// One notable event.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct EventBrief {
    /// UTC, ISO 8601.
    pub utc: String,
    /// Kind.
    pub kind: &'static str,
    /// Source.
    pub source: String,
    /// Detail.
    pub detail: String,
}

/// Events by kind, and the alarms, faults and recording problems.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Events {
    /// All events.
    pub total: u64,
    /// Count per kind.
    pub by_kind: BTreeMap<&'static str, u64>,
    /// The first notable events (alarm, fault, dropped, recording), in order.
    pub notable: Vec<EventBrief>,
    /// Notable events not listed.
    pub notable_not_listed: u64,
}

/// The loop's timing from the control rows.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Timing {
    /// Control rows.
    pub ticks: u64,
    /// Nominal period, s (from the configuration, else the median of the first intervals).
    pub nominal_period_s: Option<f64>,
    /// Interval statistics, s.
    pub interval_s: Option<Stats>,
    /// Ticks missing: Σ (round(interval/period) − 1) over intervals above 1.5 periods.
    pub missed_ticks: u64,
    /// Intervals above 1.5 periods.
    pub late_intervals: u64,
    /// Runs seen (the monotonic clock restarts with each run).
    pub runs: u64,
}

/// Bounded series kept for the plots.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct PlotData {
    /// Tilt x, y in µrad against hours since the first row.
    pub tilt: Vec<Bucket>,
    /// Leg temperatures (°C) against hours, one channel per leg.
    pub legs: Vec<Bucket>,
    /// (mean leg temperature °C, tilt x µrad, tilt y µrad) bucket means, in time order.
    pub tilt_vs_temp: Vec<Bucket>,
}

/// The report.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Report {
    /// Segment files read, in time order.
    pub segments: Vec<String>,
    /// Run ids.
    pub runs: Vec<String>,
    /// Stage name (first segment).
    pub stage: String,
    /// Leg names (first segment).
    pub legs: Vec<String>,
    /// The window asked for, ISO 8601 UTC (`None`: open).
    pub window: (Option<String>, Option<String>),
    /// First and last tiltmeter row, ISO 8601 UTC.
    pub span_utc: Option<(String, String)>,
    /// Last minus first tiltmeter row time, s.
    pub duration_s: f64,
    /// Tiltmeter rows in the window.
    pub tilt_rows: u64,
    /// Of which unusable (quality not ok, or non-finite).
    pub tilt_rows_unusable: u64,
    /// Tiltmeter sample rate, Hz.
    pub tilt_rate_hz: Option<f64>,
    /// Gaps in the tiltmeter rows (new Welch segment).
    pub tilt_gaps: u64,
    /// Per axis.
    pub axes: [AxisReport; 2],
    /// Tilt–temperature coupling.
    pub coupling: Coupling,
    /// Heater duty per leg.
    pub heaters: Vec<Heater>,
    /// Events.
    pub events: Events,
    /// Loop timing.
    pub timing: Timing,
    /// Where the heater limits came from.
    pub config_source: String,
    /// Series for the plots.
    #[serde(skip)]
    pub plot: PlotData,
}

/// Reads the configuration text recorded in a segment (root attribute `config_toml`).
fn recorded_config(path: &Path) -> Option<Config> {
    let f = hdf5::File::open_as(path, hdf5::OpenMode::ReadSWMR).ok()?;
    let text = f
        .attr("config_toml")
        .and_then(|a| a.read_scalar::<hdf5::types::VarLenUnicode>())
        .ok()?;
    stilt_config::load_str(text.as_str(), &path.display().to_string()).ok()
}

/// Largest power of two ≤ `n` (0 for 0).
fn pow2_floor(n: usize) -> usize {
    if n == 0 {
        0
    } else {
        1 << (usize::BITS - 1 - n.leading_zeros())
    }
}

struct AxisAcc {
    summary: Summary,
    welch: Option<Welch>,
    allan: Option<AllanAccumulator>,
    chunk: Vec<f64>,
}

impl AxisAcc {
    fn flush(&mut self) {
        if self.chunk.is_empty() {
            return;
        }
        if let Some(w) = self.welch.as_mut() {
            let _ = w.push(&self.chunk);
        }
        if let Some(a) = self.allan.as_mut() {
            let _ = a.push(&self.chunk);
        }
        self.chunk.clear();
    }
}

/// Computes the report over `set` in one streaming pass per stream. `progress(done,
/// total)` is called every 64 Ki rows with rows read so far.
pub fn compute(
    set: &SegmentSet,
    opts: &ReportOptions,
    progress: &mut dyn FnMut(u64, u64),
) -> Result<Report, ReportError> {
    let segs = set.segments();
    let Some(first) = segs.first() else {
        return Err(ReportError::NoData(
            "no segments given: name one or more .h5 segment files or folders that hold them"
                .into(),
        ));
    };
    let (cfg, config_source) = match &opts.config {
        Some(c) => (Some(c.clone()), "--config".to_string()),
        None => match recorded_config(&first.path) {
            Some(c) => (Some(c), format!("recorded in {}", first.path.display())),
            None => (None, "none (heater maxima unknown)".to_string()),
        },
    };
    let total_rows: u64 = segs
        .iter()
        .map(|s| s.rows_at_last_update.0 + s.rows_at_last_update.1)
        .sum();
    let mut done_rows = 0u64;

    // ---- tilt pass ------------------------------------------------------------------
    let mut rows = set.tilt(opts.window);
    let mut head = Vec::new();
    for r in rows.by_ref() {
        head.push(r?);
        if head.len() >= 64 {
            break;
        }
    }
    let mut dts: Vec<f64> = head
        .windows(2)
        .map(|w| w[1].stamp.t_mono_s - w[0].stamp.t_mono_s)
        .filter(|d| *d > 0.0 && d.is_finite())
        .collect();
    dts.sort_by(f64::total_cmp);
    let rate_hz = dts
        .get(dts.len() / 2)
        .map(|d| 1.0 / d)
        .or(cfg.as_ref().map(|c| c.tiltmeter.rate_hz));
    // Rows in the window, estimated from each segment's row count and time range.
    let est_tilt_rows: u64 = segs
        .iter()
        .map(|s| {
            let n = s.rows_at_last_update.0;
            match s.utc_range_ns {
                Some((lo, hi)) if hi > lo => {
                    let a = opts.window.from_utc_ns.map_or(lo, |f| f.max(lo));
                    let b = opts.window.to_utc_ns.map_or(hi, |t| t.min(hi));
                    if b <= a {
                        0
                    } else {
                        (n as f64 * (b - a) as f64 / (hi - lo) as f64) as u64
                    }
                }
                _ => n,
            }
        })
        .sum();
    let (welch_cfg, welch_err) = match rate_hz {
        Some(fs) => {
            let want = (opts.asd_segment_s * fs).max(16.0) as usize;
            let cap = (est_tilt_rows / 4) as usize;
            let n = pow2_floor(want.min(cap.max(16)));
            (
                Some(WelchConfig {
                    sample_rate_hz: fs,
                    segment_len: n.clamp(16, crate::analysis::psd::MAX_SEGMENT_LEN),
                    detrend: Detrend::Mean,
                }),
                String::new(),
            )
        }
        None => (
            None,
            "fewer than two tiltmeter rows: no sample rate".to_string(),
        ),
    };
    let mk_axis = || AxisAcc {
        summary: Summary::new(),
        welch: welch_cfg.and_then(|c| Welch::new(c).ok()),
        allan: rate_hz.and_then(|fs| AllanAccumulator::new(AllanConfig::new(1.0 / fs)).ok()),
        chunk: Vec::with_capacity(4096),
    };
    let mut axes = [mk_axis(), mk_axis()];
    let mut tilt_rows = 0u64;
    let mut unusable = 0u64;
    let mut gaps = 0u64;
    let mut first_utc: Option<i64> = None;
    let mut last_utc = 0i64;
    let mut prev_mono: Option<f64> = None;
    let period = rate_hz.map(|f| 1.0 / f);
    let mut tilt_dec = Decimator::new(2, opts.plot_points);
    let mut it = head.into_iter().map(Ok).chain(rows);
    for r in it.by_ref() {
        let s = r?;
        tilt_rows += 1;
        done_rows += 1;
        if done_rows % 65_536 == 0 {
            progress(done_rows, total_rows);
        }
        let t0 = *first_utc.get_or_insert(s.stamp.t_utc_ns);
        last_utc = s.stamp.t_utc_ns;
        if let (Some(p), Some(per)) = (prev_mono, period) {
            let dt = s.stamp.t_mono_s - p;
            if !(dt > 0.0 && dt <= 1.5 * per) {
                gaps += 1;
                for a in &mut axes {
                    a.flush();
                    if let Some(w) = a.welch.as_mut() {
                        w.discontinuity();
                    }
                }
            }
        }
        prev_mono = Some(s.stamp.t_mono_s);
        let hours = (s.stamp.t_utc_ns - t0) as f64 / 3.6e12;
        let ok = s.quality.is_usable() && s.tilt_urad.iter().all(|v| v.is_finite());
        if !ok {
            unusable += 1;
            tilt_dec.push(hours, &[f64::NAN, f64::NAN]);
            continue;
        }
        tilt_dec.push(hours, &s.tilt_urad);
        for k in 0..2 {
            let a = &mut axes[k];
            let v = s.tilt_urad[k];
            let _ = a.summary.push(v);
            a.chunk.push(v * RAD_PER_URAD);
            if a.chunk.len() >= 4096 {
                a.flush();
            }
        }
    }
    drop(it);
    for a in &mut axes {
        a.flush();
    }
    let axis_report = |k: usize, a: &AxisAcc| AxisReport {
        axis: ["x", "y"][k],
        tilt_urad: Stats::of(&a.summary),
        asd: match (&a.welch, welch_cfg) {
            (Some(w), Some(_)) => w
                .spectrum()
                .map(|s| Asd {
                    unit: "rad/√Hz",
                    sample_rate_hz: s.sample_rate_hz,
                    segment_len: s.segment_len,
                    segments: s.segments,
                    resolution_hz: s.resolution_hz(),
                    integrated_power_rad2: s.integrated_power(),
                    asd: s.asd(),
                    frequencies_hz: s.frequencies_hz,
                })
                .map_err(|e| e.to_string()),
            _ => Err(welch_err.clone()),
        },
        allan: a.allan.as_ref().map_or_else(Vec::new, |al| {
            al.results()
                .into_iter()
                .map(|p| AllanRow {
                    tau_s: p.tau_s,
                    adev_rad: p.adev,
                    adev_terms: p.adev_terms,
                    mdev_rad: p.mdev,
                    mdev_terms: p.mdev_terms,
                    stride: p.stride,
                })
                .collect()
        }),
    };
    let axes_report = [axis_report(0, &axes[0]), axis_report(1, &axes[1])];

    // ---- control pass ---------------------------------------------------------------
    let nlegs = first.leg_names.len();
    let mut reg_mean = [LinearRegression::new(), LinearRegression::new()];
    let mut reg_leg = vec![[LinearRegression::new(), LinearRegression::new()]; nlegs];
    let mut power = vec![Summary::new(); nlegs];
    let mut temp = vec![Summary::new(); nlegs];
    let mut at_zero = vec![0u64; nlegs];
    let mut at_max = vec![0u64; nlegs];
    let max_w: Vec<Option<f64>> = (0..nlegs)
        .map(|i| {
            cfg.as_ref()
                .and_then(|c| c.legs.get(i))
                .map(|l| l.heater_max_power_w)
        })
        .collect();
    let mut ticks = 0u64;
    let mut used = 0u64;
    let mut intervals = Summary::new();
    let nominal = cfg.as_ref().map(|c| c.control.period_s());
    let mut early_dts: Vec<f64> = Vec::new();
    let mut pending: Vec<f64> = Vec::new();
    let mut missed = 0u64;
    let mut late = 0u64;
    let mut runs = 0u64;
    let mut prev_t: Option<f64> = None;
    let mut leg_dec = Decimator::new(nlegs, opts.plot_points);
    let mut tt_dec = Decimator::new(3, opts.plot_points);
    let t0 = first_utc;
    let mut note_interval = |dt: f64, per: f64, missed: &mut u64, late: &mut u64| {
        let _ = intervals.push(dt);
        if dt > 1.5 * per {
            *late += 1;
            *missed += ((dt / per).round() as u64).saturating_sub(1);
        }
    };
    for r in set.control(opts.window) {
        let row = r?;
        ticks += 1;
        done_rows += 1;
        if done_rows % 65_536 == 0 {
            progress(done_rows, total_rows);
        }
        let t = row.stamp.t_mono_s;
        match prev_t {
            Some(p) if t > p => {
                let dt = t - p;
                match nominal.or_else(|| {
                    (early_dts.len() >= 16).then(|| {
                        let mut v = early_dts.clone();
                        v.sort_by(f64::total_cmp);
                        v[v.len() / 2]
                    })
                }) {
                    Some(per) => {
                        for d in pending.drain(..) {
                            note_interval(d, per, &mut missed, &mut late);
                        }
                        note_interval(dt, per, &mut missed, &mut late);
                    }
                    None => {
                        early_dts.push(dt);
                        pending.push(dt);
                    }
                }
            }
            _ => runs += 1,
        }
        prev_t = Some(t);
        let hours = t0.map_or(0.0, |t0| (row.stamp.t_utc_ns - t0) as f64 / 3.6e12);
        let temps: Vec<f64> = row.legs.iter().map(|l| l.temp_c).collect();
        leg_dec.push(hours, &temps);
        for (i, l) in row.legs.iter().enumerate().take(nlegs) {
            if l.power_w.is_finite() {
                let _ = power[i].push(l.power_w);
                if l.power_w <= 1e-9 {
                    at_zero[i] += 1;
                }
                if max_w[i].is_some_and(|m| l.power_w >= m - 1e-9) {
                    at_max[i] += 1;
                }
            }
            if l.temp_quality.is_usable() && l.temp_c.is_finite() {
                let _ = temp[i].push(l.temp_c);
            }
        }
        let tilt_ok = row.tilt_quality.is_usable() && row.tilt_urad.iter().all(|v| v.is_finite());
        let temps_ok = row.legs.len() == nlegs
            && nlegs > 0
            && row
                .legs
                .iter()
                .all(|l| l.temp_quality.is_usable() && l.temp_c.is_finite());
        if tilt_ok && temps_ok {
            used += 1;
            let mean_t = temps.iter().sum::<f64>() / nlegs as f64;
            for k in 0..2 {
                let _ = reg_mean[k].push(mean_t, row.tilt_urad[k]);
                for i in 0..nlegs {
                    let _ = reg_leg[i][k].push(temps[i], row.tilt_urad[k]);
                }
            }
            tt_dec.push(hours, &[mean_t, row.tilt_urad[0], row.tilt_urad[1]]);
        }
    }
    let fallback_period = (!early_dts.is_empty()).then(|| {
        let mut v = early_dts.clone();
        v.sort_by(f64::total_cmp);
        v[v.len() / 2]
    });
    if let Some(per) = nominal.or(fallback_period) {
        for d in pending.drain(..) {
            note_interval(d, per, &mut missed, &mut late);
        }
    }
    let slope = |r: &LinearRegression| r.fit().map(|f| Slope::of(&f)).map_err(|e| e.to_string());
    let coupling = Coupling {
        on_mean_leg: [slope(&reg_mean[0]), slope(&reg_mean[1])],
        on_each_leg: (0..nlegs)
            .map(|i| {
                (
                    first.leg_names[i].clone(),
                    [slope(&reg_leg[i][0]), slope(&reg_leg[i][1])],
                )
            })
            .collect(),
        ticks_used: used,
    };
    let heaters = (0..nlegs)
        .map(|i| {
            let n = power[i].count().max(1) as f64;
            Heater {
                leg: first.leg_names[i].clone(),
                power_w: Stats::of(&power[i]),
                max_allowed_w: max_w[i],
                fraction_at_zero: at_zero[i] as f64 / n,
                fraction_at_max: max_w[i].map(|_| at_max[i] as f64 / n),
                temp_c: Stats::of(&temp[i]),
            }
        })
        .collect();
    let timing = Timing {
        ticks,
        nominal_period_s: nominal.or(fallback_period),
        interval_s: Stats::of(&intervals),
        missed_ticks: missed,
        late_intervals: late,
        runs,
    };

    // ---- events -----------------------------------------------------------------------
    let mut by_kind = BTreeMap::new();
    let mut notable = Vec::new();
    let mut not_listed = 0u64;
    let mut total_events = 0u64;
    for e in set.events(opts.window) {
        let e = e?;
        total_events += 1;
        *by_kind.entry(e.kind.as_str()).or_insert(0u64) += 1;
        if matches!(
            e.kind,
            EventKind::Alarm | EventKind::Fault | EventKind::Dropped | EventKind::Recording
        ) {
            if notable.len() < 50 {
                notable.push(EventBrief {
                    utc: iso8601_utc(e.stamp.t_utc_ns, true),
                    kind: e.kind.as_str(),
                    source: e.source,
                    detail: e.detail,
                });
            } else {
                not_listed += 1;
            }
        }
    }
    progress(total_rows.max(done_rows), total_rows.max(done_rows));

    let mut runs_ids: Vec<String> = segs.iter().map(|s| s.run_id.clone()).collect();
    runs_ids.dedup();
    Ok(Report {
        segments: segs.iter().map(|s| s.path.display().to_string()).collect(),
        runs: runs_ids,
        stage: first.stage_name.clone(),
        legs: first.leg_names.clone(),
        window: (
            opts.window.from_utc_ns.map(|t| iso8601_utc(t, true)),
            opts.window.to_utc_ns.map(|t| iso8601_utc(t, true)),
        ),
        span_utc: first_utc.map(|f| (iso8601_utc(f, true), iso8601_utc(last_utc, true))),
        duration_s: first_utc.map_or(0.0, |f| (last_utc - f) as f64 / 1e9),
        tilt_rows,
        tilt_rows_unusable: unusable,
        tilt_rate_hz: rate_hz,
        tilt_gaps: gaps,
        axes: axes_report,
        coupling,
        heaters,
        events: Events {
            total: total_events,
            by_kind,
            notable,
            notable_not_listed: not_listed,
        },
        timing,
        config_source,
        plot: PlotData {
            tilt: tilt_dec.buckets(),
            legs: leg_dec.buckets(),
            tilt_vs_temp: tt_dec.buckets(),
        },
    })
}

/// Formats a tilt in µrad for the table: nrad below 1 µrad.
fn tilt_text(urad: f64) -> String {
    if !urad.is_finite() {
        "—".into()
    } else if urad.abs() < 1.0 {
        format!("{:.2} nrad", urad * 1e3)
    } else {
        format!("{urad:.4} µrad")
    }
}

/// Median of the ASD over bins in `[lo, hi)` Hz.
pub fn band_median(a: &Asd, lo: f64, hi: f64) -> Option<f64> {
    let mut v: Vec<f64> = a
        .frequencies_hz
        .iter()
        .zip(&a.asd)
        .filter(|(f, _)| **f >= lo && **f < hi && **f > 0.0)
        .map(|(_, x)| *x)
        .collect();
    if v.is_empty() {
        return None;
    }
    v.sort_by(f64::total_cmp);
    Some(v[v.len() / 2])
}

/// The report as a readable table.
pub fn render(r: &Report) -> String {
    use std::fmt::Write;
    let mut o = String::new();
    let _ = writeln!(o, "stiltd report — {}", r.stage);
    let _ = writeln!(
        o,
        "{} segment(s) of {} run(s); {}",
        r.segments.len(),
        r.runs.len(),
        match &r.span_utc {
            Some((a, b)) => format!("{a} … {b} ({:.2} h)", r.duration_s / 3600.0),
            None => "no tiltmeter rows in the window".into(),
        }
    );
    let _ = writeln!(
        o,
        "tiltmeter: {} rows, {} unusable, {} gap(s), rate {}",
        r.tilt_rows,
        r.tilt_rows_unusable,
        r.tilt_gaps,
        r.tilt_rate_hz
            .map_or("unknown".into(), |f| format!("{f:.4} Hz"))
    );
    let _ = writeln!(o);
    let _ = writeln!(
        o,
        "{:<5}{:>16}{:>16}{:>16}{:>16}",
        "axis", "mean", "RMS", "std dev", "peak-to-peak"
    );
    for a in &r.axes {
        match &a.tilt_urad {
            Some(s) => {
                let _ = writeln!(
                    o,
                    "{:<5}{:>16}{:>16}{:>16}{:>16}",
                    a.axis,
                    tilt_text(s.mean),
                    tilt_text(s.rms),
                    tilt_text(s.std_dev),
                    tilt_text(s.peak_to_peak)
                );
            }
            None => {
                let _ = writeln!(o, "{:<5}(no usable samples)", a.axis);
            }
        }
    }
    let _ = writeln!(o);
    let _ = writeln!(
        o,
        "amplitude spectral density (Welch, Hann, 50 % overlap, one-sided), median per band, rad/√Hz:"
    );
    for a in &r.axes {
        match &a.asd {
            Ok(s) => {
                let nyq = s.sample_rate_hz / 2.0;
                let bands = [
                    (1e-4, 1e-3),
                    (1e-3, 1e-2),
                    (1e-2, 1e-1),
                    (1e-1, 1.0),
                    (1.0, nyq),
                ];
                let cells: Vec<String> = bands
                    .iter()
                    .filter(|(lo, _)| *lo < nyq)
                    .map(|(lo, hi)| {
                        format!(
                            "{lo:.0e}–{hi:.0e} Hz: {}",
                            band_median(s, *lo, *hi).map_or("—".into(), |v| format!("{v:.2e}"))
                        )
                    })
                    .collect();
                let _ = writeln!(
                    o,
                    "  {}  ({} segments of {} samples, Δf = {:.3e} Hz)",
                    a.axis, s.segments, s.segment_len, s.resolution_hz
                );
                let _ = writeln!(o, "     {}", cells.join("; "));
            }
            Err(e) => {
                let _ = writeln!(o, "  {}  —: {e}", a.axis);
            }
        }
    }
    let _ = writeln!(o);
    let _ = writeln!(o, "Allan deviation of tilt, rad (overlapping / modified):");
    let _ = writeln!(
        o,
        "{:>12}{:>14}{:>14}{:>14}{:>14}",
        "tau s", "ADEV x", "MDEV x", "ADEV y", "MDEV y"
    );
    let rows = r.axes[0].allan.len().max(r.axes[1].allan.len());
    for i in 0..rows {
        let cell = |k: usize, m: bool| {
            r.axes[k].allan.get(i).map_or("—".to_string(), |p| {
                if m {
                    p.mdev_rad.map_or("—".into(), |v| format!("{v:.3e}"))
                } else {
                    format!("{:.3e}", p.adev_rad)
                }
            })
        };
        let tau = r.axes[0]
            .allan
            .get(i)
            .or(r.axes[1].allan.get(i))
            .map_or(0.0, |p| p.tau_s);
        let _ = writeln!(
            o,
            "{:>12.1}{:>14}{:>14}{:>14}{:>14}",
            tau,
            cell(0, false),
            cell(0, true),
            cell(1, false),
            cell(1, true)
        );
    }
    let _ = writeln!(o);
    let _ = writeln!(
        o,
        "tilt–temperature coupling (regression on control ticks, slope ± standard error, µrad/K; {} ticks):",
        r.coupling.ticks_used
    );
    let sl = |s: &Result<Slope, String>| match s {
        Ok(s) => format!(
            "{:+.4} ± {:.4} (R² {:.3})",
            s.slope_urad_per_k, s.std_err_urad_per_k, s.r_squared
        ),
        Err(e) => format!("— ({e})"),
    };
    let _ = writeln!(
        o,
        "  on mean leg temperature:  x {}   y {}",
        sl(&r.coupling.on_mean_leg[0]),
        sl(&r.coupling.on_mean_leg[1])
    );
    for (name, s) in &r.coupling.on_each_leg {
        let _ = writeln!(o, "  on leg {name:<18} x {}   y {}", sl(&s[0]), sl(&s[1]));
    }
    let _ = writeln!(o);
    let _ = writeln!(o, "heaters (config: {}):", r.config_source);
    let _ = writeln!(
        o,
        "{:<8}{:>10}{:>10}{:>10}{:>10}{:>10}{:>10}{:>14}",
        "leg", "mean W", "min W", "max W", "limit W", "at 0", "at max", "temp °C mean"
    );
    for h in &r.heaters {
        let p = h.power_w;
        let f = |x: Option<f64>| x.map_or("—".into(), |v| format!("{v:.3}"));
        let _ = writeln!(
            o,
            "{:<8}{:>10}{:>10}{:>10}{:>10}{:>9.2}%{:>10}{:>14}",
            h.leg,
            f(p.map(|s| s.mean)),
            f(p.map(|s| s.min)),
            f(p.map(|s| s.max)),
            f(h.max_allowed_w),
            100.0 * h.fraction_at_zero,
            h.fraction_at_max
                .map_or("—".into(), |v| format!("{:.2}%", 100.0 * v)),
            h.temp_c.map_or("—".into(), |s| format!("{:.4}", s.mean))
        );
    }
    let _ = writeln!(o);
    let t = &r.timing;
    let _ = writeln!(
        o,
        "loop timing: {} ticks in {} run(s), nominal period {}, interval mean {} max {}, {} missed tick(s) in {} late interval(s)",
        t.ticks,
        t.runs,
        t.nominal_period_s.map_or("—".into(), |p| format!("{p} s")),
        t.interval_s
            .map_or("—".into(), |s| format!("{:.6} s", s.mean)),
        t.interval_s
            .map_or("—".into(), |s| format!("{:.6} s", s.max)),
        t.missed_ticks,
        t.late_intervals
    );
    let kinds: Vec<String> = r
        .events
        .by_kind
        .iter()
        .map(|(k, n)| format!("{k} {n}"))
        .collect();
    let _ = writeln!(o, "events: {} ({})", r.events.total, kinds.join(", "));
    for e in &r.events.notable {
        let _ = writeln!(
            o,
            "  {} {:<10} {:<12} {}",
            e.utc, e.kind, e.source, e.detail
        );
    }
    if r.events.notable_not_listed > 0 {
        let _ = writeln!(o, "  … and {} more", r.events.notable_not_listed);
    }
    o
}

/// Parses a time for `--from`/`--to`: ISO 8601 UTC (`2024-03-01T06:00:00Z`, fraction
/// allowed, `Z` required) or an offset from `origin_utc_ns` (`+6h`, `+90m`).
pub fn parse_time(s: &str, origin_utc_ns: i64) -> Result<i64, String> {
    let t = s.trim();
    if let Some(rest) = t.strip_prefix('+') {
        let d = crate::demo::parse_duration_s(rest)?;
        return Ok(origin_utc_ns.saturating_add((d * 1e9) as i64));
    }
    let bad = || {
        format!(
            "`{s}` is not a time: give UTC as YYYY-MM-DDThh:mm:ss[.fff]Z, or an offset from the first segment's start such as +6h"
        )
    };
    let body = t.strip_suffix('Z').ok_or_else(bad)?;
    let (date, time) = body.split_once('T').ok_or_else(bad)?;
    let d: Vec<&str> = date.split('-').collect();
    let h: Vec<&str> = time.split(':').collect();
    if d.len() != 3 || h.len() != 3 {
        return Err(bad());
    }
    let num = |x: &str| x.parse::<i64>().map_err(|_| bad());
    let (y, mo, da) = (num(d[0])?, num(d[1])?, num(d[2])?);
    let (hh, mm) = (num(h[0])?, num(h[1])?);
    let sec: f64 = h[2].parse().map_err(|_| bad())?;
    if !(1..=12).contains(&mo)
        || !(1..=31).contains(&da)
        || !(0..24).contains(&hh)
        || !(0..60).contains(&mm)
        || !(0.0..61.0).contains(&sec)
        || !(1970..=2262).contains(&y)
    {
        return Err(bad());
    }
    // Days from the civil date (Howard Hinnant's algorithm, public domain).
    let (yy, m) = if mo <= 2 {
        (y - 1, mo + 9)
    } else {
        (y, mo - 3)
    };
    let era = yy.div_euclid(400);
    let yoe = yy - era * 400;
    let doy = (153 * m + 2) / 5 + da - 1;
    let doe = yoe * 365 + yoe / 4 - yoe / 100 + doy;
    let days = era * 146_097 + doe - 719_468;
    let secs = days * 86_400 + hh * 3600 + mm * 60;
    Ok(secs * 1_000_000_000 + (sec * 1e9).round() as i64)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn times_parse() {
        // 2024-03-01T00:00:00Z = 1709251200 s since the epoch (date -u -d 2024-03-01 +%s).
        assert_eq!(
            parse_time("2024-03-01T00:00:00Z", 0),
            Ok(1_709_251_200_000_000_000)
        );
        assert_eq!(
            parse_time("2024-03-01T06:30:00.5Z", 0),
            Ok(1_709_251_200_000_000_000 + 23_400_500_000_000)
        );
        assert_eq!(parse_time("+2h", 1000), Ok(1000 + 7_200_000_000_000));
        for bad in ["2024-03-01", "2024-13-01T00:00:00Z", "yesterday", "+-3h"] {
            assert!(parse_time(bad, 0).is_err(), "{bad}");
        }
    }

    #[test]
    fn pow2() {
        assert_eq!(pow2_floor(36_000), 32_768);
        assert_eq!(pow2_floor(1), 1);
        assert_eq!(pow2_floor(0), 0);
    }
}

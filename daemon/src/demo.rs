//! `stiltd demo`: the whole pipeline on the simulated stage, and the summary a lab
//! user wants at the end.
//!
//! [`run_demo`] runs the configured scenario twice with the same seed: once closed loop
//! (recorded through the given sink), once open loop (heaters held at the manual power,
//! in virtual time, not recorded) so the summary can state how much the loop rejected.
//! Tilt statistics are split at the settling time: "settling" is everything before it,
//! "settled" everything after.
//!
//! Statistics use the plate's *true* tilt from the simulator at every control tick —
//! what the stage really did — and, beside it, the tilt the controller *measured*
//! (1 s means of the tiltmeter, which include the instrument's own noise).

use std::sync::{Arc, Mutex};
use std::time::Instant;

use serde::Serialize;
use stilt_config::{Config, Mode};
use stilt_hil_sim::SimStage;

use crate::analysis::stats::Summary;
use crate::pipeline::{Pipeline, PipelineCounters};
use crate::rows::{CountingSink, RowSink, SinkReport};
use crate::runtime::{self, RunEnd, RuntimeOptions, SimBackend};
use crate::sim::{SimLoop, TickReport};

/// How fast the demo runs.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum Speed {
    /// Virtual time: as fast as the CPU allows.
    Max,
    /// N × wall-clock rate (1 = real time).
    Factor(f64),
}

impl std::str::FromStr for Speed {
    type Err = String;
    fn from_str(s: &str) -> Result<Self, String> {
        if s.eq_ignore_ascii_case("max") {
            return Ok(Speed::Max);
        }
        match s.trim_end_matches(['x', 'X']).parse::<f64>() {
            Ok(f) if f.is_finite() && f > 0.0 && f <= 1e7 => Ok(Speed::Factor(f)),
            _ => Err(format!(
                "`{s}` is not a speed: give `max` or a factor between 0 and 10000000, e.g. `60` or `60x`"
            )),
        }
    }
}

/// Parses a duration like `90s`, `90m`, `6h`, `1.5d` (a bare number is seconds).
pub fn parse_duration_s(s: &str) -> Result<f64, String> {
    let t = s.trim();
    let (num, mult) = match t.char_indices().last() {
        Some((i, 's')) => (&t[..i], 1.0),
        Some((i, 'm')) => (&t[..i], 60.0),
        Some((i, 'h')) => (&t[..i], 3600.0),
        Some((i, 'd')) => (&t[..i], 86_400.0),
        _ => (t, 1.0),
    };
    match num.trim().parse::<f64>() {
        Ok(v) if v.is_finite() && v > 0.0 && v * mult <= 366.0 * 86_400.0 => Ok(v * mult),
        _ => Err(format!(
            "`{s}` is not a duration: give a positive number with a unit s, m, h or d (e.g. `90m`, `6h`, `1.5d`), at most 366 days"
        )),
    }
}

/// Statistics of one axis over one window.
#[derive(Debug, Clone, Copy, Serialize, PartialEq)]
pub struct AxisStats {
    /// Number of control ticks in the window.
    pub n: u64,
    /// Mean tilt, µrad.
    pub mean_urad: f64,
    /// RMS deviation from the setpoint in use, µrad.
    pub rms_from_setpoint_urad: f64,
    /// RMS deviation from the window's mean (standard deviation), µrad.
    pub rms_about_mean_urad: f64,
    /// Largest minus smallest, µrad.
    pub peak_to_peak_urad: f64,
}

#[derive(Debug, Clone, Copy, Default)]
struct Acc {
    /// Count, mean, spread and range (Welford's update, as the reports use).
    s: Summary,
    /// Sum of squared deviations from the setpoint in use.
    dev2: f64,
}

impl Acc {
    fn add(&mut self, x: f64, setpoint: f64) {
        if !x.is_finite() {
            return;
        }
        let _ = self.s.push(x);
        self.dev2 += (x - setpoint) * (x - setpoint);
    }
    fn stats(&self) -> Option<AxisStats> {
        let n = self.s.count();
        Some(AxisStats {
            n,
            mean_urad: self.s.mean()?,
            rms_from_setpoint_urad: (self.dev2 / n as f64).sqrt(),
            rms_about_mean_urad: self.s.population_variance()?.sqrt(),
            peak_to_peak_urad: self.s.peak_to_peak()?,
        })
    }
}

/// Per-window accumulators of one run.
#[derive(Debug, Clone)]
struct RunAcc {
    settle_s: f64,
    truth: [[Acc; 2]; 2],    // [settling, settled][axis]
    measured: [[Acc; 2]; 2], // same
    power_min: Vec<f64>,
    power_max: Vec<f64>,
}

impl RunAcc {
    fn new(settle_s: f64, legs: usize) -> Self {
        RunAcc {
            settle_s,
            truth: Default::default(),
            measured: Default::default(),
            power_min: vec![f64::INFINITY; legs],
            power_max: vec![f64::NEG_INFINITY; legs],
        }
    }
    fn add(&mut self, r: &TickReport) {
        let w = usize::from(r.t_s >= self.settle_s);
        for k in 0..2 {
            let sp = r.outputs.tilt_target_urad[k];
            self.truth[w][k].add(r.true_tilt_urad[k], sp);
            if let Some(m) = r.measured_tilt_urad {
                self.measured[w][k].add(m[k], sp);
            }
        }
        if w == 1 {
            for (i, p) in r.outputs.power_w.iter().enumerate() {
                self.power_min[i] = self.power_min[i].min(*p);
                self.power_max[i] = self.power_max[i].max(*p);
            }
        }
    }
}

/// One axis in the summary.
#[derive(Debug, Clone, Serialize, PartialEq)]
pub struct AxisSummary {
    /// True tilt before the settling time, closed loop.
    pub settling: Option<AxisStats>,
    /// True tilt after the settling time, closed loop.
    pub settled: Option<AxisStats>,
    /// Measured (1 s means) tilt after the settling time, closed loop.
    pub settled_measured: Option<AxisStats>,
    /// True tilt after the settling time with the loop off (same stage and seed).
    pub open_loop: Option<AxisStats>,
    /// Open-loop RMS about its mean ÷ closed-loop RMS from the setpoint (settled windows).
    pub rejection_ratio: Option<f64>,
}

/// The end-of-run summary (printed as a table, or as one JSON object with `--json`).
#[derive(Debug, Clone, Serialize, PartialEq)]
pub struct DemoSummary {
    /// Stage name from the scenario.
    pub stage: String,
    /// Random seed of the simulated stage.
    pub seed: u64,
    /// Simulated duration, s.
    pub duration_s: f64,
    /// Settling time that splits the windows, s.
    pub settle_s: f64,
    /// Mode the closed-loop run ended in.
    pub mode: String,
    /// Tilt about x (dz/dx) and y (dz/dy).
    pub axes: [AxisSummary; 2],
    /// Lowest heater power of each leg after settling, W.
    pub heater_power_min_w: Vec<f64>,
    /// Highest heater power of each leg after settling, W.
    pub heater_power_max_w: Vec<f64>,
    /// Heater maxima, W, for reference.
    pub heater_power_limit_w: Vec<f64>,
    /// Ticks on which each limit acted (whole run).
    pub limit_ticks: LimitTicks,
    /// Heater commands outside 0 … max at any tick (0 by construction; counted to show it).
    pub out_of_range_commands: u64,
    /// Control ticks run.
    pub ticks: u64,
    /// Ticks without usable tilt.
    pub ticks_without_tilt: u64,
    /// What the sink reports.
    pub recorded: RecordedSummary,
    /// Wall-clock time of the closed-loop run, s.
    pub wall_s: f64,
    /// Simulated seconds per wall-clock second achieved by the closed-loop run.
    pub speed_achieved: f64,
}

/// Ticks on which each limit acted.
#[derive(Debug, Clone, Serialize, PartialEq)]
#[allow(missing_docs)]
pub struct LimitTicks {
    pub heater_at_zero: u64,
    pub heater_at_max: u64,
    pub total_power: u64,
    pub tilt_output: u64,
    pub leg_slew: u64,
}

/// What was recorded.
#[derive(Debug, Clone, Serialize, PartialEq)]
#[allow(missing_docs)]
pub struct RecordedSummary {
    pub tilt_rows: u64,
    pub control_rows: u64,
    pub events: u64,
    pub dropped_rows: u64,
    pub files: Vec<String>,
}

/// Options of one demo run.
pub struct DemoOptions {
    /// Simulated duration, s.
    pub duration_s: f64,
    /// Where the windows split, s.
    pub settle_s: f64,
    /// Virtual time or a wall-clock factor.
    pub speed: Speed,
    /// Progress callback: (simulated seconds done, total).
    pub progress: Option<Box<dyn FnMut(f64, f64) + Send>>,
    /// UTC of run time 0, ns since the epoch.
    pub start_utc_ns: i64,
}

/// Runs one scenario for `duration_s` in virtual time with the given mode override,
/// returning the accumulators (used for the open-loop reference and by tests).
fn run_virtual(
    cfg: &Config,
    sink: Box<dyn RowSink>,
    opts: &mut DemoOptions,
    mode: Option<Mode>,
) -> (RunAcc, SimLoop) {
    let mut cfg = cfg.clone();
    if let Some(m) = mode {
        cfg.control.mode = m;
    }
    let stage = SimStage::new(&cfg);
    let legs = cfg.legs.len();
    let pipeline = Pipeline::new(cfg, sink, opts.start_utc_ns);
    let mut sim = SimLoop::new(stage, pipeline);
    let mut acc = RunAcc::new(opts.settle_s, legs);
    // Progress every simulated 15 minutes: cheap, and smooth enough for a bar.
    let chunk = 900.0;
    let mut t = 0.0;
    while t < opts.duration_s {
        t = (t + chunk).min(opts.duration_s);
        sim.advance_to(t, &mut |r| acc.add(r));
        if let Some(p) = opts.progress.as_mut() {
            p(t, opts.duration_s);
        }
    }
    (acc, sim)
}

/// Runs the closed-loop scenario at a wall-clock factor through the daemon's own
/// runtime ([`crate::runtime`]) with the simulated stage as its backend — the same loop,
/// timer and request handling a real stage gets.
async fn run_paced(
    cfg: &Config,
    sink: Box<dyn RowSink>,
    opts: &mut DemoOptions,
    factor: f64,
) -> anyhow::Result<(RunAcc, RunEnd)> {
    let acc = Arc::new(Mutex::new(RunAcc::new(opts.settle_s, cfg.legs.len())));
    let acc2 = Arc::clone(&acc);
    let mut progress = opts.progress.take();
    let total = opts.duration_s;
    let mut last = 0.0;
    let backend = SimBackend::new(cfg).with_observer(Box::new(move |r: &TickReport| {
        if let Ok(mut a) = acc2.lock() {
            a.add(r);
        }
        if let Some(p) = progress.as_mut() {
            if r.t_s - last >= 60.0 || r.t_s >= total {
                p(r.t_s, total);
                last = r.t_s;
            }
        }
    }));
    let ropts = RuntimeOptions {
        speed: factor,
        duration_s: Some(opts.duration_s),
        config_path: None,
        recording: None,
        start_utc_ns: opts.start_utc_ns,
        catch_up: true,
    };
    let (_handles, shutdown, task) = runtime::start(cfg.clone(), Box::new(backend), sink, ropts);
    // SIGTERM and SIGINT end the run the safe way: heaters to zero, recording closed.
    let signals = tokio::spawn(async move {
        use tokio::signal::unix::{SignalKind, signal};
        let (Ok(mut term), Ok(mut int)) = (
            signal(SignalKind::terminate()),
            signal(SignalKind::interrupt()),
        ) else {
            return;
        };
        tokio::select! {
            _ = term.recv() => {}
            _ = int.recv() => {}
        }
        shutdown.trigger();
    });
    let end = task.await??;
    signals.abort();
    let acc = acc
        .lock()
        .map_err(|_| anyhow::anyhow!("summary accumulator poisoned"))?
        .clone();
    Ok((acc, end))
}

/// The closed-loop run's results before the summary is assembled.
struct Closed {
    acc: RunAcc,
    counters: PipelineCounters,
    report: SinkReport,
    mode: Mode,
    wall_s: f64,
}

/// Runs the demo: closed loop through `sink`, then the open-loop reference, and
/// returns the summary. Paced speeds need a tokio runtime (the binary provides one).
pub async fn run_demo(
    cfg: &Config,
    sink: Box<dyn RowSink>,
    mut opts: DemoOptions,
) -> anyhow::Result<DemoSummary> {
    let started = Instant::now();
    let closed = match opts.speed {
        Speed::Max => {
            let (acc, sim) = run_virtual(cfg, sink, &mut opts, None);
            let t_end = sim.time_s();
            let pipeline = sim.into_pipeline();
            let mode = pipeline.controller().mode();
            let (report, counters) = pipeline.finish(t_end, "run complete")?;
            Closed {
                acc,
                counters,
                report,
                mode,
                wall_s: started.elapsed().as_secs_f64(),
            }
        }
        Speed::Factor(f) => {
            let (acc, end) = run_paced(cfg, sink, &mut opts, f).await?;
            let wall_s = started.elapsed().as_secs_f64();
            Closed {
                acc,
                counters: end.counters,
                report: end.report,
                mode: cfg.control.mode,
                wall_s,
            }
        }
    };
    let mut ref_opts = DemoOptions {
        progress: None,
        ..opts
    };
    let (open, _) = run_virtual(
        cfg,
        Box::new(CountingSink::default()),
        &mut ref_opts,
        Some(Mode::Manual),
    );
    Ok(summarise(cfg, &ref_opts, closed, open))
}

fn summarise(cfg: &Config, opts: &DemoOptions, c: Closed, open: RunAcc) -> DemoSummary {
    let axis = |k: usize| {
        let settled = c.acc.truth[1][k].stats();
        let open_loop = open.truth[1][k].stats();
        let rejection_ratio = match (settled, open_loop) {
            (Some(s), Some(o)) if s.rms_from_setpoint_urad > 0.0 => {
                Some(o.rms_about_mean_urad / s.rms_from_setpoint_urad)
            }
            _ => None,
        };
        AxisSummary {
            settling: c.acc.truth[0][k].stats(),
            settled,
            settled_measured: c.acc.measured[1][k].stats(),
            open_loop,
            rejection_ratio,
        }
    };
    let lt = c.counters.limit_ticks;
    let fin = |v: &Vec<f64>| {
        v.iter()
            .map(|x| if x.is_finite() { *x } else { f64::NAN })
            .collect()
    };
    DemoSummary {
        stage: cfg.stage_name.clone(),
        seed: cfg.simulation.seed,
        duration_s: opts.duration_s,
        settle_s: opts.settle_s,
        mode: c.mode.to_string(),
        axes: [axis(0), axis(1)],
        heater_power_min_w: fin(&c.acc.power_min),
        heater_power_max_w: fin(&c.acc.power_max),
        heater_power_limit_w: cfg.legs.iter().map(|l| l.heater_max_power_w).collect(),
        limit_ticks: LimitTicks {
            heater_at_zero: lt[0],
            heater_at_max: lt[1],
            total_power: lt[2],
            tilt_output: lt[3],
            leg_slew: lt[4],
        },
        out_of_range_commands: c.counters.out_of_range_commands,
        ticks: c.counters.ticks,
        ticks_without_tilt: c.counters.ticks_without_tilt,
        recorded: RecordedSummary {
            tilt_rows: c.report.tilt_rows,
            control_rows: c.report.control_rows,
            events: c.report.events,
            dropped_rows: c.report.dropped_rows,
            files: c
                .report
                .files
                .iter()
                .map(|p| p.display().to_string())
                .collect(),
        },
        wall_s: c.wall_s,
        speed_achieved: if c.wall_s > 0.0 {
            opts.duration_s / c.wall_s
        } else {
            f64::INFINITY
        },
    }
}

/// Formats nanoradians for the table (µrad in, "12.3 nrad" or "1.234 µrad" out).
fn fmt_tilt(urad: f64) -> String {
    if !urad.is_finite() {
        "—".into()
    } else if urad.abs() < 1.0 {
        format!("{:.1} nrad", urad * 1e3)
    } else {
        format!("{urad:.3} µrad")
    }
}

/// The summary as a readable table.
pub fn render_table(s: &DemoSummary) -> String {
    use std::fmt::Write;
    let mut o = String::new();
    let h = |x: f64| x / 3600.0;
    let _ = writeln!(o, "stilt demo — {} (seed {})", s.stage, s.seed);
    let _ = writeln!(
        o,
        "simulated {:.1} h in {:.1} s of wall time ({:.0}× real time); settling window: first {:.1} h",
        h(s.duration_s),
        s.wall_s,
        s.speed_achieved,
        h(s.settle_s)
    );
    let _ = writeln!(o);
    let _ = writeln!(
        o,
        "{:<6}{:<30}{:>14}{:>14}{:>16}{:>14}",
        "axis", "window", "mean", "rms*", "rms about mean", "peak-to-peak"
    );
    for (k, a) in s.axes.iter().enumerate() {
        let name = ["x", "y"][k];
        let rows: [(&str, Option<AxisStats>); 4] = [
            ("settling (closed loop)", a.settling),
            ("settled (closed loop)", a.settled),
            ("settled, as measured (1 s)", a.settled_measured),
            ("open loop, same window", a.open_loop),
        ];
        for (label, st) in rows {
            match st {
                Some(st) => {
                    let _ = writeln!(
                        o,
                        "{:<6}{:<30}{:>14}{:>14}{:>16}{:>14}",
                        name,
                        label,
                        fmt_tilt(st.mean_urad),
                        fmt_tilt(st.rms_from_setpoint_urad),
                        fmt_tilt(st.rms_about_mean_urad),
                        fmt_tilt(st.peak_to_peak_urad)
                    );
                }
                None => {
                    let _ = writeln!(o, "{name:<6}{label:<30}{:>14}", "(no samples)");
                }
            }
        }
        match a.rejection_ratio {
            Some(r) => {
                let _ = writeln!(
                    o,
                    "{name:<6}rejection (open rms about mean ÷ closed rms*): {r:.0}×"
                );
            }
            None => {
                let _ = writeln!(
                    o,
                    "{name:<6}rejection: — (run longer than the settling time)"
                );
            }
        }
    }
    let _ = writeln!(
        o,
        "  * rms = RMS deviation from the tilt setpoint; tilt is the plate's true tilt from the simulator,"
    );
    let _ = writeln!(
        o,
        "    except the 'as measured' line, which includes the tiltmeter's own noise."
    );
    let _ = writeln!(o);
    let _ = writeln!(o, "heater power after settling (W):");
    for i in 0..s.heater_power_min_w.len() {
        let _ = writeln!(
            o,
            "  leg {}: {:.3} … {:.3} of 0 … {}",
            i + 1,
            s.heater_power_min_w[i],
            s.heater_power_max_w[i],
            s.heater_power_limit_w[i]
        );
    }
    let l = &s.limit_ticks;
    if l.heater_at_zero + l.heater_at_max + l.total_power + l.tilt_output + l.leg_slew == 0 {
        let _ = writeln!(o, "limits: none hit");
    } else {
        let _ = writeln!(
            o,
            "limits hit (ticks): heater at zero {}, heater at max {}, total power {}, tilt output {}, leg slew {}",
            l.heater_at_zero, l.heater_at_max, l.total_power, l.tilt_output, l.leg_slew
        );
    }
    let _ = writeln!(
        o,
        "heater commands outside 0 … max: {}",
        s.out_of_range_commands
    );
    let r = &s.recorded;
    let _ = writeln!(
        o,
        "recorded: {} tilt rows, {} control rows, {} events, {} dropped",
        r.tilt_rows, r.control_rows, r.events, r.dropped_rows
    );
    for f in &r.files {
        let _ = writeln!(o, "  {f}");
    }
    o
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn durations_parse_with_units() {
        assert_eq!(parse_duration_s("90m"), Ok(5400.0));
        assert_eq!(parse_duration_s("6h"), Ok(21_600.0));
        assert_eq!(parse_duration_s("1.5d"), Ok(129_600.0));
        assert_eq!(parse_duration_s("45"), Ok(45.0));
        for bad in ["", "h", "-3h", "1e400s", "NaNh", "400d", "3 weeks"] {
            let e = parse_duration_s(bad).unwrap_err();
            assert!(e.contains("s, m, h or d"), "{bad}: {e}");
        }
    }

    #[test]
    fn speeds_parse() {
        assert_eq!("max".parse::<Speed>(), Ok(Speed::Max));
        assert_eq!("60x".parse::<Speed>(), Ok(Speed::Factor(60.0)));
        assert!("0".parse::<Speed>().is_err());
        assert!("fast".parse::<Speed>().is_err());
    }
}

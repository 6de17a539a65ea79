//! The pipeline: samples in, control ticks, rows out — the same in every world.
//!
//! A [`Pipeline`] owns the [`Controller`] and the [`RowSink`]. Whatever supplies the
//! readings (the in-process simulated stage, the serial acquisition tasks, a test)
//! calls [`Pipeline::on_tilt`] for every tiltmeter reading and [`Pipeline::on_tick`] once
//! per control period with the latest leg temperatures; the pipeline averages the tilt
//! over the tick, runs the controller, writes a [`ControlRow`] and returns the heater
//! commands for the caller to apply. Commands from people ([`Command`]) change the
//! controller between ticks and are written as events with who asked.
//!
//! No clocks are read here: every call carries its time.

use stilt_config::{Config, LoopGains, Mode};

use crate::core::cascade::{Controller, Inputs, LimitFlags, Outputs};
use crate::core::interlocks::{Alarm, AlarmChange, InterlockInputs, Interlocks};
use crate::rows::{
    ControlRow, EventKind, EventRow, LegRow, Quality, RowSink, SinkError, SinkReport, Stamp,
    TiltSample,
};

/// A change asked for by a person or a program.
#[derive(Debug, Clone, PartialEq)]
pub enum Command {
    /// Switch mode.
    SetMode(Mode),
    /// New tilt target per axis, µrad (ramped).
    SetTiltTarget([f64; 2]),
    /// New common leg temperature bias, °C (ramped).
    SetLegBias(f64),
    /// New per-leg power for manual mode, W.
    SetManualPower(f64),
    /// New gains for both tilt loops (bumpless).
    SetTiltGains(LoopGains),
    /// New gains for every leg loop (bumpless).
    SetLegGains(LoopGains),
    /// A tilt correction held in `temperature` mode, µrad per axis (a step).
    SetTiltCorrection([f64; 2]),
}

#[derive(Debug, Default, Clone)]
struct TiltAccumulator {
    raw: [f64; 2],
    cal: [f64; 2],
    n_ok: u32,
    n_all: u32,
    worst: Option<Quality>,
}

/// Counters over a run, for summaries and status.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct PipelineCounters {
    /// Control ticks run.
    pub ticks: u64,
    /// Tiltmeter readings received.
    pub tilt_samples: u64,
    /// Tilt readings that were not usable.
    pub tilt_bad: u64,
    /// Ticks where the tilt was unusable.
    pub ticks_without_tilt: u64,
    /// Ticks where some leg temperature was unusable.
    pub ticks_missing_leg_temp: u64,
    /// Ticks on which each limit acted: heater at zero, at max, total power, tilt output, leg slew.
    pub limit_ticks: [u64; 5],
    /// Heater commands outside 0 … max (must stay 0; counted to prove it).
    pub out_of_range_commands: u64,
}

/// The pipeline of one run.
pub struct Pipeline {
    cfg: Config,
    controller: Controller,
    sink: Box<dyn RowSink>,
    start_utc_ns: i64,
    acc: TiltAccumulator,
    last_limits: LimitFlags,
    counters: PipelineCounters,
    last_tilt_urad: Option<[f64; 2]>,
    last_leg_temps: Vec<Option<f64>>,
    last_row: Option<ControlRow>,
    interlocks: Interlocks,
    last_applied_w: Vec<f64>,
    readback_w: Vec<Option<f64>>,
    overrun: bool,
    tick_out_of_range: bool,
    sensors_ready_once: bool,
}

impl Pipeline {
    /// A pipeline for `cfg`, writing to `sink`. `start_utc_ns` is the UTC time of run
    /// time 0 (rows carry both clocks).
    pub fn new(cfg: Config, sink: Box<dyn RowSink>, start_utc_ns: i64) -> Self {
        let controller = Controller::new(&cfg);
        let mut p = Pipeline {
            controller,
            sink,
            start_utc_ns,
            acc: TiltAccumulator::default(),
            last_limits: LimitFlags::default(),
            counters: PipelineCounters::default(),
            last_tilt_urad: None,
            last_leg_temps: Vec::new(),
            last_row: None,
            interlocks: Interlocks::new(&cfg),
            last_applied_w: vec![0.0; cfg.legs.len()],
            readback_w: vec![None; cfg.legs.len()],
            overrun: false,
            tick_out_of_range: false,
            sensors_ready_once: false,
            cfg,
        };
        let detail = format!(
            "stage `{}`: {} legs, mode {}, control {} Hz, tiltmeter {} Hz",
            p.cfg.stage_name,
            p.cfg.legs.len(),
            p.cfg.control.mode,
            p.cfg.control.rate_hz,
            p.cfg.tiltmeter.rate_hz
        );
        p.event(0.0, EventKind::RunStart, "stiltd", detail);
        p
    }

    /// The configuration this pipeline runs.
    pub fn config(&self) -> &Config {
        &self.cfg
    }

    /// The controller (read-only).
    pub fn controller(&self) -> &Controller {
        &self.controller
    }

    /// Heater power read back from the supply since the last tick, W per leg (for the
    /// over-power and open-circuit interlocks). Call before [`Pipeline::on_tick`].
    pub fn set_readback(&mut self, readback_w: &[Option<f64>]) {
        self.readback_w = (0..self.cfg.legs.len())
            .map(|i| readback_w.get(i).copied().flatten())
            .collect();
    }

    /// Marks the coming tick as late for its period (the loop-overrun interlock).
    pub fn note_overrun(&mut self) {
        self.overrun = true;
    }

    /// Active and latched alarms.
    pub fn alarms(&self) -> &[Alarm] {
        self.interlocks.alarms()
    }

    /// Acknowledges one alarm or all; writes who did it to the events.
    pub fn acknowledge(
        &mut self,
        t_s: f64,
        id: Option<&str>,
        who: &str,
    ) -> Result<Vec<String>, String> {
        let done = self.interlocks.acknowledge(id, who)?;
        for a in &done {
            self.event(
                t_s,
                EventKind::Acknowledge,
                who,
                format!("acknowledged {a}"),
            );
        }
        Ok(done)
    }

    /// The row written at the last tick.
    pub fn last_row(&self) -> Option<&ControlRow> {
        self.last_row.as_ref()
    }

    /// The controller, for changes between ticks that are not [`Command`]s.
    pub fn controller_mut(&mut self) -> &mut Controller {
        &mut self.controller
    }

    /// Counters so far.
    pub fn counters(&self) -> &PipelineCounters {
        &self.counters
    }

    fn stamp(&self, t_s: f64) -> Stamp {
        Stamp {
            t_mono_s: t_s,
            t_utc_ns: self.start_utc_ns.saturating_add((t_s * 1e9) as i64),
        }
    }

    /// Writes one event.
    pub fn event(&mut self, t_s: f64, kind: EventKind, source: &str, detail: String) {
        let e = EventRow {
            stamp: self.stamp(t_s),
            kind,
            source: source.to_string(),
            detail,
        };
        self.sink.event(&e);
    }

    /// One tiltmeter reading (raw units) with its quality, at time `t_s`.
    pub fn on_tilt(&mut self, t_s: f64, raw: [f64; 2], quality: Quality) {
        let finite = raw[0].is_finite() && raw[1].is_finite();
        // A reading that is already known bad keeps its own quality (timeout, stale …);
        // an "ok" reading that is not a number is a bad frame.
        let mut q = if finite || quality != Quality::Ok {
            quality
        } else {
            Quality::BadFrame
        };
        let cal = if finite {
            self.cfg.tiltmeter.calibrate(raw)
        } else {
            [f64::NAN; 2]
        };
        let range = self.cfg.limits.tilt_range_urad;
        if q == Quality::Ok && (cal[0].abs() > range || cal[1].abs() > range) {
            q = Quality::OutOfRange;
        }
        if q == Quality::OutOfRange {
            self.tick_out_of_range = true;
        }
        self.sink.tilt(&TiltSample {
            stamp: self.stamp(t_s),
            raw,
            tilt_urad: cal,
            quality: q,
        });
        self.counters.tilt_samples += 1;
        let a = &mut self.acc;
        a.n_all += 1;
        if q.is_usable() {
            for k in 0..2 {
                a.raw[k] += raw[k];
                a.cal[k] += cal[k];
            }
            a.n_ok += 1;
        } else {
            self.counters.tilt_bad += 1;
            a.worst = Some(match a.worst {
                Some(w) if w.code() >= q.code() => w,
                _ => q,
            });
        }
    }

    /// Applies a command between ticks and records who asked.
    pub fn command(&mut self, t_s: f64, cmd: Command, source: &str) {
        let (kind, detail) = match cmd {
            Command::SetMode(m) => {
                let old = self.controller.set_mode(m);
                (EventKind::Mode, format!("mode: {old} → {m}"))
            }
            Command::SetTiltTarget(t) => {
                let old = self.controller.tilt_target_urad();
                self.controller.set_tilt_target_urad(t);
                (
                    EventKind::Setpoint,
                    format!(
                        "tilt target µrad: [{}, {}] → [{}, {}]",
                        old[0], old[1], t[0], t[1]
                    ),
                )
            }
            Command::SetLegBias(b) => {
                let old = self.controller.control().leg_bias_c;
                self.controller.set_leg_bias_c(b);
                (EventKind::Setpoint, format!("leg_bias_c: {old} → {b}"))
            }
            Command::SetManualPower(p) => {
                let old = self.controller.control().manual_power_w;
                self.controller.set_manual_power_w(p);
                (EventKind::Setpoint, format!("manual_power_w: {old} → {p}"))
            }
            Command::SetTiltGains(g) => {
                let old = self.controller.control().tilt_loop;
                self.controller.retune_tilt(g, self.last_tilt_urad);
                (
                    EventKind::Gains,
                    format!("tilt_loop: {} → {}", gains_text(&old), gains_text(&g)),
                )
            }
            Command::SetTiltCorrection(c) => {
                let old = self.controller.held_correction_urad();
                self.controller.set_held_correction_urad(c);
                (
                    EventKind::Setpoint,
                    format!(
                        "held tilt correction µrad: [{}, {}] → [{}, {}]",
                        old[0], old[1], c[0], c[1]
                    ),
                )
            }
            Command::SetLegGains(g) => {
                let old = self.controller.control().leg_loop;
                let temps = self.last_leg_temps.clone();
                self.controller.retune_leg(g, &temps);
                (
                    EventKind::Gains,
                    format!("leg_loop: {} → {}", gains_text(&old), gains_text(&g)),
                )
            }
        };
        tracing::info!(source, kind = kind.as_str(), t_s, "{detail}");
        self.event(t_s, kind, source, detail);
    }

    /// One control tick at `t_s` with the latest leg temperatures (°C, quality) in
    /// configuration order. Returns the commands to apply.
    pub fn on_tick(&mut self, t_s: f64, leg_temps: &[(f64, Quality)]) -> Outputs {
        let acc = std::mem::take(&mut self.acc);
        let (tilt, tilt_q, raw_mean) = if acc.n_ok > 0 {
            let n = f64::from(acc.n_ok);
            let cal = [acc.cal[0] / n, acc.cal[1] / n];
            (Some(cal), Quality::Ok, [acc.raw[0] / n, acc.raw[1] / n])
        } else {
            let q = if acc.n_all == 0 {
                Quality::Stale
            } else {
                acc.worst.unwrap_or(Quality::Missing)
            };
            (None, q, [f64::NAN; 2])
        };
        if tilt.is_none() {
            self.counters.ticks_without_tilt += 1;
        }
        self.last_tilt_urad = tilt.or(self.last_tilt_urad);
        let n = self.cfg.legs.len();
        let temps: Vec<Option<f64>> = (0..n)
            .map(|i| match leg_temps.get(i) {
                Some(&(t, q)) if q.is_usable() && t.is_finite() => Some(t),
                _ => None,
            })
            .collect();
        if temps.iter().any(Option::is_none) {
            self.counters.ticks_missing_leg_temp += 1;
        }
        self.last_leg_temps.clone_from(&temps);
        let mut out = self.controller.step(&Inputs {
            now_s: t_s,
            tilt_urad: tilt,
            leg_temp_c: temps.clone(),
        });
        self.guard(t_s, &mut out, &temps, tilt);

        for (p, l) in out.power_w.iter().zip(&self.cfg.legs) {
            if !(0.0..=l.heater_max_power_w).contains(p) {
                self.counters.out_of_range_commands += 1;
            }
        }
        self.note_limits(t_s, out.limits);

        let legs = (0..n)
            .map(|i| LegRow {
                temp_c: temps[i].unwrap_or(f64::NAN),
                temp_quality: leg_temps.get(i).map_or(Quality::Missing, |x| {
                    if temps[i].is_some() {
                        Quality::Ok
                    } else if x.1 == Quality::Ok {
                        Quality::BadFrame
                    } else {
                        x.1
                    }
                }),
                setpoint_c: out.leg_setpoint_c[i],
                power_w: out.power_w[i],
                drive_v: out.drive_v[i],
                terms: out.leg_terms[i],
            })
            .collect();
        let row = ControlRow {
            tick: self.counters.ticks,
            stamp: self.stamp(t_s),
            mode: out.mode,
            tilt_raw: raw_mean,
            tilt_urad: tilt.unwrap_or([f64::NAN; 2]),
            tilt_quality: tilt_q,
            tilt_count: acc.n_ok,
            tilt_setpoint_urad: out.tilt_setpoint_urad,
            tilt_target_urad: out.tilt_target_urad,
            axis_terms: out.axis_terms,
            legs,
        };
        self.sink.control(&row);
        self.counters.ticks += 1;
        self.last_row = Some(row);
        out
    }

    /// Startup inhibit and interlocks: may change `out` before anything is applied.
    fn guard(
        &mut self,
        t_s: f64,
        out: &mut Outputs,
        temps: &[Option<f64>],
        tilt: Option<[f64; 2]>,
    ) {
        let mode = out.mode;
        let commanded = out.power_w.clone();
        let mut power = commanded.clone();
        // Safe by default: heaters stay at zero until every sensor the mode needs has
        // given a usable reading once.
        if !self.sensors_ready_once {
            let ready = match mode {
                Mode::Off | Mode::Manual => true,
                Mode::Temperature => temps.iter().all(Option::is_some),
                Mode::Level => temps.iter().all(Option::is_some) && tilt.is_some(),
            };
            if ready {
                self.sensors_ready_once = true;
                self.event(
                    t_s,
                    EventKind::Mode,
                    "controller",
                    format!("sensors ready: {mode} control starts"),
                );
            } else {
                power = vec![0.0; power.len()];
            }
        }
        let readback = std::mem::replace(&mut self.readback_w, vec![None; commanded.len()]);
        let verdict = self.interlocks.evaluate(&InterlockInputs {
            t_s,
            mode,
            leg_temp_c: temps,
            tilt_urad: tilt,
            tilt_out_of_range: std::mem::take(&mut self.tick_out_of_range),
            commanded_w: &power,
            readback_w: &readback,
            last_applied_w: &self.last_applied_w,
            overrun: std::mem::take(&mut self.overrun),
        });
        for ch in &verdict.changes {
            match ch {
                AlarmChange::Raised(a) => {
                    if a.action == stilt_config::InterlockAction::Safe {
                        tracing::error!(alarm_id = %a.id, action = a.action.as_str(), t_s, "{}: heaters to zero, mode off; acknowledge and restart control when safe", a.message);
                    } else {
                        tracing::warn!(alarm_id = %a.id, action = a.action.as_str(), t_s, "{}", a.message);
                    }
                    let detail = format!("{}: {} (action: {})", a.id, a.message, a.action.as_str());
                    self.event(t_s, EventKind::Alarm, "interlocks", detail);
                }
                AlarmChange::Cleared(id) => {
                    self.event(
                        t_s,
                        EventKind::Alarm,
                        "interlocks",
                        format!("{id}: condition cleared (latched until acknowledged)"),
                    );
                }
            }
        }
        if verdict.safe && mode != Mode::Off {
            self.controller.set_mode(Mode::Off);
            self.event(
                t_s,
                EventKind::Mode,
                "interlocks",
                format!("mode: {mode} → off (safe state)"),
            );
            out.mode = Mode::Off;
        }
        if verdict.power_w != commanded {
            self.controller.override_power(&verdict.power_w);
            out.drive_v = verdict
                .power_w
                .iter()
                .zip(&self.cfg.legs)
                .map(|(p, l)| (p * l.heater_resistance_ohm).sqrt())
                .collect();
            out.power_w.clone_from(&verdict.power_w);
        }
        self.last_applied_w.clone_from(&out.power_w);
    }

    fn note_limits(&mut self, t_s: f64, now: LimitFlags) {
        let flags = [
            now.heater_at_zero,
            now.heater_at_max,
            now.total_power,
            now.tilt_output,
            now.leg_slew,
        ];
        let before = [
            self.last_limits.heater_at_zero,
            self.last_limits.heater_at_max,
            self.last_limits.total_power,
            self.last_limits.tilt_output,
            self.last_limits.leg_slew,
        ];
        const NAMES: [&str; 5] = [
            "heater at zero",
            "heater at maximum",
            "total power limit",
            "tilt loop output limit",
            "leg loop slew limit",
        ];
        for k in 0..5 {
            if flags[k] {
                self.counters.limit_ticks[k] += 1;
            }
            if flags[k] != before[k] {
                let what = if flags[k] { "acting" } else { "released" };
                self.event(
                    t_s,
                    EventKind::Limit,
                    "controller",
                    format!("{}: {what}", NAMES[k]),
                );
            }
        }
        self.last_limits = now;
    }

    /// Ends the run: writes the end event and closes the sink.
    pub fn finish(
        mut self,
        t_s: f64,
        why: &str,
    ) -> Result<(SinkReport, PipelineCounters), SinkError> {
        self.event(t_s, EventKind::RunEnd, "stiltd", why.to_string());
        let report = self.sink.finish()?;
        Ok((report, self.counters))
    }
}

/// `kp=…, ti_s=…, td_s=…` for the audit trail.
fn gains_text(g: &LoopGains) -> String {
    let ti = g.ti_s.map_or("none".to_string(), |t| t.to_string());
    format!("kp={}, ti_s={ti}, td_s={}", g.kp, g.td_s)
}

//! The cascade controller: modes, tilt loops, leg loops, limits, in one pure `step`.
//!
//! ```text
//! tilt setpoint (ramped) ─► tilt PID x,y ─► correction (µrad) ─► geometry⁻¹ ─► leg ΔT pattern
//!                                                                   │
//! leg bias (ramped) ────────────────────────────────────────────────┴─► leg setpoints
//! leg setpoints ─► leg PID ×N ─► power 0…max ─► total-power clamp ─► drive V = √(P·R)
//! ```
//!
//! Modes: `off` (heaters at zero), `manual` (fixed heater powers), `temperature` (leg
//! loops hold each leg at the bias), `level` (the full cascade). Every loop that is not
//! in charge tracks the output actually applied, and every setpoint that is not in use
//! follows the measurement, so any change of mode is bumpless: outputs continue from
//! where they were and setpoints ramp from where the stage is.
//!
//! The tilt loops use conditional integration while any leg loop is saturated (a
//! heater at zero or at its maximum), so the outer integrators do not wind up against
//! a limit they cannot see.

use stilt_config::{Config, Control, LoopGains, Mode};

use super::geometry::Geometry;
use super::pid::{OutputLimits, Pid};
use super::ramp::Ramp;
use crate::rows::LoopTerms;

/// What the controller sees at one tick.
#[derive(Debug, Clone, PartialEq)]
pub struct Inputs {
    /// Time of this tick, seconds on the run's clock.
    pub now_s: f64,
    /// Calibrated tilt averaged over the tick, µrad, or `None` when unusable.
    pub tilt_urad: Option<[f64; 2]>,
    /// Each leg's temperature, °C, or `None` when unusable.
    pub leg_temp_c: Vec<Option<f64>>,
}

/// Which limits acted during one tick.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
pub struct LimitFlags {
    /// Some heater command was clamped at zero.
    pub heater_at_zero: bool,
    /// Some heater command was clamped at its maximum.
    pub heater_at_max: bool,
    /// The sum of heater powers was scaled down to the total limit.
    pub total_power: bool,
    /// A tilt loop's output was clamped or slew limited.
    pub tilt_output: bool,
    /// A leg loop's output was slew limited.
    pub leg_slew: bool,
}

impl LimitFlags {
    /// Whether any limit acted.
    pub fn any(&self) -> bool {
        self.heater_at_zero
            || self.heater_at_max
            || self.total_power
            || self.tilt_output
            || self.leg_slew
    }
}

/// What the controller commands at one tick.
#[derive(Debug, Clone, PartialEq)]
pub struct Outputs {
    /// Mode this tick ran in.
    pub mode: Mode,
    /// Heater power per leg, W, always within 0 … max and the total limit.
    pub power_w: Vec<f64>,
    /// Heater drive per leg, V (√(P·R)).
    pub drive_v: Vec<f64>,
    /// Leg temperature setpoints in use, °C.
    pub leg_setpoint_c: Vec<f64>,
    /// Each leg loop's terms.
    pub leg_terms: Vec<LoopTerms>,
    /// Tilt setpoint in use (ramped), µrad.
    pub tilt_setpoint_urad: [f64; 2],
    /// Tilt target, µrad.
    pub tilt_target_urad: [f64; 2],
    /// Each tilt loop's terms (output: commanded correction, µrad).
    pub axis_terms: [LoopTerms; 2],
    /// Limits that acted.
    pub limits: LimitFlags,
}

#[derive(Debug, Clone)]
struct LegLimits {
    max_power_w: f64,
    resistance_ohm: f64,
}

/// The whole cascade's state.
#[derive(Debug, Clone)]
pub struct Controller {
    control: Control,
    max_total_power_w: f64,
    geometry: Geometry,
    legs: Vec<LegLimits>,
    mode: Mode,
    tilt_sp: [Ramp; 2],
    leg_bias: Vec<Ramp>,
    axis_pid: [Pid; 2],
    leg_pid: Vec<Pid>,
    power_w: Vec<f64>,
    last_now_s: Option<f64>,
    any_leg_saturated: bool,
    /// Tilt correction held in `temperature` mode, µrad per axis (open-loop tilt drive).
    held_correction_urad: [f64; 2],
    last_leg_sp: Vec<f64>,
    last_leg_y: Vec<f64>,
}

impl Controller {
    /// A controller for a validated configuration, starting in its configured mode
    /// with every heater at zero.
    pub fn new(cfg: &Config) -> Self {
        let c = cfg.control.clone();
        let lim = c.tilt_output_limit_urad;
        let axis = |_| {
            Pid::new(
                c.tilt_loop,
                OutputLimits {
                    min: -lim,
                    max: lim,
                },
                0.0,
            )
        };
        let leg_pid = cfg
            .legs
            .iter()
            .map(|l| {
                Pid::new(
                    c.leg_loop,
                    OutputLimits {
                        min: 0.0,
                        max: l.heater_max_power_w,
                    },
                    0.0,
                )
            })
            .collect();
        Controller {
            max_total_power_w: cfg.limits.max_total_power_w,
            geometry: Geometry::new(&cfg.legs),
            legs: cfg
                .legs
                .iter()
                .map(|l| LegLimits {
                    max_power_w: l.heater_max_power_w,
                    resistance_ohm: l.heater_resistance_ohm,
                })
                .collect(),
            mode: c.mode,
            tilt_sp: [0, 1].map(|k| Ramp {
                value: c.setpoint_urad[k],
                target: c.setpoint_urad[k],
                rate_per_s: c.setpoint_ramp_urad_per_s,
            }),
            leg_bias: cfg
                .legs
                .iter()
                .map(|_| Ramp::at(c.leg_bias_c, c.leg_bias_ramp_k_per_s))
                .collect(),
            axis_pid: [0, 1].map(axis),
            leg_pid,
            power_w: vec![0.0; cfg.legs.len()],
            last_now_s: None,
            any_leg_saturated: false,
            held_correction_urad: [0.0; 2],
            last_leg_sp: vec![f64::NAN; cfg.legs.len()],
            last_leg_y: vec![f64::NAN; cfg.legs.len()],
            control: c,
        }
    }

    /// The mode in force.
    pub fn mode(&self) -> Mode {
        self.mode
    }

    /// Changes the mode from the next tick on; returns the previous mode. A change of
    /// mode clears the held tilt correction (see [`Self::set_held_correction_urad`]).
    pub fn set_mode(&mut self, mode: Mode) -> Mode {
        if mode != self.mode {
            self.held_correction_urad = [0.0; 2];
        }
        std::mem::replace(&mut self.mode, mode)
    }

    /// The tilt correction held in `temperature` mode, µrad per axis.
    pub fn held_correction_urad(&self) -> [f64; 2] {
        self.held_correction_urad
    }

    /// Holds a tilt correction in `temperature` mode: each leg's setpoint becomes its bias
    /// plus the geometry's offset for this correction, at once (a step, for open-loop
    /// tests of the tilt plant). The tilt loops track it, so switching to `level` goes on
    /// from it bumplessly. Ignored in other modes; cleared by a change of mode. The caller
    /// checks it against `control.tilt_output_limit_urad`.
    pub fn set_held_correction_urad(&mut self, c: [f64; 2]) {
        self.held_correction_urad = c.map(|v| if v.is_finite() { v } else { 0.0 });
    }

    /// The tilt target per axis, µrad.
    pub fn tilt_target_urad(&self) -> [f64; 2] {
        [self.tilt_sp[0].target, self.tilt_sp[1].target]
    }

    /// Sets a new tilt target; the setpoint in use ramps towards it.
    pub fn set_tilt_target_urad(&mut self, target: [f64; 2]) {
        for k in 0..2 {
            self.tilt_sp[k].target = target[k];
        }
        self.control.setpoint_urad = target;
    }

    /// Sets a new common leg temperature bias; leg setpoints ramp towards it.
    pub fn set_leg_bias_c(&mut self, bias_c: f64) {
        for r in &mut self.leg_bias {
            r.target = bias_c;
        }
        self.control.leg_bias_c = bias_c;
    }

    /// Sets the per-leg heater power used in `manual` mode (clamped per heater each tick).
    pub fn set_manual_power_w(&mut self, p: f64) {
        self.control.manual_power_w = p;
    }

    /// Steps each leg's temperature setpoint to `setpoints_c` at once, without the ramp
    /// (step tests in `temperature` mode); non-finite entries and extra entries are ignored.
    pub fn step_leg_setpoints_c(&mut self, setpoints_c: &[f64]) {
        for (r, &sp) in self.leg_bias.iter_mut().zip(setpoints_c) {
            if sp.is_finite() {
                r.value = sp;
                r.target = sp;
            }
        }
    }

    /// The control settings in force (including changes made since start).
    pub fn control(&self) -> &Control {
        &self.control
    }

    /// New tilt loop gains, applied bumplessly.
    pub fn retune_tilt(&mut self, gains: LoopGains, measured_urad: Option<[f64; 2]>) {
        for k in 0..2 {
            let y = measured_urad.map_or(f64::NAN, |m| m[k]);
            self.axis_pid[k].retune(gains, self.tilt_sp[k].value, y);
        }
        self.control.tilt_loop = gains;
    }

    /// New leg loop gains, applied bumplessly.
    pub fn retune_leg(&mut self, gains: LoopGains, measured_c: &[Option<f64>]) {
        for (i, pid) in self.leg_pid.iter_mut().enumerate() {
            let y = measured_c.get(i).copied().flatten().unwrap_or(f64::NAN);
            pid.retune(gains, self.leg_bias[i].value, y);
        }
        self.control.leg_loop = gains;
    }

    /// The heater powers commanded at the last tick, W.
    pub fn power_w(&self) -> &[f64] {
        &self.power_w
    }

    /// Tells the controller that something else (an interlock, the startup inhibit)
    /// overrode the powers it commanded at the last tick: the leg loops track what was
    /// applied, so that control resumes without a bump, and the tilt loops stop
    /// integrating at the next tick.
    pub fn override_power(&mut self, applied_w: &[f64]) {
        for (i, pid) in self.leg_pid.iter_mut().enumerate() {
            let p = applied_w.get(i).copied().unwrap_or(0.0);
            pid.track(self.last_leg_sp[i], self.last_leg_y[i], p);
        }
        self.power_w = applied_w.to_vec();
        self.any_leg_saturated = true;
    }

    /// One control tick.
    pub fn step(&mut self, inp: &Inputs) -> Outputs {
        let period = self.control.period_s();
        let h = match self.last_now_s {
            Some(t) if inp.now_s > t => inp.now_s - t,
            Some(_) => 0.0,
            None => period,
        };
        self.last_now_s = Some(inp.now_s.max(self.last_now_s.unwrap_or(f64::MIN)));
        let n = self.legs.len();
        let temp = |i: usize| inp.leg_temp_c.get(i).copied().flatten().unwrap_or(f64::NAN);
        let tilt = |k: usize| inp.tilt_urad.map_or(f64::NAN, |t| t[k]);
        let mut limits = LimitFlags::default();

        // Tilt setpoints: ramp in level mode, otherwise follow the plate (bumpless entry).
        for k in 0..2 {
            if self.mode == Mode::Level {
                self.tilt_sp[k].advance(h);
            } else if tilt(k).is_finite() {
                self.tilt_sp[k].value = tilt(k);
            }
        }
        // Leg bias: ramps in temperature and level modes, otherwise follows each leg.
        let auto_legs = matches!(self.mode, Mode::Temperature | Mode::Level);
        for i in 0..n {
            if auto_legs {
                self.leg_bias[i].advance(h);
            } else if temp(i).is_finite() {
                self.leg_bias[i].value = temp(i);
            }
        }

        // Outer loops.
        let mut axis_terms = [LoopTerms::default(); 2];
        let correction = if self.mode == Mode::Level {
            let integrate = !self.any_leg_saturated;
            for k in 0..2 {
                axis_terms[k] =
                    self.axis_pid[k].step_with(h, self.tilt_sp[k].value, tilt(k), integrate);
                limits.tilt_output |= self.axis_pid[k].limited;
            }
            [axis_terms[0].out, axis_terms[1].out]
        } else {
            let held = if self.mode == Mode::Temperature {
                self.held_correction_urad
            } else {
                [0.0; 2]
            };
            for k in 0..2 {
                axis_terms[k] = self.axis_pid[k].track(self.tilt_sp[k].value, tilt(k), held[k]);
            }
            held
        };
        let offsets = self.geometry.temperature_offsets_for_tilt(correction);
        let leg_sp: Vec<f64> = (0..n)
            .map(|i| self.leg_bias[i].value + offsets[i])
            .collect();

        // Inner loops.
        let mut leg_terms = Vec::with_capacity(n);
        let mut power = vec![0.0; n];
        let mut saturated = false;
        for i in 0..n {
            let max = self.legs[i].max_power_w;
            let t = match self.mode {
                Mode::Off => self.leg_pid[i].track(leg_sp[i], temp(i), 0.0),
                Mode::Manual => {
                    self.leg_pid[i].track(leg_sp[i], temp(i), self.control.manual_power_w.min(max))
                }
                Mode::Temperature | Mode::Level => {
                    let t = self.leg_pid[i].step(h, leg_sp[i], temp(i));
                    if self.leg_pid[i].limited {
                        if t.out <= 0.0 {
                            limits.heater_at_zero = true;
                            saturated = true;
                        } else if t.out >= max {
                            limits.heater_at_max = true;
                            saturated = true;
                        } else {
                            limits.leg_slew = true;
                        }
                    }
                    t
                }
            };
            // Heaters only heat, and never beyond their maximum: enforced here again,
            // whatever the loop said (NaN → 0).
            power[i] = if t.out.is_finite() {
                t.out.clamp(0.0, max)
            } else {
                0.0
            };
            leg_terms.push(t);
        }
        let total: f64 = power.iter().sum();
        if total > self.max_total_power_w {
            let s = self.max_total_power_w / total;
            for (i, p) in power.iter_mut().enumerate() {
                *p *= s;
                // The loops learn the scaled output, so they do not wind up against it.
                self.leg_pid[i].track(leg_sp[i], temp(i), *p);
            }
            limits.total_power = true;
            saturated = true;
        }
        self.any_leg_saturated = saturated;
        self.power_w.clone_from(&power);
        self.last_leg_sp.clone_from(&leg_sp);
        self.last_leg_y = (0..n).map(temp).collect();
        let drive_v = power
            .iter()
            .zip(&self.legs)
            .map(|(p, l)| (p * l.resistance_ohm).sqrt())
            .collect();
        Outputs {
            mode: self.mode,
            power_w: power,
            drive_v,
            leg_setpoint_c: leg_sp,
            leg_terms,
            tilt_setpoint_urad: [self.tilt_sp[0].value, self.tilt_sp[1].value],
            tilt_target_urad: self.tilt_target_urad(),
            axis_terms,
            limits,
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn demo() -> Config {
        stilt_config::load_str(stilt_config::DEMO_SCENARIO, "demo").unwrap()
    }

    fn inputs(t: f64, tilt: [f64; 2], temps: [f64; 3]) -> Inputs {
        Inputs {
            now_s: t,
            tilt_urad: Some(tilt),
            leg_temp_c: temps.iter().map(|&x| Some(x)).collect(),
        }
    }

    #[test]
    fn off_means_zero_power() {
        let mut cfg = demo();
        cfg.control.mode = Mode::Off;
        let mut c = Controller::new(&cfg);
        let o = c.step(&inputs(0.0, [3.0, -2.0], [20.0, 21.0, 22.0]));
        assert_eq!(o.power_w, vec![0.0; 3]);
        assert_eq!(o.drive_v, vec![0.0; 3]);
    }

    #[test]
    fn drive_voltage_is_sqrt_p_r() {
        let mut cfg = demo();
        cfg.control.mode = Mode::Manual;
        cfg.control.manual_power_w = 0.5;
        let mut c = Controller::new(&cfg);
        let o = c.step(&inputs(0.0, [0.0, 0.0], [21.0; 3]));
        // P = V²/R (Joule's law): 0.5 W into 50 Ω needs 5 V.
        for v in &o.drive_v {
            assert!((v - 5.0).abs() < 1e-12);
        }
    }

    #[test]
    fn power_stays_within_limits_for_wild_inputs() {
        let mut c = Controller::new(&demo());
        let temps = [-100.0, 500.0, f64::NAN];
        for k in 0..200 {
            let o = c.step(&Inputs {
                now_s: k as f64,
                tilt_urad: if k % 3 == 0 { None } else { Some([1e4, -1e4]) },
                leg_temp_c: temps
                    .iter()
                    .map(|&t| if t.is_nan() { None } else { Some(t) })
                    .collect(),
            });
            for p in &o.power_w {
                assert!((0.0..=2.0).contains(p), "{p}");
            }
            assert!(o.power_w.iter().sum::<f64>() <= 6.0 + 1e-12);
        }
    }

    #[test]
    fn total_power_limit_scales_down() {
        let mut cfg = demo();
        cfg.control.mode = Mode::Manual;
        cfg.control.manual_power_w = 2.0;
        cfg.limits.max_total_power_w = 3.0;
        let mut c = Controller::new(&cfg);
        let o = c.step(&inputs(0.0, [0.0; 2], [21.0; 3]));
        assert!((o.power_w.iter().sum::<f64>() - 3.0).abs() < 1e-12);
        assert!(o.limits.total_power);
    }

    #[test]
    fn mode_changes_are_bumpless() {
        let mut cfg = demo();
        cfg.control.mode = Mode::Manual;
        cfg.control.manual_power_w = 1.0;
        let mut c = Controller::new(&cfg);
        let temps = [24.0, 24.1, 23.9];
        for k in 0..10 {
            c.step(&inputs(k as f64, [0.5, -0.2], temps));
        }
        c.set_mode(Mode::Temperature);
        let o = c.step(&inputs(10.0, [0.5, -0.2], temps));
        // The only change allowed is what the setpoint ramp moved within this one tick:
        // |Δu| ≤ Kp · ramp rate · h.
        let allowed = cfg.control.leg_loop.kp * cfg.control.leg_bias_ramp_k_per_s * 1.0 + 1e-9;
        for p in &o.power_w {
            assert!(
                (p - 1.0).abs() <= allowed,
                "manual → temperature jumped to {p}"
            );
        }
        // The leg setpoints start at the measured temperatures and ramp.
        for (sp, t) in o.leg_setpoint_c.iter().zip(temps) {
            assert!((sp - t).abs() <= cfg.control.leg_bias_ramp_k_per_s + 1e-12);
        }
        for k in 11..20 {
            c.step(&inputs(k as f64, [0.5, -0.2], temps));
        }
        let before = c.power_w().to_vec();
        c.set_mode(Mode::Level);
        let o = c.step(&inputs(20.0, [0.5, -0.2], temps));
        for (a, b) in before.iter().zip(&o.power_w) {
            assert!((a - b).abs() < 0.02, "temperature → level jumped {a} → {b}");
        }
        assert_eq!(o.tilt_setpoint_urad[0], 0.5 - 0.0 * 1.0 - 0.01 * 1.0);
    }

    #[test]
    fn tilt_error_heats_the_leg_on_the_low_side() {
        // Plate low on +x (tilt_x = −1 µrad, setpoint 0) → leg A (at +x) must get the
        // highest temperature setpoint.
        let mut c = Controller::new(&demo());
        let mut o = c.step(&inputs(0.0, [-1.0, 0.0], [24.0; 3]));
        for k in 1..100 {
            o = c.step(&inputs(k as f64, [-1.0, 0.0], [24.0; 3]));
        }
        assert!(
            o.leg_setpoint_c[0] > o.leg_setpoint_c[1] && o.leg_setpoint_c[0] > o.leg_setpoint_c[2]
        );
        let mean = o.leg_setpoint_c.iter().sum::<f64>() / 3.0;
        assert!(
            (mean - 24.0).abs() < 1e-9,
            "the correction must not move the mean: {mean}"
        );
    }
}

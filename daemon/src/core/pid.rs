//! One discrete PID loop.
//!
//! The control law is the ideal (ISA) form with setpoint weighting on P and the
//! derivative acting on the filtered measurement only (so setpoint steps never kick
//! the output):
//!
//! ```text
//! P = Kp·(b·r − y)
//! I += Kp·h/Ti·(r − y) + h/Tt·(u − v)          (back-calculation anti-windup)
//! D = Tf/(Tf + h)·D − Kp·Td/(Tf + h)·(y − y_prev)  (backward difference, filter Tf)
//! v = P + I + D,  u = clamp(slew(v))
//! ```
//!
//! This is the discretisation given by Åström & Hägglund, "Advanced PID Control"
//! (ISA, 2006), ch. 13 (from memory). The integral update uses the *limited* output u,
//! so the integrator stops winding up as soon as the output saturates or is slew
//! limited, and unwinds with time constant Tt.
//!
//! Bumpless transfer: while the loop is not in charge (manual or off), call
//! [`Pid::track`] each tick with the output actually applied; the integrator is then
//! set so that switching to automatic continues from that output. Gain changes through
//! [`Pid::retune`] adjust the integrator so the output does not jump.

use stilt_config::LoopGains;

use crate::rows::LoopTerms;

/// Output limits of a loop.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct OutputLimits {
    /// Lowest output.
    pub min: f64,
    /// Highest output.
    pub max: f64,
}

/// State of one PID loop.
#[derive(Debug, Clone, PartialEq)]
pub struct Pid {
    gains: LoopGains,
    limits: OutputLimits,
    integral: f64,
    derivative: f64,
    y_prev: Option<f64>,
    u_prev: f64,
    /// Whether the last step's output was limited (clamp or slew).
    pub limited: bool,
}

impl Pid {
    /// A loop at rest with output `u0`.
    pub fn new(gains: LoopGains, limits: OutputLimits, u0: f64) -> Self {
        Pid {
            gains,
            limits,
            integral: u0,
            derivative: 0.0,
            y_prev: None,
            u_prev: u0.clamp(limits.min, limits.max),
            limited: false,
        }
    }

    /// The gains in use.
    pub fn gains(&self) -> &LoopGains {
        &self.gains
    }

    /// The last output.
    pub fn output(&self) -> f64 {
        self.u_prev
    }

    /// One automatic step of `h` seconds with setpoint `r` and measurement `y`.
    pub fn step(&mut self, h: f64, r: f64, y: f64) -> LoopTerms {
        self.step_with(h, r, y, true)
    }

    /// Like [`Pid::step`], but the integral error term is skipped when `integrate` is
    /// false (conditional integration, used when a loop downstream is saturated).
    pub fn step_with(&mut self, h: f64, r: f64, y: f64, integrate: bool) -> LoopTerms {
        let g = self.gains;
        if h.is_nan() || h <= 0.0 || !r.is_finite() || !y.is_finite() {
            // Nothing sensible to do: hold the output.
            return self.hold_terms();
        }
        let p = g.kp * (g.setpoint_weight * r - y);
        let d = match self.y_prev {
            Some(yp) if g.td_s > 0.0 => {
                let tf = g.derivative_filter_s;
                (tf / (tf + h)) * self.derivative - g.kp * g.td_s / (tf + h) * (y - yp)
            }
            _ => 0.0,
        };
        let v = p + self.integral + d;
        let mut u = v;
        if let Some(slew) = g.slew_per_s {
            let m = slew * h;
            u = u.clamp(self.u_prev - m, self.u_prev + m);
        }
        u = u.clamp(self.limits.min, self.limits.max);
        self.limited = u != v;
        let i_now = self.integral;
        if let Some(ti) = g.ti_s {
            let e_term = if integrate {
                g.kp * h / ti * (r - y)
            } else {
                0.0
            };
            self.integral += e_term + h / g.tracking_time_s * (u - v);
        } else {
            // No integral action: the "integral" holds the bias that keeps u continuous
            // after a switch, and stays fixed.
        }
        self.derivative = d;
        self.y_prev = Some(y);
        self.u_prev = u;
        LoopTerms {
            p,
            i: i_now,
            d,
            out: u,
        }
    }

    fn hold_terms(&self) -> LoopTerms {
        LoopTerms {
            p: 0.0,
            i: self.integral,
            d: 0.0,
            out: self.u_prev,
        }
    }

    /// Follows an output applied by someone else (manual, off, or a limit) so that a
    /// later switch to automatic is bumpless. `r` and `y` are the current setpoint and
    /// measurement (y may be NaN when unknown).
    pub fn track(&mut self, r: f64, y: f64, u_applied: f64) -> LoopTerms {
        let g = self.gains;
        let p = if r.is_finite() && y.is_finite() {
            g.kp * (g.setpoint_weight * r - y)
        } else {
            0.0
        };
        let u = u_applied.clamp(self.limits.min, self.limits.max);
        self.integral = u - p;
        self.derivative = 0.0;
        self.y_prev = y.is_finite().then_some(y);
        self.u_prev = u;
        self.limited = false;
        LoopTerms {
            p,
            i: self.integral,
            d: 0.0,
            out: u,
        }
    }

    /// Changes gains without a bump: the integrator absorbs the change of the
    /// proportional term at the current setpoint and measurement.
    pub fn retune(&mut self, gains: LoopGains, r: f64, y: f64) {
        if r.is_finite() && y.is_finite() {
            let old_p = self.gains.kp * (self.gains.setpoint_weight * r - y);
            let new_p = gains.kp * (gains.setpoint_weight * r - y);
            self.integral += old_p - new_p;
        }
        self.derivative = 0.0;
        self.gains = gains;
    }

    /// Changes the output limits (e.g. a new heater maximum); the output is re-clamped.
    pub fn set_limits(&mut self, limits: OutputLimits) {
        self.limits = limits;
        self.u_prev = self.u_prev.clamp(limits.min, limits.max);
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn gains(kp: f64, ti: Option<f64>) -> LoopGains {
        LoopGains {
            kp,
            ti_s: ti,
            td_s: 0.0,
            derivative_filter_s: 0.0,
            setpoint_weight: 1.0,
            tracking_time_s: ti.unwrap_or(1.0),
            slew_per_s: None,
        }
    }

    const WIDE: OutputLimits = OutputLimits {
        min: -1e9,
        max: 1e9,
    };

    /// First-order plant K/(τs+1) under zero-order hold: y' = a·y + (1 − a)·K·u with
    /// a = e^{−T/τ} (Åström & Wittenmark, "Computer-Controlled Systems", ZOH sampling
    /// of a first-order system; from memory).
    struct Plant {
        a: f64,
        k: f64,
        y: f64,
    }
    impl Plant {
        fn new(k: f64, tau: f64, t: f64) -> Self {
            Plant {
                a: (-t / tau).exp(),
                k,
                y: 0.0,
            }
        }
        fn step(&mut self, u: f64) -> f64 {
            self.y = self.a * self.y + (1.0 - self.a) * self.k * u;
            self.y
        }
    }

    #[test]
    fn p_only_steady_state_error_is_one_over_one_plus_k_kp() {
        // Closed form for proportional control of a static-gain-K plant: e_ss = r/(1 + K·Kp)
        // (any control textbook, e.g. Ogata, "Modern Control Engineering", type-0 systems).
        for &(k, kp) in &[(2.0, 1.5), (0.5, 4.0), (3.3, 8.0)] {
            let mut pid = Pid::new(gains(kp, None), WIDE, 0.0);
            pid.integral = 0.0;
            let mut plant = Plant::new(k, 20.0, 1.0);
            let mut y = 0.0;
            for _ in 0..5000 {
                let u = pid.step(1.0, 1.0, y).out;
                y = plant.step(u);
            }
            let e = 1.0 - y;
            assert!(
                (e - 1.0 / (1.0 + k * kp)).abs() < 1e-9,
                "k={k} kp={kp} e={e}"
            );
        }
    }

    #[test]
    fn zoh_step_response_of_first_order_plant_is_k_one_minus_a_to_the_n() {
        // y(nT) = K·(1 − aⁿ), a = e^{−T/τ}: the exact sampled step response.
        let (k, tau, t) = (3.0, 50.0, 2.0);
        let mut plant = Plant::new(k, tau, t);
        let a = (-t / tau).exp();
        for n in 1..=200 {
            let y = plant.step(1.0);
            assert!((y - k * (1.0 - a.powi(n))).abs() < 1e-12);
        }
    }

    #[test]
    fn integral_action_removes_the_error() {
        let mut pid = Pid::new(gains(1.0, Some(30.0)), WIDE, 0.0);
        pid.integral = 0.0;
        let mut plant = Plant::new(2.0, 20.0, 1.0);
        let mut y = 0.0;
        for _ in 0..3000 {
            let u = pid.step(1.0, 1.0, y).out;
            y = plant.step(u);
        }
        assert!((1.0 - y).abs() < 1e-6);
    }

    #[test]
    fn output_is_clamped_and_anti_windup_limits_overshoot() {
        let lim = OutputLimits { min: 0.0, max: 0.6 };
        let run = |tt: f64| {
            let mut g = gains(2.0, Some(20.0));
            g.tracking_time_s = tt;
            let mut pid = Pid::new(g, lim, 0.0);
            let mut plant = Plant::new(2.0, 20.0, 1.0);
            let (mut y, mut peak) = (0.0, 0.0f64);
            for _ in 0..2000 {
                let u = pid.step(1.0, 1.0, y).out;
                assert!((0.0..=0.6).contains(&u));
                y = plant.step(u);
                peak = peak.max(y);
            }
            peak
        };
        // With back-calculation (Tt = 10 s) the integrator unwinds while saturated;
        // with a huge Tt it barely does, and the output stays saturated longer.
        let with = run(10.0);
        let without = run(1e12);
        assert!(with < without, "with {with} without {without}");
    }

    #[test]
    fn slew_limit_bounds_each_change() {
        let mut g = gains(100.0, None);
        g.slew_per_s = Some(0.05);
        let mut pid = Pid::new(g, WIDE, 0.0);
        let mut last = 0.0;
        for _ in 0..10 {
            let u = pid.step(2.0, 1.0, 0.0).out;
            assert!((u - last).abs() <= 0.1 + 1e-12);
            last = u;
        }
        assert!(pid.limited);
    }

    #[test]
    fn derivative_acts_on_measurement_not_setpoint() {
        let mut g = gains(1.0, None);
        g.td_s = 5.0;
        g.derivative_filter_s = 0.5;
        let mut pid = Pid::new(g, WIDE, 0.0);
        pid.integral = 0.0;
        pid.step(1.0, 0.0, 0.0);
        let t = pid.step(1.0, 10.0, 0.0); // setpoint step, measurement unchanged
        assert_eq!(t.d, 0.0);
        let t = pid.step(1.0, 10.0, 1.0); // measurement rises → negative D
        assert!(t.d < 0.0);
    }

    #[test]
    fn setpoint_weight_scales_the_proportional_kick() {
        let mut g = gains(2.0, Some(100.0));
        g.setpoint_weight = 0.25;
        let mut pid = Pid::new(g, WIDE, 0.0);
        pid.integral = 0.0;
        let t = pid.step(1.0, 4.0, 0.0);
        assert_eq!(t.p, 2.0 * 0.25 * 4.0);
    }

    #[test]
    fn manual_to_auto_is_bumpless() {
        let mut pid = Pid::new(gains(3.0, Some(50.0)), WIDE, 0.0);
        for _ in 0..10 {
            pid.track(1.0, 0.4, 0.77);
        }
        let t = pid.step(1.0, 1.0, 0.4);
        // The first automatic output equals the last applied one: the integral
        // increment of this tick only acts from the next tick on.
        assert!((t.out - 0.77).abs() < 1e-12, "{}", t.out);
    }

    #[test]
    fn gain_change_is_bumpless() {
        let mut pid = Pid::new(gains(3.0, Some(50.0)), WIDE, 0.0);
        for _ in 0..20 {
            pid.step(1.0, 1.0, 0.4);
        }
        // What the old gains would output next, against what the new gains output.
        let mut old = pid.clone();
        let expected = old.step(1e-9, 1.0, 0.4).out;
        pid.retune(gains(9.0, Some(10.0)), 1.0, 0.4);
        let after = pid.step(1e-9, 1.0, 0.4).out;
        assert!((after - expected).abs() < 1e-6, "{expected} → {after}");
        // And a plain P change without retune would have jumped: the test can fail.
        let mut naive = old.clone();
        naive.gains.kp = 9.0;
        assert!((naive.step(1e-9, 1.0, 0.4).out - expected).abs() > 0.1);
    }

    #[test]
    fn nan_measurement_holds_output() {
        let mut pid = Pid::new(gains(3.0, Some(50.0)), WIDE, 0.0);
        pid.step(1.0, 1.0, 0.5);
        let u = pid.output();
        let t = pid.step(1.0, 1.0, f64::NAN);
        assert_eq!(t.out, u);
    }
}

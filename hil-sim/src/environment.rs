//! The room and the floor: what disturbs the stage.
//!
//! [`Room`] is the air: a mean, a daily sinusoid, a slow random wander (an
//! Ornstein–Uhlenbeck process, advanced exactly), and a gradient across the stage with a
//! static and a daily part. [`Floor`] is the ground's own tilt: a steady drift plus a
//! daily wobble. Both are functions of simulated time and their own noise stream only.

use stilt_config::Simulation;

use crate::DAY_S;
use crate::noise::{Noise, streams};

/// The air around the stage.
pub struct Room {
    mean_c: f64,
    swing_k: f64,
    phase: f64,
    walk_sigma_k: f64,
    walk_tau_s: f64,
    walk_k: f64,
    gradient: [f64; 2],
    gradient_daily: [f64; 2],
    gradient_phase: f64,
    noise: Noise,
    last_t: f64,
}

impl Room {
    /// The room of a scenario. `setup` draws the phases of the daily cycles.
    pub fn new(sim: &Simulation, setup: &mut Noise) -> Self {
        Room {
            mean_c: sim.ambient_mean_c,
            swing_k: sim.ambient_daily_swing_k,
            phase: std::f64::consts::TAU * setup.uniform(),
            walk_sigma_k: sim.ambient_walk_k,
            walk_tau_s: sim.ambient_walk_correlation_h * 3600.0,
            walk_k: 0.0,
            gradient: sim.gradient_k_per_m,
            gradient_daily: sim.gradient_daily_k_per_m,
            gradient_phase: std::f64::consts::TAU * setup.uniform(),
            noise: Noise::new(sim.seed, streams::AMBIENT),
            last_t: 0.0,
        }
    }

    /// Advances the random wander to time `t_s` (exact OU update over the interval).
    pub fn advance_to(&mut self, t_s: f64) {
        let dt = t_s - self.last_t;
        if dt <= 0.0 {
            return;
        }
        let a = (-dt / self.walk_tau_s).exp();
        self.walk_k =
            self.walk_k * a + self.walk_sigma_k * (1.0 - a * a).sqrt() * self.noise.gauss();
        self.last_t = t_s;
    }

    /// Air temperature at the stage's centre at the last advanced time, °C.
    pub fn centre_c(&self) -> f64 {
        let w = std::f64::consts::TAU * self.last_t / DAY_S;
        self.mean_c + self.swing_k * (w + self.phase).sin() + self.walk_k
    }

    /// Air temperature at plate position (x, y) metres, °C.
    pub fn at_c(&self, x_m: f64, y_m: f64) -> f64 {
        let w = std::f64::consts::TAU * self.last_t / DAY_S + self.gradient_phase;
        let s = w.sin();
        let gx = self.gradient[0] + self.gradient_daily[0] * s;
        let gy = self.gradient[1] + self.gradient_daily[1] * s;
        self.centre_c() + gx * x_m + gy * y_m
    }

    /// The room's mean temperature, °C.
    pub fn mean_c(&self) -> f64 {
        self.mean_c
    }
}

/// The floor's tilt under the stage.
pub struct Floor {
    drift_urad_per_s: [f64; 2],
    wobble_urad: [f64; 2],
    phase: [f64; 2],
}

impl Floor {
    /// The floor of a scenario.
    pub fn new(sim: &Simulation, setup: &mut Noise) -> Self {
        Floor {
            drift_urad_per_s: [
                sim.floor_drift_urad_per_day[0] / DAY_S,
                sim.floor_drift_urad_per_day[1] / DAY_S,
            ],
            wobble_urad: sim.floor_wobble_urad,
            phase: [
                std::f64::consts::TAU * setup.uniform(),
                std::f64::consts::TAU * setup.uniform(),
            ],
        }
    }

    /// Floor tilt at time `t_s`, µrad per axis.
    pub fn tilt_urad(&self, t_s: f64) -> [f64; 2] {
        let w = std::f64::consts::TAU * t_s / DAY_S;
        [0, 1].map(|k| {
            self.drift_urad_per_s[k] * t_s + self.wobble_urad[k] * (w + self.phase[k]).sin()
        })
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn sim() -> Simulation {
        stilt_config::load_str(stilt_config::DEMO_SCENARIO, "demo")
            .unwrap()
            .simulation
    }

    #[test]
    fn ou_wander_has_the_configured_rms() {
        // A stationary OU process has variance σ² whatever the step (exact update).
        let mut s = sim();
        s.ambient_daily_swing_k = 0.0;
        s.ambient_walk_k = 0.1;
        s.ambient_walk_correlation_h = 0.5;
        let mut setup = Noise::new(1, 99);
        let mut room = Room::new(&s, &mut setup);
        let mut acc = 0.0;
        let n = 50_000;
        for k in 1..=n {
            room.advance_to(k as f64 * 600.0);
            acc += (room.centre_c() - s.ambient_mean_c).powi(2);
        }
        let rms = (acc / n as f64).sqrt();
        assert!((rms - 0.1).abs() < 0.005, "rms {rms}");
    }

    #[test]
    fn floor_drifts_by_the_configured_amount_per_day() {
        let mut s = sim();
        s.floor_wobble_urad = [0.0, 0.0];
        let f = Floor::new(&s, &mut Noise::new(1, 4));
        let d = f.tilt_urad(DAY_S);
        assert!((d[0] - s.floor_drift_urad_per_day[0]).abs() < 1e-12);
        assert!((d[1] - s.floor_drift_urad_per_day[1]).abs() < 1e-12);
    }
}

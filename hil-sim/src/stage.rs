//! [`SimStage`]: legs, plate, room, floor and instruments advanced together.

use stilt_config::Config;

use crate::environment::{Floor, Room};
use crate::noise::{Noise, streams};
use crate::thermal::{LegThermal, LegThermalParams};

/// What the simulator knows that no instrument tells: for checking the controller.
#[derive(Debug, Clone, PartialEq)]
pub struct Truth {
    /// Simulated time, s.
    pub t_s: f64,
    /// The plate's true tilt (floor + legs + assembly offset), µrad per axis.
    pub plate_tilt_urad: [f64; 2],
    /// The floor's tilt, µrad per axis.
    pub floor_tilt_urad: [f64; 2],
    /// True leg body temperatures, °C.
    pub leg_temp_c: Vec<f64>,
    /// Air at the stage's centre, °C.
    pub air_c: f64,
    /// Heater powers being delivered, W.
    pub heater_power_w: Vec<f64>,
}

/// One tiltmeter reading.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct TiltReading {
    /// Raw reading per axis in the instrument's units (µrad for the simulated one,
    /// so the demo's calibration is the identity).
    pub raw: [f64; 2],
    /// False when the true value lay outside the instrument's range (the reading is clipped).
    pub in_range: bool,
}

struct SimLeg {
    x_m: f64,
    y_m: f64,
    expansion_m_per_k: f64,
    thermal: LegThermal,
    power_w: f64,
    /// Delivered power ÷ commanded power: 0 for an open heater, 1 when healthy.
    delivery_ratio: f64,
    /// Added to this leg's thermometer readings, K (a drifting or miswired sensor).
    thermometer_offset_k: f64,
    /// The thermometer gives no reading.
    thermometer_dead: bool,
}

/// The whole simulated stage.
pub struct SimStage {
    t_s: f64,
    legs: Vec<SimLeg>,
    room: Room,
    floor: Floor,
    /// Least-squares plane fit rows for slope x and y: tilt = Σ w_i h_i.
    plane: [Vec<f64>; 2],
    reference_c: f64,
    assembly_offset_urad: [f64; 2],
    tilt_noise: Noise,
    tilt_sigma_urad: f64,
    tilt_walk_urad: [f64; 2],
    tilt_walk_sigma_urad_per_sqrt_s: f64,
    tilt_quantum_urad: f64,
    tilt_range_urad: f64,
    tilt_rate_hz: f64,
    air_offset_k: f64,
    bump_urad: [f64; 2],
    thermo_noise: Noise,
    thermo_sigma_k: f64,
    channels: Vec<(usize, usize)>,
}

impl SimStage {
    /// The stage a configuration describes, with its `[simulation]` physics, starting
    /// cold: every leg at the air temperature and every heater off.
    pub fn new(cfg: &Config) -> Self {
        let sim = &cfg.simulation;
        let mut setup = Noise::new(sim.seed, streams::SETUP);
        let room = Room::new(sim, &mut setup);
        let floor = Floor::new(sim, &mut setup);
        let spread = |n: &mut Noise| 1.0 + sim.leg_spread_ratio * (2.0 * n.uniform() - 1.0);
        let legs: Vec<SimLeg> = cfg
            .legs
            .iter()
            .map(|l| {
                let p = LegThermalParams {
                    heater_capacity_j_per_k: sim.heater_heat_capacity_j_per_k * spread(&mut setup),
                    leg_capacity_j_per_k: sim.leg_heat_capacity_j_per_k * spread(&mut setup),
                    coupling_w_per_k: sim.heater_coupling_w_per_k * spread(&mut setup),
                    heater_loss_w_per_k: sim.heater_loss_w_per_k * spread(&mut setup),
                    leg_conductance_w_per_k: sim.leg_conductance_w_per_k * spread(&mut setup),
                };
                SimLeg {
                    x_m: l.x_m,
                    y_m: l.y_m,
                    expansion_m_per_k: l.expansion_m_per_k(),
                    thermal: LegThermal::new(p, 0.1, room.at_c(l.x_m, l.y_m)),
                    power_w: 0.0,
                    delivery_ratio: 1.0,
                    thermometer_offset_k: 0.0,
                    thermometer_dead: false,
                }
            })
            .collect();
        // "As assembled" the plate is a few µrad off level; invented, like the scenario.
        let assembly_offset_urad = [
            4.0 * (2.0 * setup.uniform() - 1.0),
            4.0 * (2.0 * setup.uniform() - 1.0),
        ];
        let plane = plane_fit_rows(&legs.iter().map(|l| (l.x_m, l.y_m)).collect::<Vec<_>>());
        let fs = cfg.tiltmeter.rate_hz;
        SimStage {
            t_s: 0.0,
            reference_c: room.mean_c(),
            legs,
            room,
            floor,
            plane,
            assembly_offset_urad,
            tilt_noise: Noise::new(sim.seed, streams::TILTMETER),
            // White noise of one-sided density S (rad/√Hz) sampled at fs has σ = S·√(fs/2).
            tilt_sigma_urad: sim.tilt_noise_nrad_per_sqrt_hz * 1e-3 * (fs / 2.0).sqrt(),
            tilt_walk_urad: [0.0, 0.0],
            tilt_walk_sigma_urad_per_sqrt_s: sim.tilt_walk_nrad_per_sqrt_h * 1e-3 / 60.0,
            tilt_quantum_urad: sim.tilt_quantum_nrad * 1e-3,
            tilt_range_urad: cfg.tiltmeter.range_urad,
            tilt_rate_hz: fs,
            air_offset_k: 0.0,
            bump_urad: [0.0, 0.0],
            thermo_noise: Noise::new(sim.seed, streams::THERMOMETERS),
            thermo_sigma_k: sim.thermometer_noise_mk * 1e-3,
            channels: cfg
                .legs
                .iter()
                .enumerate()
                .map(|(i, l)| (l.thermometer_channel, i))
                .collect(),
        }
    }

    /// Simulated time, s.
    pub fn time_s(&self) -> f64 {
        self.t_s
    }

    /// Number of legs.
    pub fn leg_count(&self) -> usize {
        self.legs.len()
    }

    /// Sets the power delivered by one heater, W. Negative or non-finite values deliver
    /// nothing (a heater cannot cool); the daemon's own clamp is not assumed.
    pub fn set_heater_power(&mut self, leg: usize, power_w: f64) {
        if let Some(l) = self.legs.get_mut(leg) {
            l.power_w = if power_w.is_finite() {
                power_w.max(0.0)
            } else {
                0.0
            };
        }
    }

    /// Advances the whole stage by `dt_s` seconds with heater powers held.
    pub fn advance(&mut self, dt_s: f64) {
        if !(dt_s > 0.0 && dt_s.is_finite()) {
            return;
        }
        // Air and its gradient are sampled at the start of the step and held (ZOH);
        // they change over hours, so the error at 0.1 s steps is negligible.
        for l in &mut self.legs {
            let air = self.room.at_c(l.x_m, l.y_m) + self.air_offset_k;
            l.thermal.step(dt_s, l.power_w * l.delivery_ratio, air);
        }
        self.t_s += dt_s;
        self.room.advance_to(self.t_s);
        let s = self.tilt_walk_sigma_urad_per_sqrt_s * dt_s.sqrt();
        for k in 0..2 {
            self.tilt_walk_urad[k] += s * self.tilt_noise.gauss();
        }
    }

    /// The plate's true tilt, µrad per axis.
    pub fn plate_tilt_urad(&self) -> [f64; 2] {
        let floor = self.floor.tilt_urad(self.t_s);
        let heights: Vec<f64> = self
            .legs
            .iter()
            .map(|l| l.expansion_m_per_k * (l.thermal.body_c() - self.reference_c))
            .collect();
        [0, 1].map(|k| {
            let legs_rad: f64 = self.plane[k].iter().zip(&heights).map(|(w, h)| w * h).sum();
            floor[k] + legs_rad * 1e6 + self.assembly_offset_urad[k] + self.bump_urad[k]
        })
    }

    /// One tiltmeter reading now: true tilt + white noise + random walk, quantised and
    /// clipped to the range. Call once per tiltmeter sample period.
    pub fn read_tilt(&mut self) -> TiltReading {
        let t = self.plate_tilt_urad();
        let mut in_range = true;
        let raw = [0, 1].map(|k| {
            let mut v =
                t[k] + self.tilt_walk_urad[k] + self.tilt_sigma_urad * self.tilt_noise.gauss();
            if self.tilt_quantum_urad > 0.0 {
                v = (v / self.tilt_quantum_urad).round() * self.tilt_quantum_urad;
            }
            if v.is_nan() || v.abs() > self.tilt_range_urad {
                in_range = false;
                v = if v.is_nan() {
                    0.0
                } else {
                    v.clamp(-self.tilt_range_urad, self.tilt_range_urad)
                };
            }
            v
        });
        TiltReading { raw, in_range }
    }

    /// The simulated tiltmeter's sampling rate, Hz.
    pub fn tilt_rate_hz(&self) -> f64 {
        self.tilt_rate_hz
    }

    /// One reading of thermometer `channel`, °C, or `None` for a channel no leg has.
    pub fn read_thermometer(&mut self, channel: usize) -> Option<f64> {
        let &(_, leg) = self.channels.iter().find(|(c, _)| *c == channel)?;
        self.read_leg_thermometer(leg)
    }

    /// One reading of leg `leg`'s thermometer, °C, or `None` for no such leg or a dead
    /// sensor (a bus of several thermometer units maps its channels to legs itself).
    pub fn read_leg_thermometer(&mut self, leg: usize) -> Option<f64> {
        let l = self.legs.get(leg)?;
        let t = l.thermal.body_c() + l.thermometer_offset_k;
        // The noise is drawn even for a dead sensor, so a fault never shifts the others' noise.
        let noise = self.thermo_sigma_k * self.thermo_noise.gauss();
        (!l.thermometer_dead).then_some(t + noise)
    }

    /// Everything the simulator knows, for checking results.
    pub fn truth(&self) -> Truth {
        Truth {
            t_s: self.t_s,
            plate_tilt_urad: self.plate_tilt_urad(),
            floor_tilt_urad: self.floor.tilt_urad(self.t_s),
            leg_temp_c: self.legs.iter().map(|l| l.thermal.body_c()).collect(),
            air_c: self.room.centre_c(),
            heater_power_w: self
                .legs
                .iter()
                .map(|l| l.power_w * l.delivery_ratio)
                .collect(),
        }
    }

    /// Fault: leg `leg`'s heater delivers `ratio` × the commanded power (0 = open circuit,
    /// 1 = healthy, above 1 = a supply delivering more than asked).
    pub fn set_heater_delivery(&mut self, leg: usize, ratio: f64) {
        if let Some(l) = self.legs.get_mut(leg) {
            l.delivery_ratio = if ratio.is_finite() {
                ratio.max(0.0)
            } else {
                0.0
            };
        }
    }

    /// Fault: the thermometer of leg `leg` reads `offset_k` too high, or (`dead`) nothing.
    pub fn set_thermometer_fault(&mut self, leg: usize, offset_k: f64, dead: bool) {
        if let Some(l) = self.legs.get_mut(leg) {
            l.thermometer_offset_k = if offset_k.is_finite() { offset_k } else { 0.0 };
            l.thermometer_dead = dead;
        }
    }

    /// Disturbance: a step of the room air by `k` kelvin (everywhere), from now on.
    pub fn set_air_offset_k(&mut self, k: f64) {
        self.air_offset_k = if k.is_finite() { k } else { 0.0 };
    }

    /// Disturbance: the plate knocked by `urad` (added to its tilt), from now on.
    pub fn set_bump_urad(&mut self, urad: [f64; 2]) {
        self.bump_urad = urad.map(|u| if u.is_finite() { u } else { 0.0 });
    }
}

/// Rows of the least-squares plane fit z = a·x + b·y + c through the leg tops:
/// `a = Σ rows[0][i]·h_i`, `b = Σ rows[1][i]·h_i`. Solves the 3×3 normal equations
/// (AᵀA) p = Aᵀh by Cramer's rule for each unit vector h = e_i. For three legs this is
/// the exact plane through the three points.
fn plane_fit_rows(pts: &[(f64, f64)]) -> [Vec<f64>; 2] {
    let (mut sxx, mut sxy, mut sx, mut syy, mut sy) = (0.0, 0.0, 0.0, 0.0, 0.0);
    let n = pts.len() as f64;
    for &(x, y) in pts {
        sxx += x * x;
        sxy += x * y;
        sx += x;
        syy += y * y;
        sy += y;
    }
    let m = [[sxx, sxy, sx], [sxy, syy, sy], [sx, sy, n]];
    let det3 = |m: &[[f64; 3]; 3]| {
        m[0][0] * (m[1][1] * m[2][2] - m[1][2] * m[2][1])
            - m[0][1] * (m[1][0] * m[2][2] - m[1][2] * m[2][0])
            + m[0][2] * (m[1][0] * m[2][1] - m[1][1] * m[2][0])
    };
    let d = det3(&m);
    let mut rows = [Vec::new(), Vec::new()];
    for &(x, y) in pts {
        let rhs = [x, y, 1.0]; // Aᵀ e_i
        for (k, row) in rows.iter_mut().enumerate() {
            let mut mk = m;
            for r in 0..3 {
                mk[r][k] = rhs[r];
            }
            row.push(det3(&mk) / d);
        }
    }
    rows
}

#[cfg(test)]
mod tests {
    use super::*;

    fn demo() -> Config {
        stilt_config::load_str(stilt_config::DEMO_SCENARIO, "demo").unwrap()
    }

    #[test]
    fn plane_through_three_points_by_hand() {
        // Hand-worked: points (0,0,0), (1,0,2), (0,1,3) lie on z = 2x + 3y.
        let rows = plane_fit_rows(&[(0.0, 0.0), (1.0, 0.0), (0.0, 1.0)]);
        let h = [0.0, 2.0, 3.0];
        let a: f64 = rows[0].iter().zip(&h).map(|(w, h)| w * h).sum();
        let b: f64 = rows[1].iter().zip(&h).map(|(w, h)| w * h).sum();
        assert!((a - 2.0).abs() < 1e-12 && (b - 3.0).abs() < 1e-12);
    }

    #[test]
    fn same_seed_same_run() {
        let cfg = demo();
        let mut a = SimStage::new(&cfg);
        let mut b = SimStage::new(&cfg);
        for _ in 0..1000 {
            a.advance(0.1);
            b.advance(0.1);
            assert_eq!(a.read_tilt(), b.read_tilt());
        }
    }

    #[test]
    fn heating_one_leg_tilts_towards_the_others_by_alpha_l_over_1_5r() {
        // design.md sanity figure: raising one leg by δ tilts the plate by δ/(1.5 R).
        let mut cfg = demo();
        cfg.simulation.floor_wobble_urad = [0.0, 0.0];
        cfg.simulation.floor_drift_urad_per_day = [0.0, 0.0];
        let mut s = SimStage::new(&cfg);
        let before = s.plate_tilt_urad();
        let t0 = s.truth().leg_temp_c[0];
        s.set_heater_power(0, 1.0);
        for _ in 0..2000 {
            s.advance(10.0);
        }
        s.set_heater_power(0, 0.0);
        let dt = s.truth().leg_temp_c[0] - t0 - (s.truth().leg_temp_c[1] - t0);
        let after = s.plate_tilt_urad();
        let expect = 23.1e-6 * 0.30 * dt / (1.5 * 0.25) * 1e6;
        // Leg A sits on +x, so its growth tilts the plate about x (dz/dx > 0) only.
        assert!(
            ((after[0] - before[0]) - expect).abs() < 0.02 * expect.abs(),
            "{after:?} {expect}"
        );
        assert!((after[1] - before[1]).abs() < 0.05 * expect.abs());
    }

    #[test]
    fn tiltmeter_white_noise_matches_density() {
        // σ per sample = S·√(fs/2) for one-sided density S (common practice in ASD work).
        let mut cfg = demo();
        cfg.simulation.tilt_walk_nrad_per_sqrt_h = 0.0;
        cfg.simulation.tilt_quantum_nrad = 0.0;
        let mut s = SimStage::new(&cfg);
        let n = 20_000;
        let truth = s.plate_tilt_urad();
        let var: f64 = (0..n)
            .map(|_| (s.read_tilt().raw[0] - truth[0]).powi(2))
            .sum::<f64>()
            / n as f64;
        let expect = 10e-3 * (10.0f64 / 2.0).sqrt();
        assert!(
            (var.sqrt() - expect).abs() < 0.02 * expect,
            "{} vs {expect}",
            var.sqrt()
        );
    }

    #[test]
    fn out_of_range_is_flagged_and_clipped() {
        let mut cfg = demo();
        cfg.tiltmeter.range_urad = 1.0;
        cfg.simulation.floor_drift_urad_per_day = [1e4, 0.0];
        let mut s = SimStage::new(&cfg);
        s.advance(86_400.0);
        let r = s.read_tilt();
        assert!(!r.in_range);
        assert_eq!(r.raw[0], 1.0);
    }

    #[test]
    fn heaters_cannot_cool() {
        let mut s = SimStage::new(&demo());
        s.set_heater_power(0, -5.0);
        s.set_heater_power(1, f64::NAN);
        assert_eq!(s.truth().heater_power_w[..2], [0.0, 0.0]);
    }
}

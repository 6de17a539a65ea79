//! Exact discrete-time update of a leg's two-node thermal model.
//!
//! Nodes: the heater (capacity `C_h`) and the leg body (`C_b`). Heat flows from the
//! heater into the body through `G_hb`, from the heater to the air through `G_ha`, and
//! from the body to the air through `G_ba`:
//!
//! ```text
//! C_h dT_h/dt = P − G_hb (T_h − T_b) − G_ha (T_h − T_a)
//! C_b dT_b/dt = G_hb (T_h − T_b) − G_ba (T_b − T_a)
//! ```
//!
//! With the inputs `u = [P, T_a]` held over a step `h` (zero-order hold), the exact
//! update is `x' = Φ x + Γ u` with `Φ = e^{A h}` and `Γ = A⁻¹ (Φ − I) B`. Φ is computed
//! in closed form for 2×2 matrices, so the update is stable for any `h`.

/// A 2×2 matrix, row major.
pub type M2 = [[f64; 2]; 2];

/// Physical parameters of one leg's thermal model.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct LegThermalParams {
    /// Heater node heat capacity, J/K.
    pub heater_capacity_j_per_k: f64,
    /// Leg body heat capacity, J/K.
    pub leg_capacity_j_per_k: f64,
    /// Heater → body conductance, W/K.
    pub coupling_w_per_k: f64,
    /// Heater → air conductance, W/K.
    pub heater_loss_w_per_k: f64,
    /// Body → air conductance, W/K.
    pub leg_conductance_w_per_k: f64,
}

impl LegThermalParams {
    /// The continuous-time system matrices (A, B) for state [T_h, T_b], input [P, T_a].
    pub fn continuous(&self) -> (M2, M2) {
        let (ch, cb) = (self.heater_capacity_j_per_k, self.leg_capacity_j_per_k);
        let (ghb, gha, gba) = (
            self.coupling_w_per_k,
            self.heater_loss_w_per_k,
            self.leg_conductance_w_per_k,
        );
        let a = [[-(ghb + gha) / ch, ghb / ch], [ghb / cb, -(ghb + gba) / cb]];
        let b = [[1.0 / ch, gha / ch], [0.0, gba / cb]];
        (a, b)
    }

    /// Steady-state rise of the leg body above the air per watt of heater power, K/W.
    pub fn body_gain_k_per_w(&self) -> f64 {
        let (ghb, gha, gba) = (
            self.coupling_w_per_k,
            self.heater_loss_w_per_k,
            self.leg_conductance_w_per_k,
        );
        // Heater node: P = ghb (Th − Tb) + gha Th; body: ghb (Th − Tb) = gba Tb (air at 0).
        // ⇒ Th = Tb (ghb + gba)/ghb, P = gba Tb + gha Tb (ghb + gba)/ghb.
        1.0 / (gba + gha * (ghb + gba) / ghb)
    }
}

/// `e^{A h}` for a 2×2 matrix, in closed form (Cayley–Hamilton).
pub fn expm2(a: M2, h: f64) -> M2 {
    let s = 0.5 * (a[0][0] + a[1][1]);
    let (p, q) = (a[0][0] - s, a[1][1] - s); // A − sI has zero trace
    let disc = p * p + a[0][1] * a[1][0]; // = −det(A − sI)
    // e^{Ah} = c·I + k·(A − sI), with c and k already carrying the factor e^{sh}.
    let (c, k) = if disc > 0.0 {
        // Real eigenvalues s ± w: write cosh/sinh through e^{(s±w)h} so that long
        // steps underflow to zero instead of overflowing to ∞·0.
        let w = disc.sqrt();
        let (e1, e2) = (((s + w) * h).exp(), ((s - w) * h).exp());
        (0.5 * (e1 + e2), 0.5 * (e1 - e2) / w)
    } else if disc < 0.0 {
        let w = (-disc).sqrt();
        let e = (s * h).exp();
        (e * (w * h).cos(), e * (w * h).sin() / w)
    } else {
        let e = (s * h).exp();
        (e, e * h)
    };
    [[c + k * p, k * a[0][1]], [k * a[1][0], c + k * q]]
}

fn mul(a: M2, b: M2) -> M2 {
    [
        [
            a[0][0] * b[0][0] + a[0][1] * b[1][0],
            a[0][0] * b[0][1] + a[0][1] * b[1][1],
        ],
        [
            a[1][0] * b[0][0] + a[1][1] * b[1][0],
            a[1][0] * b[0][1] + a[1][1] * b[1][1],
        ],
    ]
}

fn inv(a: M2) -> M2 {
    let d = a[0][0] * a[1][1] - a[0][1] * a[1][0];
    [[a[1][1] / d, -a[0][1] / d], [-a[1][0] / d, a[0][0] / d]]
}

/// One leg's thermal state with its cached exact update for a fixed step.
#[derive(Debug, Clone)]
pub struct LegThermal {
    params: LegThermalParams,
    step_s: f64,
    phi: M2,
    gamma: M2,
    /// [heater node, leg body] temperatures, °C.
    pub state: [f64; 2],
}

impl LegThermal {
    /// A leg in equilibrium with air at `t_air_c` and no heating, stepped by `step_s`.
    pub fn new(params: LegThermalParams, step_s: f64, t_air_c: f64) -> Self {
        let mut l = LegThermal {
            params,
            step_s: 0.0,
            phi: [[1.0, 0.0], [0.0, 1.0]],
            gamma: [[0.0; 2]; 2],
            state: [t_air_c, t_air_c],
        };
        l.set_step(step_s);
        l
    }

    fn set_step(&mut self, h: f64) {
        let (a, b) = self.params.continuous();
        let phi = expm2(a, h);
        let phi_minus_i = [[phi[0][0] - 1.0, phi[0][1]], [phi[1][0], phi[1][1] - 1.0]];
        self.gamma = mul(mul(inv(a), phi_minus_i), b);
        self.phi = phi;
        self.step_s = h;
    }

    /// The parameters.
    pub fn params(&self) -> &LegThermalParams {
        &self.params
    }

    /// Advances by `h` seconds with heater power `p_w` and air at `t_air_c` held constant.
    pub fn step(&mut self, h: f64, p_w: f64, t_air_c: f64) {
        if h != self.step_s {
            self.set_step(h);
        }
        let x = self.state;
        let (phi, g) = (&self.phi, &self.gamma);
        self.state = [
            phi[0][0] * x[0] + phi[0][1] * x[1] + g[0][0] * p_w + g[0][1] * t_air_c,
            phi[1][0] * x[0] + phi[1][1] * x[1] + g[1][0] * p_w + g[1][1] * t_air_c,
        ];
    }

    /// Leg body temperature, °C.
    pub fn body_c(&self) -> f64 {
        self.state[1]
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn params() -> LegThermalParams {
        LegThermalParams {
            heater_capacity_j_per_k: 15.0,
            leg_capacity_j_per_k: 400.0,
            coupling_w_per_k: 1.0,
            heater_loss_w_per_k: 0.02,
            leg_conductance_w_per_k: 0.3,
        }
    }

    #[test]
    fn expm_of_diagonal_is_elementwise_exp() {
        // e^{diag(a,b) h} = diag(e^{ah}, e^{bh}) (definition of the matrix exponential).
        let e = expm2([[-0.5, 0.0], [0.0, -2.0]], 1.3);
        assert!((e[0][0] - (-0.65f64).exp()).abs() < 1e-15);
        assert!((e[1][1] - (-2.6f64).exp()).abs() < 1e-15);
        assert!(e[0][1].abs() < 1e-15 && e[1][0].abs() < 1e-15);
    }

    #[test]
    fn expm_of_rotation_generator_is_rotation() {
        // e^{[[0,−w],[w,0]] t} is the rotation by w·t (complex eigenvalues branch).
        let (w, t) = (0.7, 2.0);
        let e = expm2([[0.0, -w], [w, 0.0]], t);
        assert!((e[0][0] - (w * t).cos()).abs() < 1e-14);
        assert!((e[1][0] - (w * t).sin()).abs() < 1e-14);
    }

    #[test]
    fn expm_of_nilpotent_jordan_block() {
        // e^{[[s,1],[0,s]] t} = e^{st} [[1, t],[0, 1]] (repeated eigenvalue branch).
        let e = expm2([[-0.2, 1.0], [0.0, -0.2]], 3.0);
        let f = (-0.6f64).exp();
        assert!((e[0][0] - f).abs() < 1e-14 && (e[0][1] - 3.0 * f).abs() < 1e-14);
    }

    #[test]
    fn step_size_does_not_change_the_trajectory() {
        // Exact discretisation: 100 steps of 0.1 s equal 1 step of 10 s.
        let mut fine = LegThermal::new(params(), 0.1, 21.0);
        let mut coarse = LegThermal::new(params(), 10.0, 21.0);
        for _ in 0..100 {
            fine.step(0.1, 1.5, 21.3);
        }
        coarse.step(10.0, 1.5, 21.3);
        for k in 0..2 {
            assert!((fine.state[k] - coarse.state[k]).abs() < 1e-10);
        }
    }

    #[test]
    fn steady_state_matches_conductance_network() {
        // A long run converges to the DC solution of the resistor network.
        let p = params();
        let mut l = LegThermal::new(p, 600.0, 20.0);
        for _ in 0..200 {
            l.step(600.0, 1.0, 20.0);
        }
        let rise = l.body_c() - 20.0;
        assert!((rise - p.body_gain_k_per_w()).abs() < 1e-9, "{rise}");
    }

    #[test]
    fn huge_steps_are_stable() {
        let mut l = LegThermal::new(params(), 1e6, 20.0);
        l.step(1e6, 2.0, 20.0);
        assert!(l.body_c().is_finite() && l.body_c() < 30.0);
    }
}

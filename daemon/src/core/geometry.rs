//! Stage geometry: leg length changes ↔ plate tilt.
//!
//! The plate rests on N ≥ 3 leg tops at (xᵢ, yᵢ). A change hᵢ of each leg's length moves
//! the plate to the least-squares plane z = a·x + b·y + c through the tops; tilt_x = a,
//! tilt_y = b (radians; small angles). With coordinates centred on the legs' centroid
//! (x̃ = x − x̄, ỹ = y − ȳ) the fit is
//!
//! ```text
//! [a b]ᵀ = S⁻¹ · Σ [x̃ᵢ ỹᵢ]ᵀ hᵢ,   S = Σ [x̃ᵢ ỹᵢ]ᵀ[x̃ᵢ ỹᵢ]
//! ```
//!
//! and the least-norm leg pattern that produces a tilt (a, b) with no change of the
//! mean height (so levelling never walks the plate up or down) is simply
//! hᵢ = a·x̃ᵢ + b·ỹᵢ: it lies in the span of the fit's columns, so it is orthogonal to
//! every pattern that changes neither tilt nor mean height.
//!
//! Leg length follows temperature through hᵢ = αᵢ·Lᵢ·ΔTᵢ.

use stilt_config::Leg;

/// The tilt map of one stage.
#[derive(Debug, Clone, PartialEq)]
pub struct Geometry {
    centred: Vec<[f64; 2]>,
    s_inv: [[f64; 2]; 2],
    expansion_m_per_k: Vec<f64>,
}

/// Microradians per radian.
pub const URAD_PER_RAD: f64 = 1e6;

impl Geometry {
    /// The geometry of a validated set of legs (validation guarantees ≥ 3, not collinear).
    pub fn new(legs: &[Leg]) -> Self {
        let n = legs.len().max(1) as f64;
        let cx = legs.iter().map(|l| l.x_m).sum::<f64>() / n;
        let cy = legs.iter().map(|l| l.y_m).sum::<f64>() / n;
        let centred: Vec<[f64; 2]> = legs.iter().map(|l| [l.x_m - cx, l.y_m - cy]).collect();
        let (mut sxx, mut sxy, mut syy) = (0.0, 0.0, 0.0);
        for c in &centred {
            sxx += c[0] * c[0];
            sxy += c[0] * c[1];
            syy += c[1] * c[1];
        }
        let det = sxx * syy - sxy * sxy;
        Geometry {
            centred,
            s_inv: [[syy / det, -sxy / det], [-sxy / det, sxx / det]],
            expansion_m_per_k: legs.iter().map(Leg::expansion_m_per_k).collect(),
        }
    }

    /// Number of legs.
    pub fn legs(&self) -> usize {
        self.centred.len()
    }

    /// Plate tilt (rad per axis) produced by leg length changes `h_m` (metres).
    pub fn tilt_from_heights(&self, h_m: &[f64]) -> [f64; 2] {
        let (mut gx, mut gy) = (0.0, 0.0);
        for (c, h) in self.centred.iter().zip(h_m) {
            gx += c[0] * h;
            gy += c[1] * h;
        }
        let s = &self.s_inv;
        [s[0][0] * gx + s[0][1] * gy, s[1][0] * gx + s[1][1] * gy]
    }

    /// The least-norm, zero-mean leg length changes (metres) that tilt the plate by
    /// `tilt_rad`.
    pub fn heights_for_tilt(&self, tilt_rad: [f64; 2]) -> Vec<f64> {
        self.centred
            .iter()
            .map(|c| tilt_rad[0] * c[0] + tilt_rad[1] * c[1])
            .collect()
    }

    /// Leg temperature offsets (K) that tilt the plate by `tilt_urad`, zero-mean in length.
    pub fn temperature_offsets_for_tilt(&self, tilt_urad: [f64; 2]) -> Vec<f64> {
        let t = [tilt_urad[0] / URAD_PER_RAD, tilt_urad[1] / URAD_PER_RAD];
        self.heights_for_tilt(t)
            .iter()
            .zip(&self.expansion_m_per_k)
            .map(|(h, e)| h / e)
            .collect()
    }

    /// The tilt (µrad) that leg temperature offsets `dt_k` produce.
    pub fn tilt_from_temperature_offsets(&self, dt_k: &[f64]) -> [f64; 2] {
        let h: Vec<f64> = dt_k
            .iter()
            .zip(&self.expansion_m_per_k)
            .map(|(t, e)| t * e)
            .collect();
        self.tilt_from_heights(&h).map(|r| r * URAD_PER_RAD)
    }
}

/// Unit conversions for tilt (exact by definition of the radian and the degree).
pub mod units {
    /// Degrees per microradian: 180/π × 10⁻⁶.
    pub const DEG_PER_URAD: f64 = 180.0 / std::f64::consts::PI * 1e-6;
    /// Arcseconds per microradian: 3600 × 180/π × 10⁻⁶.
    pub const ARCSEC_PER_URAD: f64 = 3600.0 * DEG_PER_URAD;
}

#[cfg(test)]
mod tests {
    use super::*;

    fn leg(x: f64, y: f64) -> Leg {
        Leg {
            name: String::new(),
            x_m: x,
            y_m: y,
            length_m: 0.30,
            material: stilt_config::Material {
                name: "aluminium".into(),
                cte_per_k: 23.1e-6,
            },
            heater_resistance_ohm: 50.0,
            heater_max_power_w: 2.0,
            thermometer_channel: 0,
        }
    }

    fn demo_legs() -> Vec<Leg> {
        let r = 0.25;
        (0..3)
            .map(|k| {
                let a = k as f64 * 2.0 * std::f64::consts::PI / 3.0;
                leg(r * a.cos(), r * a.sin())
            })
            .collect()
    }

    #[test]
    fn plane_through_three_points_worked_by_hand() {
        // Hand-worked: tops at (0,0,1), (2,0,3), (0,4,−1) µm. The plane z = ax + by + c
        // through them: c = 1, 2a + c = 3 ⇒ a = 1 µm/m, 4b + c = −1 ⇒ b = −0.5 µm/m.
        let g = Geometry::new(&[leg(0.0, 0.0), leg(2.0, 0.0), leg(0.0, 4.0)]);
        let t = g.tilt_from_heights(&[1e-6, 3e-6, -1e-6]);
        assert!(
            (t[0] - 1e-6).abs() < 1e-18 && (t[1] + 0.5e-6).abs() < 1e-18,
            "{t:?}"
        );
    }

    #[test]
    fn one_leg_raised_tilts_by_delta_over_1_5_r() {
        // Three legs 120° apart on radius R: raising one by δ tilts the plate by δ/(1.5R)
        // (the distance from a vertex of an equilateral triangle to the opposite side).
        let g = Geometry::new(&demo_legs());
        let t = g.tilt_from_heights(&[7e-6, 0.0, 0.0]);
        assert!((t[0] - 7e-6 / (1.5 * 0.25)).abs() < 1e-15 && t[1].abs() < 1e-15);
    }

    #[test]
    fn inverse_is_exact_zero_mean_and_least_norm() {
        let legs = vec![
            leg(0.3, 0.1),
            leg(-0.2, 0.25),
            leg(-0.1, -0.3),
            leg(0.25, -0.2),
        ];
        let g = Geometry::new(&legs);
        let want = [1.7e-6, -0.9e-6];
        let h = g.heights_for_tilt(want);
        let got = g.tilt_from_heights(&h);
        assert!((got[0] - want[0]).abs() < 1e-18 && (got[1] - want[1]).abs() < 1e-18);
        assert!(h.iter().sum::<f64>().abs() < 1e-18);
        // Adding any pattern that keeps tilt and mean height (null space) only grows the norm.
        let null = [1.0, -1.0, 1.0, -1.0];
        let dt = g.tilt_from_heights(&null);
        let proj: Vec<f64> = g.heights_for_tilt(dt);
        let n: Vec<f64> = null
            .iter()
            .zip(&proj)
            .map(|(a, b)| (a - b) * 1e-7)
            .collect();
        let mean = n.iter().sum::<f64>() / 4.0;
        let n: Vec<f64> = n.iter().map(|x| x - mean).collect();
        let norm = |v: &[f64]| v.iter().map(|x| x * x).sum::<f64>();
        let sum: Vec<f64> = h.iter().zip(&n).map(|(a, b)| a + b).collect();
        assert!(norm(&sum) > norm(&h));
    }

    #[test]
    fn temperature_to_tilt_sanity_figure() {
        // design.md: aluminium 0.30 m grows ≈ 7 µm/K; over 0.375 m (1.5 × 0.25 m) that is
        // ≈ 18.5 µrad per kelvin of one leg, so 1 mK ≈ 18 nrad.
        let g = Geometry::new(&demo_legs());
        let t = g.tilt_from_temperature_offsets(&[1e-3, 0.0, 0.0]);
        assert!((t[0] - 23.1e-6 * 0.30 * 1e-3 / 0.375 * 1e6).abs() < 1e-12);
        assert!((0.017..0.019).contains(&t[0]));
    }

    #[test]
    fn microradian_in_degrees_and_arcseconds() {
        // 1 µrad = 5.7296×10⁻⁵ degree = 0.2063 arcsecond (definition: 1 rad = 180/π °).
        assert!((units::DEG_PER_URAD - 5.7296e-5).abs() < 5e-10);
        assert!((units::ARCSEC_PER_URAD - 0.2063).abs() < 5e-5);
    }
}

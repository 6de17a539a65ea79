//! Sensor conversions: platinum RTDs (IEC 60751 Callendar–Van Dusen), NTC thermistors
//! (Steinhart–Hart and Beta forms) and linear scale/offset.
//!
//! Pure functions on `f64`, with a [`ConvertError`] naming the quantity, its value and the
//! allowed range for anything out of range or not finite; none of them panics.
//!
//! Main types: [`PlatinumRtd`] (`PT100`, `PT1000`), [`SteinhartHart`], [`BetaThermistor`],
//! [`Linear`]. Temperatures are in °C for RTDs and in kelvin for thermistors (as their
//! equations are written); [`celsius_to_kelvin`] and [`kelvin_to_celsius`] convert.

/// 0 °C in kelvin (exact, by definition of the Celsius scale).
pub const ZERO_CELSIUS_K: f64 = 273.15;

/// °C to K.
pub fn celsius_to_kelvin(t_c: f64) -> f64 {
    t_c + ZERO_CELSIUS_K
}

/// K to °C.
pub fn kelvin_to_celsius(t_k: f64) -> f64 {
    t_k - ZERO_CELSIUS_K
}

/// Why a conversion failed.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum ConvertError {
    /// NaN or infinite input.
    #[error("{quantity} is not a finite number ({value})")]
    NotFinite {
        /// What the input is.
        quantity: &'static str,
        /// The value.
        value: f64,
    },
    /// Input outside the valid range.
    #[error("{quantity} = {value} {unit} is outside the valid range {min} to {max} {unit}")]
    OutOfRange {
        /// What the input is.
        quantity: &'static str,
        /// The value.
        value: f64,
        /// Lowest allowed.
        min: f64,
        /// Highest allowed.
        max: f64,
        /// Unit of all three.
        unit: &'static str,
    },
    /// Coefficients that do not describe a usable sensor.
    #[error("invalid coefficients: {reason}")]
    Coefficients {
        /// What is wrong.
        reason: &'static str,
    },
    /// An iteration that did not converge (not expected for valid input; reported, not hidden).
    #[error("{quantity} = {value}: iteration did not converge")]
    NoConvergence {
        /// What the input is.
        quantity: &'static str,
        /// The value.
        value: f64,
    },
}

fn finite(quantity: &'static str, value: f64) -> Result<f64, ConvertError> {
    if value.is_finite() {
        Ok(value)
    } else {
        Err(ConvertError::NotFinite { quantity, value })
    }
}

/// A platinum resistance thermometer per IEC 60751 (Callendar–Van Dusen):
///
/// - `R(T) = R0 (1 + A T + B T²)` for 0 ≤ T ≤ 850 °C,
/// - `R(T) = R0 (1 + A T + B T² + C (T − 100) T³)` for −200 ≤ T < 0 °C,
///
/// with A = 3.9083e-3 /°C, B = −5.775e-7 /°C², C = −4.183e-12 /°C⁴ (IEC 60751:2008 §5.1).
/// The inverse is closed-form above 0 °C and Newton's method (to under 0.1 µK) below.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct PlatinumRtd {
    r0: f64,
}

impl PlatinumRtd {
    /// A coefficient.
    pub const A: f64 = 3.9083e-3;
    /// B coefficient.
    pub const B: f64 = -5.775e-7;
    /// C coefficient (below 0 °C only).
    pub const C: f64 = -4.183e-12;
    /// Lowest temperature of the standard's range, °C.
    pub const T_MIN_C: f64 = -200.0;
    /// Highest temperature of the standard's range, °C.
    pub const T_MAX_C: f64 = 850.0;
    /// Pt100: R0 = 100 Ω.
    pub const PT100: PlatinumRtd = PlatinumRtd { r0: 100.0 };
    /// Pt1000: R0 = 1000 Ω.
    pub const PT1000: PlatinumRtd = PlatinumRtd { r0: 1000.0 };
    /// Newton stops when the step is below this, kelvin.
    pub const TOLERANCE_K: f64 = 1e-7;

    /// A sensor with resistance `r0_ohm` at 0 °C (finite and positive).
    pub fn new(r0_ohm: f64) -> Result<Self, ConvertError> {
        if !(r0_ohm.is_finite() && r0_ohm > 0.0) {
            return Err(ConvertError::Coefficients {
                reason: "R0 must be finite and positive",
            });
        }
        Ok(PlatinumRtd { r0: r0_ohm })
    }

    /// R0 in ohms.
    pub fn r0(&self) -> f64 {
        self.r0
    }

    fn r_unchecked(&self, t: f64) -> f64 {
        let mut k = 1.0 + Self::A * t + Self::B * t * t;
        if t < 0.0 {
            k += Self::C * (t - 100.0) * t * t * t;
        }
        self.r0 * k
    }

    /// Resistance in ohms at `t_c` °C, for −200…+850 °C.
    pub fn resistance(&self, t_c: f64) -> Result<f64, ConvertError> {
        let t = finite("RTD temperature", t_c)?;
        if !(Self::T_MIN_C..=Self::T_MAX_C).contains(&t) {
            return Err(ConvertError::OutOfRange {
                quantity: "RTD temperature",
                value: t,
                min: Self::T_MIN_C,
                max: Self::T_MAX_C,
                unit: "degC",
            });
        }
        Ok(self.r_unchecked(t))
    }

    /// Temperature in °C for a resistance in ohms, within R(−200 °C)…R(850 °C).
    pub fn temperature(&self, r_ohm: f64) -> Result<f64, ConvertError> {
        let r = finite("RTD resistance", r_ohm)?;
        let (rmin, rmax) = (
            self.r_unchecked(Self::T_MIN_C),
            self.r_unchecked(Self::T_MAX_C),
        );
        if !(rmin..=rmax).contains(&r) {
            return Err(ConvertError::OutOfRange {
                quantity: "RTD resistance",
                value: r,
                min: rmin,
                max: rmax,
                unit: "ohm",
            });
        }
        // Quadratic part, exact for T >= 0 (the root of B T² + A T + (1 − R/R0) = 0 nearest 0).
        let q = |ratio: f64| {
            let disc = Self::A * Self::A - 4.0 * Self::B * (1.0 - ratio);
            (-Self::A + disc.max(0.0).sqrt()) / (2.0 * Self::B)
        };
        let ratio = r / self.r0;
        let t0 = q(ratio);
        if r >= self.r0 {
            return Ok(t0);
        }
        // Below 0 °C: Newton on f(T) = R(T) − r from the quadratic estimate.
        let mut t = t0.clamp(Self::T_MIN_C, 0.0);
        for _ in 0..50 {
            let f = self.r_unchecked(t) - r;
            let df = self.r0
                * (Self::A + 2.0 * Self::B * t + Self::C * (4.0 * t * t * t - 300.0 * t * t));
            let step = f / df;
            t -= step;
            if step.abs() < Self::TOLERANCE_K {
                return Ok(t.min(0.0));
            }
        }
        Err(ConvertError::NoConvergence {
            quantity: "RTD resistance",
            value: r,
        })
    }
}

/// An NTC thermistor by Steinhart–Hart: `1/T = A + B ln R + C (ln R)³`, T in kelvin, R in ohms.
///
/// Requires B > 0 and C ≥ 0 (the usual NTC fit), which makes T(R) strictly decreasing and the
/// inverse unique: R(T) solves the cubic `C x³ + B x + (A − 1/T) = 0` for `x = ln R` by
/// Cardano's formula (one real root since B/C > 0), polished by one Newton step.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct SteinhartHart {
    a: f64,
    b: f64,
    c: f64,
}

impl SteinhartHart {
    /// Coefficients A (1/K), B (1/K), C (1/K).
    pub fn new(a: f64, b: f64, c: f64) -> Result<Self, ConvertError> {
        if !(a.is_finite() && b.is_finite() && c.is_finite()) {
            return Err(ConvertError::Coefficients {
                reason: "Steinhart-Hart A, B, C must be finite",
            });
        }
        if b <= 0.0 || c < 0.0 {
            return Err(ConvertError::Coefficients {
                reason: "Steinhart-Hart needs B > 0 and C >= 0 (an NTC thermistor)",
            });
        }
        Ok(SteinhartHart { a, b, c })
    }

    /// Temperature in kelvin for `r_ohm` (finite, positive); errors if the fit gives a
    /// non-positive or non-finite temperature there.
    pub fn temperature_k(&self, r_ohm: f64) -> Result<f64, ConvertError> {
        let r = finite("thermistor resistance", r_ohm)?;
        if r <= 0.0 {
            return Err(ConvertError::OutOfRange {
                quantity: "thermistor resistance",
                value: r,
                min: f64::MIN_POSITIVE,
                max: f64::MAX,
                unit: "ohm",
            });
        }
        let x = r.ln();
        let inv = self.a + self.b * x + self.c * x * x * x;
        let t = 1.0 / inv;
        if !(t.is_finite() && t > 0.0) {
            return Err(ConvertError::OutOfRange {
                quantity: "thermistor resistance (outside the fit's valid range)",
                value: r,
                min: f64::MIN_POSITIVE,
                max: f64::MAX,
                unit: "ohm",
            });
        }
        Ok(t)
    }

    /// Resistance in ohms at `t_k` kelvin (finite, positive).
    pub fn resistance(&self, t_k: f64) -> Result<f64, ConvertError> {
        let t = finite("thermistor temperature", t_k)?;
        if t <= 0.0 {
            return Err(ConvertError::OutOfRange {
                quantity: "thermistor temperature",
                value: t,
                min: f64::MIN_POSITIVE,
                max: f64::MAX,
                unit: "K",
            });
        }
        let k = self.a - 1.0 / t;
        let mut x = if self.c == 0.0 {
            -k / self.b
        } else {
            // x³ + p x + q = 0 with p = B/C > 0, q = k/C.
            let p = self.b / self.c;
            let q = k / self.c;
            let d = (q * q / 4.0 + p * p * p / 27.0).sqrt();
            (-q / 2.0 + d).cbrt() + (-q / 2.0 - d).cbrt()
        };
        // One Newton step on g(x) = C x³ + B x + k removes Cardano's rounding.
        let g = self.c * x * x * x + self.b * x + k;
        let dg = 3.0 * self.c * x * x + self.b;
        if dg != 0.0 && (g / dg).is_finite() {
            x -= g / dg;
        }
        let r = x.exp();
        if !(r.is_finite() && r > 0.0) {
            return Err(ConvertError::OutOfRange {
                quantity: "thermistor temperature (resistance overflows)",
                value: t,
                min: f64::MIN_POSITIVE,
                max: f64::MAX,
                unit: "K",
            });
        }
        Ok(r)
    }
}

/// An NTC thermistor by the Beta form: `R = R0 exp(β (1/T − 1/T0))`.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct BetaThermistor {
    r0: f64,
    t0_k: f64,
    beta: f64,
}

impl BetaThermistor {
    /// `r0_ohm` at `t0_k` (both finite, positive) with `beta_k` (finite, positive).
    pub fn new(r0_ohm: f64, t0_k: f64, beta_k: f64) -> Result<Self, ConvertError> {
        if !(r0_ohm.is_finite() && r0_ohm > 0.0 && t0_k.is_finite() && t0_k > 0.0) {
            return Err(ConvertError::Coefficients {
                reason: "Beta form needs finite positive R0 and T0",
            });
        }
        if !(beta_k.is_finite() && beta_k > 0.0) {
            return Err(ConvertError::Coefficients {
                reason: "Beta must be finite and positive",
            });
        }
        Ok(BetaThermistor {
            r0: r0_ohm,
            t0_k,
            beta: beta_k,
        })
    }

    /// Resistance in ohms at `t_k` kelvin (finite, positive).
    pub fn resistance(&self, t_k: f64) -> Result<f64, ConvertError> {
        let t = finite("thermistor temperature", t_k)?;
        if t <= 0.0 {
            return Err(ConvertError::OutOfRange {
                quantity: "thermistor temperature",
                value: t,
                min: f64::MIN_POSITIVE,
                max: f64::MAX,
                unit: "K",
            });
        }
        let r = self.r0 * (self.beta * (1.0 / t - 1.0 / self.t0_k)).exp();
        if !(r.is_finite() && r > 0.0) {
            return Err(ConvertError::OutOfRange {
                quantity: "thermistor temperature (resistance overflows)",
                value: t,
                min: f64::MIN_POSITIVE,
                max: f64::MAX,
                unit: "K",
            });
        }
        Ok(r)
    }

    /// Temperature in kelvin for `r_ohm` (finite, positive).
    pub fn temperature_k(&self, r_ohm: f64) -> Result<f64, ConvertError> {
        let r = finite("thermistor resistance", r_ohm)?;
        let inv = 1.0 / self.t0_k + (r / self.r0).ln() / self.beta;
        let t = 1.0 / inv;
        if !(r > 0.0 && t.is_finite() && t > 0.0) {
            return Err(ConvertError::OutOfRange {
                quantity: "thermistor resistance (outside the Beta form's range)",
                value: r,
                min: f64::MIN_POSITIVE,
                max: f64::MAX,
                unit: "ohm",
            });
        }
        Ok(t)
    }
}

/// `y = scale · x + offset`, with a finite non-zero scale so it can be inverted.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Linear {
    /// Multiplier.
    pub scale: f64,
    /// Added after scaling.
    pub offset: f64,
}

impl Linear {
    /// The identity.
    pub const IDENTITY: Linear = Linear {
        scale: 1.0,
        offset: 0.0,
    };

    /// Validates `scale` (finite, non-zero) and `offset` (finite).
    pub fn new(scale: f64, offset: f64) -> Result<Self, ConvertError> {
        if !(scale.is_finite() && scale != 0.0 && offset.is_finite()) {
            return Err(ConvertError::Coefficients {
                reason: "linear scale must be finite and non-zero, offset finite",
            });
        }
        Ok(Linear { scale, offset })
    }

    /// `scale · x + offset`; errors for non-finite input or result.
    pub fn apply(&self, x: f64) -> Result<f64, ConvertError> {
        let y = finite("linear input", x)? * self.scale + self.offset;
        finite("linear result", y)
    }

    /// `(y − offset) / scale`.
    pub fn invert(&self, y: f64) -> Result<f64, ConvertError> {
        let x = (finite("linear input", y)? - self.offset) / self.scale;
        finite("linear result", x)
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use proptest::prelude::*;

    #[test]
    fn pt100_matches_the_iec_60751_table() {
        // IEC 60751 Pt100 table values, ohms to 0.01 (from memory); each also checked by hand
        // against the CVD equation with the standard's A, B, C.
        let table = [
            (-200.0, 18.52),
            (-100.0, 60.26),
            (-50.0, 80.31),
            (0.0, 100.00),
            (50.0, 119.40),
            (100.0, 138.51),
            (200.0, 175.86),
            (300.0, 212.05),
            (400.0, 247.09),
            (500.0, 280.98),
            (600.0, 313.71),
            (850.0, 390.48),
        ];
        for (t, r) in table {
            let got = PlatinumRtd::PT100.resistance(t).unwrap();
            assert!((got - r).abs() <= 0.005, "{t} degC: {got} vs table {r}");
            let back = PlatinumRtd::PT100.temperature(got).unwrap();
            assert!((back - t).abs() < 1e-6, "{t}: {back}");
        }
        // Pt1000 is ten times Pt100 (IEC 60751: same coefficients, R0 = 1000 ohm).
        let r = PlatinumRtd::PT1000.resistance(-100.0).unwrap();
        assert!((r - 602.56).abs() <= 0.005, "{r}");
    }

    #[test]
    fn pt100_inverse_converges_below_one_microkelvin() {
        let rtd = PlatinumRtd::PT100;
        let mut t = -200.0;
        while t <= 850.0 {
            let r = rtd.resistance(t).unwrap();
            let back = rtd.temperature(r).unwrap();
            assert!((back - t).abs() < 1e-6, "{t}: {back}");
            t += 0.731;
        }
        // Just below zero, where the C term is tiny.
        for t in [-1e-9, -1e-4, -0.5] {
            let back = rtd.temperature(rtd.resistance(t).unwrap()).unwrap();
            assert!((back - t).abs() < 1e-6);
        }
    }

    #[test]
    fn pt100_range_errors() {
        let rtd = PlatinumRtd::PT100;
        assert!(matches!(
            rtd.resistance(-200.1),
            Err(ConvertError::OutOfRange { .. })
        ));
        assert!(matches!(
            rtd.resistance(850.1),
            Err(ConvertError::OutOfRange { .. })
        ));
        assert!(matches!(
            rtd.resistance(f64::NAN),
            Err(ConvertError::NotFinite { .. })
        ));
        assert!(matches!(
            rtd.temperature(18.0),
            Err(ConvertError::OutOfRange { .. })
        ));
        assert!(matches!(
            rtd.temperature(391.0),
            Err(ConvertError::OutOfRange { .. })
        ));
        assert!(rtd.temperature(f64::INFINITY).is_err());
        assert!(PlatinumRtd::new(0.0).is_err());
        let e = rtd.temperature(400.0).unwrap_err().to_string();
        assert!(e.contains("400") && e.contains("ohm"), "{e}");
    }

    // A coefficient set widely published for a generic 10 kOhm NTC in thermistor tutorials
    // and example code (from memory; not traced to a manufacturer's datasheet).
    const SH: (f64, f64, f64) = (1.009249522e-3, 2.378405444e-4, 2.019202697e-7);

    #[test]
    fn steinhart_hart_against_an_independent_computation() {
        let sh = SteinhartHart::new(SH.0, SH.1, SH.2).unwrap();
        // Reference values computed independently with Python's math module (direct
        // evaluation of 1/T = A + B ln R + C ln³R, and bisection for R(T)). Note: this set
        // gives 24.68 degC at 10 kOhm, i.e. 9.877 kOhm at 25 degC, not exactly 10 kOhm.
        let t = sh.temperature_k(10_000.0).unwrap();
        assert!((t - 297.831_292_78).abs() < 1e-6, "{t}");
        let r25 = sh.resistance(celsius_to_kelvin(25.0)).unwrap();
        assert!((r25 - 9_876.644_451).abs() < 1e-4, "{r25}");
        let r0 = sh.resistance(celsius_to_kelvin(0.0)).unwrap();
        assert!((r0 - 27_949.620_93).abs() < 1e-3, "{r0}");
        let r100 = sh.resistance(celsius_to_kelvin(100.0)).unwrap();
        assert!((r100 - 864.136_248).abs() < 1e-4, "{r100}");
    }

    #[test]
    fn steinhart_hart_round_trips_and_c_zero() {
        let sh = SteinhartHart::new(SH.0, SH.1, SH.2).unwrap();
        for tc in [-40.0, -10.0, 0.0, 25.0, 60.0, 125.0] {
            let t = celsius_to_kelvin(tc);
            let back = sh.temperature_k(sh.resistance(t).unwrap()).unwrap();
            assert!((back - t).abs() < 1e-9, "{tc}: {back}");
        }
        let lin = SteinhartHart::new(SH.0, SH.1, 0.0).unwrap();
        let t = lin.temperature_k(5_000.0).unwrap();
        assert!((lin.resistance(t).unwrap() - 5_000.0).abs() < 1e-6);
        assert!(SteinhartHart::new(SH.0, -1e-4, SH.2).is_err());
        assert!(SteinhartHart::new(f64::NAN, SH.1, SH.2).is_err());
        assert!(sh.temperature_k(0.0).is_err());
        assert!(sh.temperature_k(-5.0).is_err());
        assert!(sh.resistance(0.0).is_err());
    }

    #[test]
    fn beta_form() {
        // Definition: R(T0) = R0. Value at 0 degC for R0 = 10 kOhm at 25 degC, beta = 3950 K,
        // computed independently with Python's math module: 33620.6037 ohm.
        let b = BetaThermistor::new(10_000.0, celsius_to_kelvin(25.0), 3950.0).unwrap();
        assert!((b.resistance(celsius_to_kelvin(25.0)).unwrap() - 10_000.0).abs() < 1e-9);
        let r0 = b.resistance(celsius_to_kelvin(0.0)).unwrap();
        assert!((r0 - 33_620.603_72).abs() < 1e-3, "{r0}");
        // And 5 kOhm gives 41.4602 degC (same Python computation).
        let t = kelvin_to_celsius(b.temperature_k(5_000.0).unwrap());
        assert!((t - 41.460_234_8).abs() < 1e-6, "{t}");
        assert!(b.temperature_k(0.0).is_err());
        assert!(BetaThermistor::new(10_000.0, 298.15, 0.0).is_err());
    }

    #[test]
    fn linear() {
        let l = Linear::new(0.5, -3.0).unwrap();
        assert_eq!(l.apply(10.0).unwrap(), 2.0);
        assert_eq!(l.invert(2.0).unwrap(), 10.0);
        assert!(Linear::new(0.0, 1.0).is_err());
        assert!(Linear::new(1.0, f64::INFINITY).is_err());
        assert!(Linear::new(1e300, 0.0).unwrap().apply(1e300).is_err());
        assert_eq!(Linear::IDENTITY.apply(7.0).unwrap(), 7.0);
    }

    proptest! {
        #[test]
        fn rtd_never_panics_and_round_trips(x in any::<f64>(), t in -200.0f64..=850.0) {
            let rtd = PlatinumRtd::PT1000;
            let _ = rtd.resistance(x);
            let _ = rtd.temperature(x);
            let back = rtd.temperature(rtd.resistance(t).unwrap()).unwrap();
            prop_assert!((back - t).abs() < 1e-6);
        }

        #[test]
        fn thermistors_never_panic(x in any::<f64>(), a in any::<f64>(), b in any::<f64>(), c in any::<f64>()) {
            if let Ok(sh) = SteinhartHart::new(a, b, c) {
                let _ = sh.resistance(x);
                let _ = sh.temperature_k(x);
            }
            let sh = SteinhartHart::new(SH.0, SH.1, SH.2).unwrap();
            if let Ok(r) = sh.resistance(x) { prop_assert!(r.is_finite() && r > 0.0); }
            if let Ok(t) = sh.temperature_k(x) { prop_assert!(t.is_finite() && t > 0.0); }
            if let Ok(bt) = BetaThermistor::new(a.abs(), b.abs(), c.abs()) {
                let _ = bt.resistance(x);
                let _ = bt.temperature_k(x);
            }
            if let Ok(l) = Linear::new(a, b) {
                let _ = l.apply(x);
                let _ = l.invert(x);
            }
        }
    }
}

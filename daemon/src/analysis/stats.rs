//! One-pass (streaming, constant-memory) summary statistics and simple linear regression.
//!
//! - [`Summary`]: count, mean, variance (sample and population), standard deviation, RMS, min, max
//!   and peak-to-peak of a series, updated one sample or one chunk at a time with Welford's
//!   algorithm (Welford 1962), and mergeable (Chan, Golub & LeVeque 1979) so that segments can be
//!   summarised separately and combined.
//! - [`LinearRegression`] → [`LinearFit`]: ordinary least squares `y = a + b·x` from running
//!   co-moments, with the standard errors of slope and intercept. For the tilt–temperature
//!   coupling, feed x = temperature in K and y = tilt in µrad and the slope is in µrad/K.
//!
//! Units are those of the input; nothing is converted. Non-finite samples are rejected with
//! [`AnalysisError::NonFinite`]; a chunk containing one is rejected whole (nothing from it is
//! added), so the caller can filter and retry without double counting.

use super::{AnalysisError, check_finite};

/// Running summary of a series (Welford's one-pass algorithm).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Summary {
    count: u64,
    mean: f64,
    /// Sum of squared deviations from the running mean.
    m2: f64,
    min: f64,
    max: f64,
}

impl Default for Summary {
    fn default() -> Self {
        Self::new()
    }
}

impl Summary {
    /// An empty summary.
    pub fn new() -> Self {
        Self {
            count: 0,
            mean: 0.0,
            m2: 0.0,
            min: f64::INFINITY,
            max: f64::NEG_INFINITY,
        }
    }

    /// Adds one sample; a non-finite sample is rejected and nothing changes.
    pub fn push(&mut self, x: f64) -> Result<(), AnalysisError> {
        check_finite("summary sample", std::slice::from_ref(&x))?;
        self.push_unchecked(x);
        Ok(())
    }

    /// Adds every sample of a chunk; if any is non-finite the whole chunk is rejected.
    pub fn extend(&mut self, xs: &[f64]) -> Result<(), AnalysisError> {
        check_finite("summary samples", xs)?;
        for &x in xs {
            self.push_unchecked(x);
        }
        Ok(())
    }

    fn push_unchecked(&mut self, x: f64) {
        self.count += 1;
        let delta = x - self.mean;
        self.mean += delta / self.count as f64;
        self.m2 += delta * (x - self.mean);
        self.min = self.min.min(x);
        self.max = self.max.max(x);
    }

    /// Folds another summary into this one, as if its samples had been pushed here.
    pub fn merge(&mut self, other: &Summary) {
        if other.count == 0 {
            return;
        }
        if self.count == 0 {
            *self = *other;
            return;
        }
        let n_a = self.count as f64;
        let n_b = other.count as f64;
        let n = n_a + n_b;
        let delta = other.mean - self.mean;
        self.mean += delta * n_b / n;
        self.m2 += other.m2 + delta * delta * n_a * n_b / n;
        self.count += other.count;
        self.min = self.min.min(other.min);
        self.max = self.max.max(other.max);
    }

    /// Number of samples.
    pub fn count(&self) -> u64 {
        self.count
    }

    /// Arithmetic mean; `None` when empty.
    pub fn mean(&self) -> Option<f64> {
        (self.count > 0).then_some(self.mean)
    }

    /// Sample variance (divisor n − 1); `None` with fewer than 2 samples.
    pub fn variance(&self) -> Option<f64> {
        (self.count > 1).then(|| self.m2 / (self.count - 1) as f64)
    }

    /// Population variance (divisor n); `None` when empty.
    pub fn population_variance(&self) -> Option<f64> {
        (self.count > 0).then(|| self.m2 / self.count as f64)
    }

    /// Sample standard deviation (divisor n − 1); `None` with fewer than 2 samples.
    pub fn std_dev(&self) -> Option<f64> {
        self.variance().map(f64::sqrt)
    }

    /// Root mean square, sqrt(mean(x²)) = sqrt(mean² + population variance); `None` when empty.
    pub fn rms(&self) -> Option<f64> {
        self.population_variance()
            .map(|v| (self.mean * self.mean + v).sqrt())
    }

    /// Smallest sample; `None` when empty.
    pub fn min(&self) -> Option<f64> {
        (self.count > 0).then_some(self.min)
    }

    /// Largest sample; `None` when empty.
    pub fn max(&self) -> Option<f64> {
        (self.count > 0).then_some(self.max)
    }

    /// max − min; `None` when empty.
    pub fn peak_to_peak(&self) -> Option<f64> {
        (self.count > 0).then_some(self.max - self.min)
    }
}

/// Running simple linear regression of y on x (ordinary least squares, one pass).
#[derive(Debug, Clone, Copy, PartialEq, Default)]
pub struct LinearRegression {
    count: u64,
    mean_x: f64,
    mean_y: f64,
    /// Σ(x − x̄)²
    sxx: f64,
    /// Σ(y − ȳ)²
    syy: f64,
    /// Σ(x − x̄)(y − ȳ)
    sxy: f64,
}

/// Result of [`LinearRegression::fit`]: `y = intercept + slope·x`.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct LinearFit {
    /// Number of (x, y) pairs.
    pub count: u64,
    /// Intercept a, in y units.
    pub intercept: f64,
    /// Slope b, in y units per x unit.
    pub slope: f64,
    /// Standard error of the intercept.
    pub intercept_std_err: f64,
    /// Standard error of the slope: s / sqrt(Σ(x − x̄)²).
    pub slope_std_err: f64,
    /// Residual standard deviation s = sqrt(SS_res / (n − 2)).
    pub residual_std_dev: f64,
    /// Coefficient of determination R² = 1 − SS_res/SS_tot (1 when y is constant and fitted exactly).
    pub r_squared: f64,
}

impl LinearRegression {
    /// An empty regression.
    pub fn new() -> Self {
        Self::default()
    }

    /// Adds one pair; a non-finite value is rejected and nothing changes.
    pub fn push(&mut self, x: f64, y: f64) -> Result<(), AnalysisError> {
        check_finite("regression x", std::slice::from_ref(&x))?;
        check_finite("regression y", std::slice::from_ref(&y))?;
        self.push_unchecked(x, y);
        Ok(())
    }

    /// Adds paired chunks; the whole chunk is rejected if lengths differ or any value is non-finite.
    pub fn extend(&mut self, xs: &[f64], ys: &[f64]) -> Result<(), AnalysisError> {
        if xs.len() != ys.len() {
            return Err(AnalysisError::LengthMismatch {
                what: "regression x and y",
                left: xs.len(),
                right: ys.len(),
            });
        }
        check_finite("regression x", xs)?;
        check_finite("regression y", ys)?;
        for (&x, &y) in xs.iter().zip(ys) {
            self.push_unchecked(x, y);
        }
        Ok(())
    }

    fn push_unchecked(&mut self, x: f64, y: f64) {
        self.count += 1;
        let n = self.count as f64;
        let dx = x - self.mean_x;
        let dy = y - self.mean_y;
        self.mean_x += dx / n;
        self.mean_y += dy / n;
        // Welford-style co-moment updates: old deviation times new deviation.
        self.sxx += dx * (x - self.mean_x);
        self.syy += dy * (y - self.mean_y);
        self.sxy += dx * (y - self.mean_y);
    }

    /// Folds another regression into this one, as if its pairs had been pushed here.
    pub fn merge(&mut self, other: &LinearRegression) {
        if other.count == 0 {
            return;
        }
        if self.count == 0 {
            *self = *other;
            return;
        }
        let n_a = self.count as f64;
        let n_b = other.count as f64;
        let n = n_a + n_b;
        let dx = other.mean_x - self.mean_x;
        let dy = other.mean_y - self.mean_y;
        let w = n_a * n_b / n;
        self.sxx += other.sxx + dx * dx * w;
        self.syy += other.syy + dy * dy * w;
        self.sxy += other.sxy + dx * dy * w;
        self.mean_x += dx * n_b / n;
        self.mean_y += dy * n_b / n;
        self.count += other.count;
    }

    /// Number of pairs so far.
    pub fn count(&self) -> u64 {
        self.count
    }

    /// The least-squares line. Needs at least 3 pairs (for n − 2 residual degrees of freedom) and
    /// x values that are not all equal.
    pub fn fit(&self) -> Result<LinearFit, AnalysisError> {
        if self.count < 3 {
            return Err(AnalysisError::TooFewSamples {
                what: "linear regression",
                needed: 3,
                got: self.count as usize,
            });
        }
        // Relative to the spread of x, sxx must not be rounding noise.
        if self.sxx <= f64::EPSILON * self.mean_x * self.mean_x * self.count as f64
            || self.sxx <= 0.0
        {
            return Err(AnalysisError::Degenerate(format!(
                "linear regression: all {} x values are equal ({}), so the slope is undefined",
                self.count, self.mean_x
            )));
        }
        let n = self.count as f64;
        let slope = self.sxy / self.sxx;
        let intercept = self.mean_y - slope * self.mean_x;
        let ss_res = (self.syy - slope * self.sxy).max(0.0);
        let residual_std_dev = (ss_res / (n - 2.0)).sqrt();
        let slope_std_err = residual_std_dev / self.sxx.sqrt();
        let intercept_std_err =
            residual_std_dev * (1.0 / n + self.mean_x * self.mean_x / self.sxx).sqrt();
        let r_squared = if self.syy > 0.0 {
            1.0 - ss_res / self.syy
        } else {
            1.0
        };
        Ok(LinearFit {
            count: self.count,
            intercept,
            slope,
            intercept_std_err,
            slope_std_err,
            residual_std_dev,
            r_squared,
        })
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn rel(a: f64, b: f64) -> f64 {
        ((a - b) / b).abs()
    }

    /// NIST StRD univariate summary statistics, "NumAcc1": 10000001, 10000003, 10000002;
    /// certified mean 10000002, certified standard deviation 1 (data and values from memory).
    #[test]
    fn nist_numacc1() {
        let mut s = Summary::new();
        s.extend(&[10000001.0, 10000003.0, 10000002.0]).unwrap();
        assert_eq!(s.mean(), Some(10000002.0));
        assert!((s.std_dev().unwrap() - 1.0).abs() < 1e-12);
        assert_eq!(s.peak_to_peak(), Some(2.0));
    }

    /// NIST StRD "NumAcc3" and "NumAcc4" (from memory): 1001 values, the first is c + 0.2, then
    /// c + 0.1 and c + 0.3 alternate (500 each); certified mean c + 0.2, certified sd 0.1, with
    /// c = 1000000 (NumAcc3) and c = 10000000 (NumAcc4). A textbook Σx² − n·x̄² computation loses all
    /// digits of the variance here; Welford keeps about 8 (NIST's certified values carry 15).
    #[test]
    fn nist_numacc3_numacc4() {
        for (c, tol_sd) in [(1_000_000.0, 1e-8), (10_000_000.0, 1e-7)] {
            let mut data = vec![c + 0.2];
            for _ in 0..500 {
                data.push(c + 0.1);
                data.push(c + 0.3);
            }
            let mut s = Summary::new();
            s.extend(&data).unwrap();
            assert_eq!(s.count(), 1001);
            assert!(rel(s.mean().unwrap(), c + 0.2) < 1e-15, "mean for c={c}");
            assert!(
                rel(s.std_dev().unwrap(), 0.1) < tol_sd,
                "sd for c={c}: {}",
                s.std_dev().unwrap()
            );
        }
    }

    #[test]
    fn rms_min_max_and_merge() {
        // RMS of a 3-4-5 set: sqrt((9+16+25)/3) — arithmetic, common practice.
        let mut a = Summary::new();
        a.extend(&[3.0, -4.0]).unwrap();
        let mut b = Summary::new();
        b.push(5.0).unwrap();
        let mut whole = Summary::new();
        whole.extend(&[3.0, -4.0, 5.0]).unwrap();
        a.merge(&b);
        assert_eq!(a.count(), 3);
        assert!(rel(a.rms().unwrap(), (50.0f64 / 3.0).sqrt()) < 1e-15);
        assert!(rel(a.variance().unwrap(), whole.variance().unwrap()) < 1e-14);
        assert_eq!(a.min(), Some(-4.0));
        assert_eq!(a.max(), Some(5.0));
        assert_eq!(a.peak_to_peak(), Some(9.0));
    }

    #[test]
    fn empty_and_non_finite() {
        let mut s = Summary::new();
        assert_eq!(s.mean(), None);
        assert_eq!(s.rms(), None);
        assert_eq!(s.peak_to_peak(), None);
        s.push(1.0).unwrap();
        assert_eq!(s.variance(), None);
        let err = s.extend(&[2.0, f64::NAN]).unwrap_err();
        assert!(matches!(err, AnalysisError::NonFinite { index: 1, .. }));
        assert_eq!(s.count(), 1, "a rejected chunk adds nothing");
        assert!(s.push(f64::INFINITY).is_err());
    }

    /// NIST StRD linear regression dataset "Norris" (36 observations, y then x). Data and certified
    /// values are from memory; they were confirmed by numpy.polyfit reproducing all six certified
    /// values below to 12 or more significant digits.
    const NORRIS: [(f64, f64); 36] = [
        (0.1, 0.2),
        (338.8, 337.4),
        (118.1, 118.2),
        (888.0, 884.6),
        (9.2, 10.1),
        (228.1, 226.5),
        (668.5, 666.3),
        (998.5, 996.3),
        (449.1, 448.6),
        (778.9, 777.0),
        (559.2, 558.2),
        (0.3, 0.4),
        (0.1, 0.6),
        (778.1, 775.5),
        (668.8, 666.9),
        (339.3, 338.0),
        (448.9, 447.5),
        (10.8, 11.6),
        (557.7, 556.0),
        (228.3, 228.1),
        (998.0, 995.8),
        (888.8, 887.6),
        (119.6, 120.2),
        (0.3, 0.3),
        (0.6, 0.3),
        (557.6, 556.8),
        (339.3, 339.1),
        (888.0, 887.2),
        (998.5, 999.0),
        (778.9, 779.0),
        (10.2, 11.1),
        (117.6, 118.3),
        (228.9, 229.2),
        (668.4, 669.1),
        (449.2, 448.9),
        (0.2, 0.5),
    ];

    #[test]
    fn nist_norris_certified_values() {
        let mut r = LinearRegression::new();
        for &(y, x) in &NORRIS {
            r.push(x, y).unwrap();
        }
        let f = r.fit().unwrap();
        // Certified values, NIST StRD Norris (from memory).
        assert!(rel(f.intercept, -0.262323073774029) < 1e-9);
        assert!(rel(f.intercept_std_err, 0.232818234301152) < 1e-9);
        assert!(rel(f.slope, 1.00211681802045) < 1e-11);
        assert!(rel(f.slope_std_err, 0.429796848199937e-3) < 1e-9);
        assert!(rel(f.residual_std_dev, 0.884796396144373) < 1e-9);
        assert!(rel(f.r_squared, 0.999993745883712) < 1e-12);
    }

    #[test]
    fn regression_merge_matches_single_pass() {
        let mut whole = LinearRegression::new();
        let mut a = LinearRegression::new();
        let mut b = LinearRegression::new();
        for (i, &(y, x)) in NORRIS.iter().enumerate() {
            whole.push(x, y).unwrap();
            if i < 13 { a.push(x, y) } else { b.push(x, y) }.unwrap();
        }
        a.merge(&b);
        let (fa, fw) = (a.fit().unwrap(), whole.fit().unwrap());
        assert!(rel(fa.slope, fw.slope) < 1e-13);
        assert!(rel(fa.slope_std_err, fw.slope_std_err) < 1e-9);
    }

    #[test]
    fn regression_errors() {
        let mut r = LinearRegression::new();
        r.extend(&[1.0, 2.0], &[1.0, 2.0]).unwrap();
        assert!(matches!(
            r.fit(),
            Err(AnalysisError::TooFewSamples { needed: 3, .. })
        ));
        assert!(matches!(
            r.extend(&[1.0], &[1.0, 2.0]),
            Err(AnalysisError::LengthMismatch { .. })
        ));
        assert!(r.push(f64::NAN, 1.0).is_err());
        let mut flat = LinearRegression::new();
        flat.extend(&[293.15; 5], &[1.0, 2.0, 3.0, 4.0, 5.0])
            .unwrap();
        assert!(matches!(flat.fit(), Err(AnalysisError::Degenerate(_))));
    }
}

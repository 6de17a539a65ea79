//! First-order-plus-dead-time (FOPDT) model fit to a recorded step response.
//!
//! Model: after an input step Δu at time t_s, the output is
//! y(t) = y0 + K·Δu·(1 − e^{−(t − t_s − θ)/τ}) for t − t_s > θ, and y0 before,
//! with gain K (output unit per input unit), time constant τ (s) and dead time θ (s, ≥ 0).
//!
//! Main types and functions:
//! - [`StepTest`]: the record (times in s, output samples, step time, step size).
//! - [`two_point_estimate`] → [`TwoPointEstimate`]: Smith's two-point method (Smith 1972): the times
//!   t₁ and t₂ at which the response reaches 28.3 % and 63.2 % of its final change give
//!   τ = 1.5·(t₂ − t₁) and θ = t₂ − τ. The fractions used are the exact ones, 1 − e^{−1/3} and
//!   1 − e^{−1}, of which 28.3 % and 63.2 % are the rounded values, so a noiseless response gives
//!   τ and θ exactly; the crossing times are interpolated linearly in ln(1 − fraction), which is
//!   exact on a noiseless first-order response.
//! - [`fit_step`] → [`FopdtFit`]: least squares on (K, τ, θ) by Levenberg–Marquardt, seeded by the
//!   two-point estimate, with y0 fixed at the mean of the pre-step baseline. Reports the residual
//!   RMS, R², the parameters' standard errors and a coarse [`FitQuality`].
//!
//! The baseline is every sample with t < t_s; the final value (for the seed and the step check) is the
//! mean of the last 10 % of the post-step samples.

use super::{AnalysisError, check_finite};

/// Fewest samples accepted before the step.
pub const MIN_BASELINE_SAMPLES: usize = 2;
/// Fewest samples accepted at or after the step.
pub const MIN_RESPONSE_SAMPLES: usize = 10;
const MAX_ITERATIONS: usize = 200;

/// A first-order-plus-dead-time model.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct FopdtModel {
    /// Steady-state gain K, output unit per input unit (negative for a reverse-acting plant).
    pub gain: f64,
    /// Time constant τ in s (> 0).
    pub time_constant_s: f64,
    /// Dead time θ in s (≥ 0).
    pub dead_time_s: f64,
}

impl FopdtModel {
    /// The model's output at time `t_s` for a step of `input_step` at `step_time_s` from `baseline`.
    pub fn response(&self, baseline: f64, input_step: f64, step_time_s: f64, t_s: f64) -> f64 {
        let since = t_s - step_time_s - self.dead_time_s;
        if since <= 0.0 {
            baseline
        } else {
            baseline + self.gain * input_step * (1.0 - (-since / self.time_constant_s).exp())
        }
    }
}

/// A recorded step test.
#[derive(Debug, Clone, Copy)]
pub struct StepTest<'a> {
    /// Sample times in s, strictly increasing.
    pub time_s: &'a [f64],
    /// Output samples, one per time.
    pub output: &'a [f64],
    /// When the input step was applied, s (same clock as `time_s`).
    pub step_time_s: f64,
    /// Size of the input step Δu (input units, non-zero).
    pub input_step: f64,
}

/// Result of [`two_point_estimate`].
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct TwoPointEstimate {
    /// The model from the two crossing times.
    pub model: FopdtModel,
    /// Pre-step baseline y0 (mean of samples before the step).
    pub baseline: f64,
    /// Final value (mean of the last 10 % of post-step samples).
    pub final_value: f64,
    /// Time after the step at which the response reached 1 − e^{−1/3} ≈ 28.3 % of its change, s.
    pub t_283_s: f64,
    /// Time after the step at which the response reached 1 − e^{−1} ≈ 63.2 % of its change, s.
    pub t_632_s: f64,
}

/// Coarse judgement of a fit (thresholds are this project's choice, not a standard).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum FitQuality {
    /// R² ≥ 0.98 and the record covers at least 3τ after the dead time.
    Good,
    /// R² ≥ 0.9.
    Fair,
    /// Anything worse: the model or the record is not adequate.
    Poor,
}

/// Result of [`fit_step`].
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct FopdtFit {
    /// Least-squares model.
    pub model: FopdtModel,
    /// Pre-step baseline y0 (held fixed in the fit).
    pub baseline: f64,
    /// The two-point estimate that seeded the fit.
    pub seed: TwoPointEstimate,
    /// RMS of the residuals over the post-step samples, output units.
    pub residual_rms: f64,
    /// R² over the post-step samples.
    pub r_squared: f64,
    /// Standard error of K.
    pub gain_std_err: f64,
    /// Standard error of τ, s.
    pub time_constant_std_err_s: f64,
    /// Standard error of θ, s.
    pub dead_time_std_err_s: f64,
    /// Levenberg–Marquardt iterations used.
    pub iterations: usize,
    /// Whether the record extends at least 3τ beyond the dead time (95 % of the change).
    pub settled: bool,
    /// Coarse quality.
    pub quality: FitQuality,
}

/// Validated pieces of a step test.
struct Prepared<'a> {
    t: &'a [f64],
    y: &'a [f64],
    ts: f64,
    du: f64,
    /// Index of the first sample at or after the step.
    first: usize,
    baseline: f64,
    final_value: f64,
}

fn prepare<'a>(test: &StepTest<'a>) -> Result<Prepared<'a>, AnalysisError> {
    let (t, y) = (test.time_s, test.output);
    if t.len() != y.len() {
        return Err(AnalysisError::LengthMismatch {
            what: "step test time_s and output",
            left: t.len(),
            right: y.len(),
        });
    }
    check_finite("step test time_s", t)?;
    check_finite("step test output", y)?;
    if let Some(i) = t.windows(2).position(|w| w[1] <= w[0]) {
        return Err(AnalysisError::Degenerate(format!(
            "step test time_s must be strictly increasing, but sample {} ({} s) does not follow \
             sample {} ({} s)",
            i + 1,
            t[i + 1],
            i,
            t[i]
        )));
    }
    for (name, value) in [
        ("step_time_s", test.step_time_s),
        ("input_step", test.input_step),
    ] {
        if !value.is_finite() {
            return Err(AnalysisError::InvalidParameter {
                name,
                value,
                allowed: "a finite number",
            });
        }
    }
    if test.input_step == 0.0 {
        return Err(AnalysisError::InvalidParameter {
            name: "input_step",
            value: 0.0,
            allowed: "a non-zero input step",
        });
    }
    let first = t.partition_point(|&ti| ti < test.step_time_s);
    if first < MIN_BASELINE_SAMPLES {
        return Err(AnalysisError::TooFewSamples {
            what: "step test baseline (samples before step_time_s)",
            needed: MIN_BASELINE_SAMPLES,
            got: first,
        });
    }
    let after = t.len() - first;
    if after < MIN_RESPONSE_SAMPLES {
        return Err(AnalysisError::TooFewSamples {
            what: "step test response (samples at or after step_time_s)",
            needed: MIN_RESPONSE_SAMPLES,
            got: after,
        });
    }
    let pre = &y[..first];
    let baseline = pre.iter().sum::<f64>() / first as f64;
    let baseline_sd =
        (pre.iter().map(|v| (v - baseline).powi(2)).sum::<f64>() / (first - 1) as f64).sqrt();
    let tail = (after / 10).max(3);
    let final_value = y[y.len() - tail..].iter().sum::<f64>() / tail as f64;
    let change = final_value - baseline;
    if !(change.is_finite() && baseline_sd.is_finite()) {
        return Err(AnalysisError::Degenerate(format!(
            "step test output too large to analyse: baseline {baseline}, final value {final_value}"
        )));
    }
    // A change within 5 baseline standard deviations (or within rounding) is no visible step.
    let floor = (5.0 * baseline_sd).max(1e-12 * baseline.abs().max(final_value.abs()));
    if change.abs() <= floor {
        return Err(AnalysisError::Degenerate(format!(
            "no step in the response: the final value {final_value} differs from the baseline \
             {baseline} by {change}, within the noise floor {floor} (5 baseline standard deviations)"
        )));
    }
    Ok(Prepared {
        t,
        y,
        ts: test.step_time_s,
        du: test.input_step,
        first,
        baseline,
        final_value,
    })
}

/// First time after the step at which the normalised response reaches `level` (0 < level < 1),
/// interpolated linearly in ln(1 − fraction).
fn crossing(p: &Prepared<'_>, level: f64) -> Option<f64> {
    let change = p.final_value - p.baseline;
    let frac = |i: usize| (p.y[i] - p.baseline) / change;
    let mut prev: Option<usize> = None;
    for i in p.first..p.t.len() {
        let f = frac(i);
        if f >= level {
            let Some(j) = prev else {
                return Some(p.t[i] - p.ts);
            };
            let fj = frac(j);
            let (tj, ti) = (p.t[j] - p.ts, p.t[i] - p.ts);
            let (lj, li, ll) = (1.0 - fj, 1.0 - f, 1.0 - level);
            let s = if lj > 0.0 && li > 0.0 && lj != li {
                (ll.ln() - lj.ln()) / (li.ln() - lj.ln())
            } else if f != fj {
                (level - fj) / (f - fj)
            } else {
                1.0
            };
            return Some(tj + s.clamp(0.0, 1.0) * (ti - tj));
        }
        prev = Some(i);
    }
    None
}

fn two_point(p: &Prepared<'_>) -> Result<TwoPointEstimate, AnalysisError> {
    let l1 = 1.0 - (-1.0f64 / 3.0).exp();
    let l2 = 1.0 - (-1.0f64).exp();
    let (Some(t1), Some(t2)) = (crossing(p, l1), crossing(p, l2)) else {
        return Err(AnalysisError::Degenerate(
            "the response never reaches 63.2 % of its final change".into(),
        ));
    };
    let tau = 1.5 * (t2 - t1);
    if tau <= 0.0 {
        return Err(AnalysisError::Degenerate(format!(
            "the response reaches 63.2 % of its change ({t2} s after the step) no later than \
             28.3 % ({t1} s): too noisy or too coarsely sampled for a two-point estimate"
        )));
    }
    Ok(TwoPointEstimate {
        model: FopdtModel {
            gain: (p.final_value - p.baseline) / p.du,
            time_constant_s: tau,
            dead_time_s: (t2 - tau).max(0.0),
        },
        baseline: p.baseline,
        final_value: p.final_value,
        t_283_s: t1,
        t_632_s: t2,
    })
}

/// Smith's two-point estimate of an FOPDT model from a step test.
pub fn two_point_estimate(test: &StepTest<'_>) -> Result<TwoPointEstimate, AnalysisError> {
    two_point(&prepare(test)?)
}

/// Residuals, Jacobian rows (∂model/∂(K, τ, θ)) and cost for parameters `q`.
fn evaluate(p: &Prepared<'_>, q: [f64; 3], jac: Option<&mut Vec<[f64; 3]>>) -> (f64, Vec<f64>) {
    let [k, tau, theta] = q;
    let mut res = Vec::with_capacity(p.t.len() - p.first);
    let mut rows = Vec::new();
    let want = jac.is_some();
    for i in p.first..p.t.len() {
        let since = p.t[i] - p.ts - theta;
        let (model, row) = if since > 0.0 {
            let e = (-since / tau).exp();
            let m = p.baseline + k * p.du * (1.0 - e);
            let row = [
                p.du * (1.0 - e),
                -k * p.du * e * since / (tau * tau),
                -k * p.du * e / tau,
            ];
            (m, row)
        } else {
            (p.baseline, [0.0; 3])
        };
        res.push(p.y[i] - model);
        if want {
            rows.push(row);
        }
    }
    if let Some(j) = jac {
        *j = rows;
    }
    (res.iter().map(|r| r * r).sum(), res)
}

/// Solves a 3×3 system by Gaussian elimination with partial pivoting; `None` if singular.
fn solve3(mut a: [[f64; 3]; 3], mut b: [f64; 3]) -> Option<[f64; 3]> {
    for c in 0..3 {
        let piv = (c..3).max_by(|&i, &j| a[i][c].abs().total_cmp(&a[j][c].abs()))?;
        if a[piv][c].abs() < 1e-300 || !a[piv][c].is_finite() {
            return None;
        }
        a.swap(c, piv);
        b.swap(c, piv);
        let pivot_row = a[c];
        for r in c + 1..3 {
            let f = a[r][c] / pivot_row[c];
            for (dst, src) in a[r].iter_mut().zip(&pivot_row).skip(c) {
                *dst -= f * src;
            }
            b[r] -= f * b[c];
        }
    }
    let mut x = [0.0; 3];
    for r in (0..3).rev() {
        let s: f64 = (r + 1..3).map(|k| a[r][k] * x[k]).sum();
        x[r] = (b[r] - s) / a[r][r];
    }
    x.iter().all(|v| v.is_finite()).then_some(x)
}

fn normal_equations(rows: &[[f64; 3]], res: &[f64]) -> ([[f64; 3]; 3], [f64; 3]) {
    let mut a = [[0.0; 3]; 3];
    let mut g = [0.0; 3];
    for (row, r) in rows.iter().zip(res) {
        for i in 0..3 {
            g[i] += row[i] * r;
            for j in 0..3 {
                a[i][j] += row[i] * row[j];
            }
        }
    }
    (a, g)
}

/// Least-squares FOPDT fit to a step test (Levenberg–Marquardt seeded by [`two_point_estimate`]).
pub fn fit_step(test: &StepTest<'_>) -> Result<FopdtFit, AnalysisError> {
    let p = prepare(test)?;
    let seed = two_point(&p)?;
    let span = p.t[p.t.len() - 1] - p.ts;
    let tau_min = 1e-9 * span.max(f64::MIN_POSITIVE);
    let clamp = |q: [f64; 3]| [q[0], q[1].max(tau_min), q[2].clamp(0.0, span)];
    let mut q = clamp([
        seed.model.gain,
        seed.model.time_constant_s,
        seed.model.dead_time_s,
    ]);
    let mut rows = Vec::new();
    let (mut cost, mut res) = evaluate(&p, q, Some(&mut rows));
    let mut lambda = 1e-3;
    let mut iterations = 0;
    let mut converged = false;
    while iterations < MAX_ITERATIONS {
        iterations += 1;
        let (a, g) = normal_equations(&rows, &res);
        let mut damped = a;
        for (i, row) in damped.iter_mut().enumerate() {
            row[i] += lambda * a[i][i].max(1e-12 * (a[0][0] + a[1][1] + a[2][2]));
        }
        let Some(delta) = solve3(damped, g) else {
            lambda *= 10.0;
            if lambda > 1e12 {
                break;
            }
            continue;
        };
        let cand = clamp([q[0] + delta[0], q[1] + delta[1], q[2] + delta[2]]);
        let (c_cost, _) = evaluate(&p, cand, None);
        if c_cost.is_finite() && c_cost <= cost {
            let small = (0..3).all(|i| (cand[i] - q[i]).abs() <= 1e-10 * (q[i].abs() + tau_min));
            let rel_drop = (cost - c_cost) / cost.max(f64::MIN_POSITIVE);
            q = cand;
            (cost, res) = evaluate(&p, q, Some(&mut rows));
            lambda = (lambda / 3.0).max(1e-12);
            if small || rel_drop < 1e-14 {
                converged = true;
                break;
            }
        } else {
            lambda *= 4.0;
            if lambda > 1e12 {
                // No downhill step even with tiny steps: at a minimum to within rounding.
                converged = true;
                break;
            }
        }
    }
    let finite = q.iter().all(|v| v.is_finite()) && cost.is_finite();
    if !converged || !finite {
        return Err(AnalysisError::NoConvergence {
            iterations,
            reason: format!(
                "Levenberg–Marquardt stopped at K = {}, tau = {} s, theta = {} s",
                q[0], q[1], q[2]
            ),
        });
    }
    let n = res.len() as f64;
    let mean_y = p.y[p.first..].iter().sum::<f64>() / n;
    let ss_tot: f64 = p.y[p.first..].iter().map(|v| (v - mean_y).powi(2)).sum();
    let r_squared = if ss_tot > 0.0 {
        1.0 - cost / ss_tot
    } else {
        1.0
    };
    let (a, _) = normal_equations(&rows, &res);
    let s2 = cost / (n - 3.0).max(1.0);
    let mut se = [f64::NAN; 3];
    for (i, e) in se.iter_mut().enumerate() {
        let mut unit = [0.0; 3];
        unit[i] = 1.0;
        if let Some(col) = solve3(a, unit) {
            *e = (s2 * col[i]).max(0.0).sqrt();
        }
    }
    let model = FopdtModel {
        gain: q[0],
        time_constant_s: q[1],
        dead_time_s: q[2],
    };
    let settled = span - model.dead_time_s >= 3.0 * model.time_constant_s;
    let quality = if r_squared >= 0.98 && settled {
        FitQuality::Good
    } else if r_squared >= 0.9 {
        FitQuality::Fair
    } else {
        FitQuality::Poor
    };
    Ok(FopdtFit {
        model,
        baseline: p.baseline,
        seed,
        residual_rms: (cost / n).sqrt(),
        r_squared,
        gain_std_err: se[0],
        time_constant_std_err_s: se[1],
        dead_time_std_err_s: se[2],
        iterations,
        settled,
        quality,
    })
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::analysis::test_util::Gauss;

    const TRUE: FopdtModel = FopdtModel {
        gain: 2.5,
        time_constant_s: 120.0,
        dead_time_s: 30.0,
    };

    /// Simulated (invented) step test: baseline 20.0, Δu = 0.4 at t = 100 s, 1 s sampling.
    fn simulate(model: FopdtModel, end_s: f64, noise_sd: f64, seed: u64) -> (Vec<f64>, Vec<f64>) {
        let mut g = Gauss::new(seed);
        let t: Vec<f64> = (0..=end_s as usize).map(|i| i as f64).collect();
        let y = t
            .iter()
            .map(|&ti| model.response(20.0, 0.4, 100.0, ti) + g.sample(noise_sd))
            .collect();
        (t, y)
    }

    fn test_of<'a>(t: &'a [f64], y: &'a [f64]) -> StepTest<'a> {
        StepTest {
            time_s: t,
            output: y,
            step_time_s: 100.0,
            input_step: 0.4,
        }
    }

    fn rel(a: f64, b: f64) -> f64 {
        ((a - b) / b).abs()
    }

    /// On a noiseless response that has settled (40τ, so e^{−36} ≈ 2e-16 of the change is left in
    /// the tail average), Smith's method with the exact fractions recovers K, τ, θ to rounding.
    #[test]
    fn two_point_is_exact_on_noiseless_response() {
        let (t, y) = simulate(TRUE, 100.0 + 40.0 * 120.0, 0.0, 0);
        let e = two_point_estimate(&test_of(&t, &y)).unwrap();
        assert!(rel(e.model.gain, 2.5) < 1e-12);
        assert!(rel(e.model.time_constant_s, 120.0) < 1e-9);
        assert!(rel(e.model.dead_time_s, 30.0) < 1e-9);
        // t₁ = θ + τ/3, t₂ = θ + τ (Smith 1972's two points, analytic).
        assert!((e.t_283_s - 70.0).abs() < 1e-7);
        assert!((e.t_632_s - 150.0).abs() < 1e-7);
        let f = fit_step(&test_of(&t, &y)).unwrap();
        assert!(rel(f.model.time_constant_s, 120.0) < 1e-9);
        assert!(f.residual_rms < 1e-9);
        assert_eq!(f.quality, FitQuality::Good);
    }

    /// Noisy step (noise 1 % of the change KΔu = 1.0; about 12τ recorded): the fit must recover each
    /// parameter within 4 of its own standard errors and within stated absolute tolerances
    /// (K 1 %, τ 3 %, θ 2 s); the residual RMS must match the noise within 10 %.
    #[test]
    fn fit_recovers_parameters_from_noisy_step() {
        for seed in [1, 2, 3] {
            let (t, y) = simulate(TRUE, 1600.0, 0.01, seed);
            let f = fit_step(&test_of(&t, &y)).unwrap();
            let m = f.model;
            assert!(rel(m.gain, 2.5) < 0.01, "seed {seed}: K {}", m.gain);
            assert!(
                rel(m.time_constant_s, 120.0) < 0.03,
                "seed {seed}: tau {}",
                m.time_constant_s
            );
            assert!(
                (m.dead_time_s - 30.0).abs() < 2.0,
                "seed {seed}: theta {}",
                m.dead_time_s
            );
            assert!((m.gain - 2.5).abs() < 4.0 * f.gain_std_err);
            assert!((m.time_constant_s - 120.0).abs() < 4.0 * f.time_constant_std_err_s);
            assert!((m.dead_time_s - 30.0).abs() < 4.0 * f.dead_time_std_err_s);
            assert!(rel(f.residual_rms, 0.01) < 0.1, "rms {}", f.residual_rms);
            assert!(f.settled);
            assert_eq!(f.quality, FitQuality::Good);
            // The fit improves on its seed.
            let seed_err = rel(f.seed.model.time_constant_s, 120.0);
            assert!(rel(m.time_constant_s, 120.0) <= seed_err.max(0.01));
        }
    }

    #[test]
    fn reverse_acting_plant_and_short_record() {
        let model = FopdtModel { gain: -0.8, ..TRUE };
        let (t, y) = simulate(model, 100.0 + 2.0 * 120.0, 0.002, 9);
        let f = fit_step(&test_of(&t, &y)).unwrap();
        assert!(rel(f.model.gain, -0.8) < 0.1, "{}", f.model.gain);
        assert!(!f.settled, "2τ recorded is not settled");
        assert_ne!(f.quality, FitQuality::Good);
    }

    #[test]
    fn bad_input_is_an_error() {
        let (t, y) = simulate(TRUE, 600.0, 0.0, 0);
        let ok = test_of(&t, &y);
        assert!(matches!(
            fit_step(&StepTest {
                output: &y[..10],
                ..ok
            }),
            Err(AnalysisError::LengthMismatch { .. })
        ));
        let mut nan = y.clone();
        nan[300] = f64::NAN;
        assert!(matches!(
            fit_step(&StepTest { output: &nan, ..ok }),
            Err(AnalysisError::NonFinite { index: 300, .. })
        ));
        let mut back = t.clone();
        back[200] = back[199];
        assert!(matches!(
            fit_step(&StepTest {
                time_s: &back,
                ..ok
            }),
            Err(AnalysisError::Degenerate(_))
        ));
        assert!(matches!(
            fit_step(&StepTest {
                input_step: 0.0,
                ..ok
            }),
            Err(AnalysisError::InvalidParameter {
                name: "input_step",
                ..
            })
        ));
        assert!(matches!(
            fit_step(&StepTest {
                step_time_s: f64::NAN,
                ..ok
            }),
            Err(AnalysisError::InvalidParameter {
                name: "step_time_s",
                ..
            })
        ));
        assert!(matches!(
            fit_step(&StepTest {
                step_time_s: 0.5,
                ..ok
            }),
            Err(AnalysisError::TooFewSamples {
                needed: 2,
                got: 1,
                ..
            })
        ));
        assert!(matches!(
            fit_step(&StepTest {
                step_time_s: 595.0,
                ..ok
            }),
            Err(AnalysisError::TooFewSamples { needed: 10, .. })
        ));
        assert!(matches!(
            fit_step(&StepTest {
                time_s: &[],
                output: &[],
                ..ok
            }),
            Err(AnalysisError::TooFewSamples { .. })
        ));
        // No step: flat noise.
        let mut g = Gauss::new(4);
        let flat: Vec<f64> = t.iter().map(|_| 20.0 + g.sample(0.01)).collect();
        assert!(matches!(
            fit_step(&StepTest {
                output: &flat,
                ..ok
            }),
            Err(AnalysisError::Degenerate(_))
        ));
    }
}

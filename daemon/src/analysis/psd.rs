//! Power and amplitude spectral density by Welch's method, streamed in chunks.
//!
//! Main types: [`WelchConfig`] (sample rate, segment length, [`Detrend`]), the accumulator [`Welch`]
//! (feed it samples with [`Welch::push`] in chunks of any size; it keeps one segment buffer and the
//! running sum of periodograms, so memory is O(segment length) whatever the length of the series),
//! and the result [`Spectrum`].
//!
//! Conventions (chosen to match `scipy.signal.welch(..., scaling="density")` with its defaults):
//! - Window: periodic ("DFT-even") Hann, w\[k\] = 0.5 − 0.5·cos(2πk/N), k = 0..N−1.
//! - Overlap: 50 %, i.e. ⌊N/2⌋ samples; successive segments start N − ⌊N/2⌋ samples apart.
//!   Samples after the last complete segment do not contribute (as in scipy).
//! - Detrending per segment: none, mean removal, or least-squares line removal.
//! - Scaling: each periodogram is |X_k|²/(fs·Σw²); the one-sided spectrum doubles every bin except
//!   DC and (for even N) Nyquist; periodograms are averaged with equal weight.
//! - Units: the PSD is in (input unit)²/Hz, the ASD ([`Spectrum::asd`]) = sqrt(PSD) in input unit/√Hz
//!   (rad/√Hz for tilt in rad). Frequencies are k·fs/N in Hz, k = 0..=⌊N/2⌋.
//!
//! A gap in the record (a new recording segment) is marked with [`Welch::discontinuity`], which drops
//! the partial segment so that no periodogram straddles the gap.

use std::sync::Arc;

use realfft::num_complex::Complex;
use realfft::{RealFftPlanner, RealToComplex};

use super::{AnalysisError, check_finite, check_positive};

/// Largest accepted segment length: 2^22 samples (at 10 Hz a resolution of 2.4 µHz, five days per
/// segment); the buffers then take about 100 MiB.
pub const MAX_SEGMENT_LEN: usize = 1 << 22;

/// How each segment is detrended before windowing.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Detrend {
    /// No detrending.
    None,
    /// Subtract the segment mean (scipy's `detrend="constant"`, its default).
    Mean,
    /// Subtract the least-squares straight line (scipy's `detrend="linear"`).
    Linear,
}

/// Parameters of a Welch estimate.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct WelchConfig {
    /// Sample rate fs in Hz (> 0).
    pub sample_rate_hz: f64,
    /// Segment length N in samples (2 ..= [`MAX_SEGMENT_LEN`]); the frequency resolution is fs/N.
    pub segment_len: usize,
    /// Per-segment detrending.
    pub detrend: Detrend,
}

/// Streaming Welch accumulator.
pub struct Welch {
    config: WelchConfig,
    hop: usize,
    fft: Arc<dyn RealToComplex<f64>>,
    window: Vec<f64>,
    window_power: f64,
    buffer: Vec<f64>,
    work: Vec<f64>,
    out: Vec<Complex<f64>>,
    scratch: Vec<Complex<f64>>,
    sum: Vec<f64>,
    segments: u64,
}

impl std::fmt::Debug for Welch {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("Welch")
            .field("config", &self.config)
            .field("segments", &self.segments)
            .field("pending", &self.buffer.len())
            .finish_non_exhaustive()
    }
}

/// A one-sided spectral density estimate.
#[derive(Debug, Clone, PartialEq)]
pub struct Spectrum {
    /// Bin frequencies in Hz, k·fs/N for k = 0..=⌊N/2⌋.
    pub frequencies_hz: Vec<f64>,
    /// One-sided power spectral density in (input unit)²/Hz, one value per frequency.
    pub psd: Vec<f64>,
    /// Number of periodograms averaged.
    pub segments: u64,
    /// Segment length N.
    pub segment_len: usize,
    /// Sample rate fs in Hz.
    pub sample_rate_hz: f64,
}

impl Spectrum {
    /// Amplitude spectral density sqrt(PSD), in input unit/√Hz.
    pub fn asd(&self) -> Vec<f64> {
        self.psd.iter().map(|p| p.sqrt()).collect()
    }

    /// Bin spacing fs/N in Hz.
    pub fn resolution_hz(&self) -> f64 {
        self.sample_rate_hz / self.segment_len as f64
    }

    /// Σ PSD·Δf over all bins: the mean-square of the (windowed, detrended) signal, in unit².
    pub fn integrated_power(&self) -> f64 {
        self.psd.iter().sum::<f64>() * self.resolution_hz()
    }
}

impl Welch {
    /// A new accumulator; fails on a non-positive sample rate or a segment length out of range.
    pub fn new(config: WelchConfig) -> Result<Self, AnalysisError> {
        check_positive(
            "sample_rate_hz",
            config.sample_rate_hz,
            "a finite rate above 0 Hz",
        )?;
        let n = config.segment_len;
        if !(2..=MAX_SEGMENT_LEN).contains(&n) {
            return Err(AnalysisError::InvalidParameter {
                name: "segment_len",
                value: n as f64,
                allowed: "an integer from 2 to 4194304 (2^22) samples",
            });
        }
        let fft = RealFftPlanner::<f64>::new().plan_fft_forward(n);
        let window: Vec<f64> = (0..n)
            .map(|k| 0.5 - 0.5 * (std::f64::consts::TAU * k as f64 / n as f64).cos())
            .collect();
        let window_power = window.iter().map(|w| w * w).sum();
        Ok(Self {
            hop: n - n / 2,
            work: fft.make_input_vec(),
            out: fft.make_output_vec(),
            scratch: fft.make_scratch_vec(),
            sum: vec![0.0; n / 2 + 1],
            buffer: Vec::with_capacity(n),
            fft,
            window,
            window_power,
            config,
            segments: 0,
        })
    }

    /// The configuration.
    pub fn config(&self) -> &WelchConfig {
        &self.config
    }

    /// Number of complete segments processed so far.
    pub fn segments(&self) -> u64 {
        self.segments
    }

    /// Samples buffered towards the next segment.
    pub fn pending(&self) -> usize {
        self.buffer.len()
    }

    /// Feeds the next samples of the series. A chunk containing a non-finite sample is rejected
    /// whole (nothing from it is used).
    pub fn push(&mut self, samples: &[f64]) -> Result<(), AnalysisError> {
        check_finite("welch samples", samples)?;
        let n = self.config.segment_len;
        let mut rest = samples;
        while !rest.is_empty() {
            let take = (n - self.buffer.len()).min(rest.len());
            self.buffer.extend_from_slice(&rest[..take]);
            rest = &rest[take..];
            if self.buffer.len() == n {
                self.process_segment();
                self.buffer.drain(..self.hop);
            }
        }
        Ok(())
    }

    /// Marks a gap in the series: the partial segment is dropped and the next sample starts a new one.
    pub fn discontinuity(&mut self) {
        self.buffer.clear();
    }

    fn process_segment(&mut self) {
        let n = self.buffer.len();
        let nf = n as f64;
        let mean = self.buffer.iter().sum::<f64>() / nf;
        // Least-squares line over t = 0..n−1: t̄ = (n−1)/2, Σ(t−t̄)² = n(n²−1)/12.
        let t_mean = (nf - 1.0) / 2.0;
        let slope = match self.config.detrend {
            Detrend::Linear => {
                let stt = nf * (nf * nf - 1.0) / 12.0;
                let sty: f64 = self
                    .buffer
                    .iter()
                    .enumerate()
                    .map(|(t, x)| (t as f64 - t_mean) * (x - mean))
                    .sum();
                sty / stt
            }
            _ => 0.0,
        };
        for (k, (dst, &x)) in self.work.iter_mut().zip(&self.buffer).enumerate() {
            let trend = match self.config.detrend {
                Detrend::None => 0.0,
                Detrend::Mean => mean,
                Detrend::Linear => mean + slope * (k as f64 - t_mean),
            };
            *dst = (x - trend) * self.window[k];
        }
        // Lengths come from the plan itself, so the transform cannot fail.
        let ok = self
            .fft
            .process_with_scratch(&mut self.work, &mut self.out, &mut self.scratch);
        debug_assert!(ok.is_ok());
        for (acc, c) in self.sum.iter_mut().zip(&self.out) {
            *acc += c.norm_sqr();
        }
        self.segments += 1;
    }

    /// The spectrum averaged over the segments so far; fails before the first complete segment.
    pub fn spectrum(&self) -> Result<Spectrum, AnalysisError> {
        let n = self.config.segment_len;
        if self.segments == 0 {
            return Err(AnalysisError::TooFewSamples {
                what: "welch spectrum (one full segment)",
                needed: n,
                got: self.buffer.len(),
            });
        }
        let fs = self.config.sample_rate_hz;
        let scale = 1.0 / (fs * self.window_power * self.segments as f64);
        let last = n / 2;
        let psd = self
            .sum
            .iter()
            .enumerate()
            .map(|(k, s)| {
                let one_sided = if k == 0 || (n % 2 == 0 && k == last) {
                    1.0
                } else {
                    2.0
                };
                s * scale * one_sided
            })
            .collect();
        Ok(Spectrum {
            frequencies_hz: (0..=last).map(|k| k as f64 * fs / n as f64).collect(),
            psd,
            segments: self.segments,
            segment_len: n,
            sample_rate_hz: fs,
        })
    }
}

/// Welch estimate of a whole in-memory series (convenience over [`Welch`]).
pub fn welch(samples: &[f64], config: WelchConfig) -> Result<Spectrum, AnalysisError> {
    let mut w = Welch::new(config)?;
    w.push(samples)?;
    w.spectrum()
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::analysis::test_util::Gauss;

    fn cfg(fs: f64, n: usize, detrend: Detrend) -> WelchConfig {
        WelchConfig {
            sample_rate_hz: fs,
            segment_len: n,
            detrend,
        }
    }

    /// White noise of variance σ² sampled at fs has a flat one-sided PSD 2σ²/fs (analytic).
    /// Tolerance: averaging M ≈ 2047 Hann periodograms at 50 % overlap gives a bin a relative
    /// standard deviation ≈ sqrt((1 + 2·0.167²)/M) ≈ 2.3 % (Welch 1967: the Hann window's correlation
    /// between half-overlapped segments is about 0.167 — from memory); each bin is allowed 6 of those
    /// (14 %), and the mean over the bins 2 % (its own sd is about 0.3 %). Bins 0 and 1 are left out:
    /// per-segment mean removal takes the DC power, which the Hann main lobe spreads into bin 1.
    #[test]
    fn white_noise_level_is_two_sigma_squared_over_fs() {
        let (fs, sigma, n) = (10.0, 3e-6, 256);
        let mut g = Gauss::new(7);
        let mut w = Welch::new(cfg(fs, n, Detrend::Mean)).unwrap();
        // Fed in uneven chunks to exercise the streaming buffer.
        let mut chunk = Vec::new();
        for i in 0..(1usize << 18) {
            chunk.push(g.sample(sigma));
            if chunk.len() == 1 + i % 997 {
                w.push(&chunk).unwrap();
                chunk.clear();
            }
        }
        w.push(&chunk).unwrap();
        let s = w.spectrum().unwrap();
        assert_eq!(s.segments, ((1 << 18) - n as u64) / 128 + 1);
        let level = 2.0 * sigma * sigma / fs;
        let interior = &s.psd[2..n / 2];
        let mean = interior.iter().sum::<f64>() / interior.len() as f64;
        assert!((mean / level - 1.0).abs() < 0.02, "mean {mean} vs {level}");
        for (k, p) in interior.iter().enumerate() {
            assert!(
                (p / level - 1.0).abs() < 0.14,
                "bin {}: {p} vs {level}",
                k + 2
            );
        }
        let asd = s.asd();
        assert!((asd[10] - s.psd[10].sqrt()).abs() < 1e-30);
    }

    /// Parseval's theorem: a sine of amplitude A has mean square A²/2, so Σ PSD·Δf ≈ A²/2 (analytic).
    /// The sine is off-bin (non-integer cycles per segment); with ≥ 40 cycles per segment the
    /// Hann-weighted mean square differs from A²/2 by well under 0.5 %.
    #[test]
    fn parseval_for_a_sine() {
        let (fs, a, f0, n) = (100.0, 2.5e-5, 17.3, 512);
        let x: Vec<f64> = (0..20_000)
            .map(|i| a * (std::f64::consts::TAU * f0 * i as f64 / fs + 0.3).sin())
            .collect();
        for detrend in [Detrend::None, Detrend::Mean, Detrend::Linear] {
            let s = welch(&x, cfg(fs, n, detrend)).unwrap();
            let p = s.integrated_power();
            assert!((p / (a * a / 2.0) - 1.0).abs() < 0.005, "{detrend:?}: {p}");
            // The peak sits at the sine's frequency.
            let peak = (0..s.psd.len())
                .max_by(|&i, &j| s.psd[i].total_cmp(&s.psd[j]))
                .unwrap();
            assert!((s.frequencies_hz[peak] - f0).abs() <= s.resolution_hz());
        }
    }

    /// The sequence defined in tests/data/welch_scipy.py (reproduced exactly here).
    fn scipy_input() -> Vec<f64> {
        let mut n: u64 = 1_234_567_890;
        (0..1000)
            .map(|i| {
                let u = n as f64 / 2_147_483_647.0;
                n = (16807 * n) % 2_147_483_647;
                let t = i as f64 / 10.0;
                (std::f64::consts::TAU * 1.3 * t).sin() + 0.5 * (u - 0.5) + 0.01 * t
            })
            .collect()
    }

    /// Reference: scipy.signal.welch (scipy 1.17.1), numbers stored in tests/data/welch_scipy.txt by
    /// tests/data/welch_scipy.py, for even and odd segment lengths and all three detrend modes.
    #[test]
    fn matches_scipy_welch() {
        let text = include_str!("../../tests/data/welch_scipy.txt");
        let x = scipy_input();
        let mut blocks = 0;
        let mut lines = text.lines().filter(|l| !l.starts_with('#')).peekable();
        while let Some(header) = lines.next() {
            let parts: Vec<&str> = header.split_whitespace().collect();
            assert_eq!(parts[0], "config");
            let n: usize = parts[1].parse().unwrap();
            let detrend = match parts[2] {
                "constant" => Detrend::Mean,
                "linear" => Detrend::Linear,
                "none" => Detrend::None,
                other => panic!("unknown detrend {other}"),
            };
            let s = welch(&x, cfg(10.0, n, detrend)).unwrap();
            let mut k = 0;
            while let Some(line) = lines.next_if(|l| !l.starts_with("config")) {
                let v: Vec<f64> = line
                    .split_whitespace()
                    .map(|t| t.parse().unwrap())
                    .collect();
                assert!((s.frequencies_hz[k] - v[0]).abs() < 1e-12);
                let scale = v[1].abs().max(1e-12);
                assert!(
                    (s.psd[k] - v[1]).abs() / scale < 1e-9,
                    "N={n} {detrend:?} bin {k}: {} vs scipy {}",
                    s.psd[k],
                    v[1]
                );
                k += 1;
            }
            assert_eq!(k, s.psd.len(), "N={n}: bin count");
            blocks += 1;
        }
        assert_eq!(blocks, 3);
    }

    #[test]
    fn discontinuity_drops_partial_segment() {
        let mut w = Welch::new(cfg(1.0, 8, Detrend::Mean)).unwrap();
        w.push(&[1.0; 5]).unwrap();
        w.discontinuity();
        assert_eq!(w.pending(), 0);
        w.push(&[1.0; 7]).unwrap();
        assert!(matches!(
            w.spectrum(),
            Err(AnalysisError::TooFewSamples {
                needed: 8,
                got: 7,
                ..
            })
        ));
        w.push(&[2.0]).unwrap();
        assert_eq!(w.segments(), 1);
        assert_eq!(w.pending(), 4);
    }

    #[test]
    fn bad_input_is_an_error() {
        assert!(Welch::new(cfg(0.0, 64, Detrend::Mean)).is_err());
        assert!(Welch::new(cfg(f64::NAN, 64, Detrend::Mean)).is_err());
        assert!(Welch::new(cfg(1.0, 1, Detrend::Mean)).is_err());
        assert!(Welch::new(cfg(1.0, MAX_SEGMENT_LEN + 1, Detrend::Mean)).is_err());
        let mut w = Welch::new(cfg(1.0, 4, Detrend::Mean)).unwrap();
        assert!(matches!(
            w.push(&[1.0, f64::NAN]),
            Err(AnalysisError::NonFinite { index: 1, .. })
        ));
        assert_eq!(w.pending(), 0, "a rejected chunk adds nothing");
        assert!(welch(&[], cfg(1.0, 4, Detrend::Mean)).is_err());
    }
}

//! Fundamental-frequency phasors of sampled waveforms, symmetrical components, and linear
//! resampling onto a uniform grid.
//!
//! Phasor convention: a waveform `x(t) = X_peak · cos(2π f0 t + φ)` has the phasor
//! `(X_peak / √2) · e^{jφ}`: the magnitude is RMS (peak / √2) and the angle is measured against
//! `cos(2π f0 t)` with `t = 0` at the first sample handed to the estimator. Units are those of the
//! samples (no per-unit scaling happens here).

use nalgebra::Complex;

/// Why a phasor or resampling step could not be done.
#[derive(Debug, thiserror::Error)]
pub enum PhasorError {
    #[error(
        "samples per cycle = sample_rate_hz / nominal_frequency_hz = {sample_rate_hz} / \
         {nominal_frequency_hz} = {samples_per_cycle} is not an integer; resample the signal \
         first (resample_linear onto uniform_grid at an integer multiple of the frequency)"
    )]
    NonIntegerSamplesPerCycle {
        sample_rate_hz: f64,
        nominal_frequency_hz: f64,
        samples_per_cycle: f64,
    },
    #[error("`{setting}` = {value}: expected {expected}")]
    Setting {
        setting: &'static str,
        value: f64,
        expected: &'static str,
    },
    #[error("one cycle needs {needed} samples, the signal has {found}")]
    TooShort { needed: usize, found: usize },
    #[error("times_s must increase strictly: sample {index} at {time_s} s follows {previous_s} s")]
    NonIncreasingTimes {
        index: usize,
        time_s: f64,
        previous_s: f64,
    },
    #[error("requested time {time_s} s lies outside the recorded span [{first_s}, {last_s}] s")]
    OutsideSpan {
        time_s: f64,
        first_s: f64,
        last_s: f64,
    },
}

/// One-cycle DFT estimator of the fundamental phasor (full-cycle Fourier filter; A. G. Phadke
/// and J. S. Thorp, "Synchronized Phasor Measurements and Their Applications", Springer 2008,
/// ch. 2: X = (√2/N) Σ x_k e^{−j2πk/N}).
#[derive(Debug, Clone)]
pub struct PhasorEstimator {
    samples_per_cycle: usize,
    /// e^{−j2πm/N} for m = 0..N.
    twiddles: Vec<Complex<f64>>,
}

impl PhasorEstimator {
    /// An estimator for signals sampled at `sample_rate_hz` around `nominal_frequency_hz`.
    /// The samples per cycle must be an integer (relative tolerance 1e-9) and at least 3.
    pub fn new(sample_rate_hz: f64, nominal_frequency_hz: f64) -> Result<Self, PhasorError> {
        for (setting, value) in [
            ("sample_rate_hz", sample_rate_hz),
            ("nominal_frequency_hz", nominal_frequency_hz),
        ] {
            if !(value.is_finite() && value > 0.0) {
                return Err(PhasorError::Setting {
                    setting,
                    value,
                    expected: "a positive finite frequency in Hz",
                });
            }
        }
        let samples_per_cycle = sample_rate_hz / nominal_frequency_hz;
        let whole = samples_per_cycle.round();
        if (samples_per_cycle - whole).abs() > 1e-9 * samples_per_cycle {
            return Err(PhasorError::NonIntegerSamplesPerCycle {
                sample_rate_hz,
                nominal_frequency_hz,
                samples_per_cycle,
            });
        }
        if whole < 3.0 {
            return Err(PhasorError::Setting {
                setting: "sample_rate_hz",
                value: sample_rate_hz,
                expected: "at least 3 samples per cycle of the nominal frequency",
            });
        }
        let n = whole as usize;
        let twiddles = (0..n)
            .map(|m| Complex::from_polar(1.0, -2.0 * std::f64::consts::PI * m as f64 / n as f64))
            .collect();
        Ok(PhasorEstimator {
            samples_per_cycle: n,
            twiddles,
        })
    }

    /// Samples in one nominal cycle (the window length).
    pub fn samples_per_cycle(&self) -> usize {
        self.samples_per_cycle
    }

    /// RMS fundamental phasor of each full-cycle window: entry `i` is the window of samples
    /// `i ..= i + N − 1` and belongs to sample `i + N − 1` (the newest in the window). The
    /// result has `samples.len() − N + 1` entries. A NaN sample makes the N windows that hold
    /// it NaN and no others (each window is summed afresh, not updated recursively).
    pub fn phasors(&self, samples: &[f64]) -> Result<Vec<Complex<f64>>, PhasorError> {
        let n = self.samples_per_cycle;
        if samples.len() < n {
            return Err(PhasorError::TooShort {
                needed: n,
                found: samples.len(),
            });
        }
        let scale = std::f64::consts::SQRT_2 / n as f64;
        Ok((n - 1..samples.len())
            .map(|newest| {
                let first = newest + 1 - n;
                // twiddle index from the absolute sample number keeps the phasor of a steady
                // nominal-frequency wave fixed as the window slides
                let sum: Complex<f64> = (first..=newest)
                    .map(|m| self.twiddles[m % n] * samples[m])
                    .sum();
                sum * scale
            })
            .collect())
    }
}

/// Zero-, positive- and negative-sequence components of a three-phase phasor set.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct SequenceComponents {
    pub zero: Complex<f64>,
    pub positive: Complex<f64>,
    pub negative: Complex<f64>,
}

/// The Fortescue operator a = e^{j2π/3}.
pub fn fortescue_a() -> Complex<f64> {
    Complex::from_polar(1.0, 2.0 * std::f64::consts::PI / 3.0)
}

impl SequenceComponents {
    /// Symmetrical components of phases A, B, C (C. L. Fortescue, "Method of symmetrical
    /// co-ordinates applied to the solution of polyphase networks", AIEE Trans. 1918):
    /// V0 = (Va + Vb + Vc)/3, V1 = (Va + a·Vb + a²·Vc)/3, V2 = (Va + a²·Vb + a·Vc)/3.
    pub fn from_phases(
        a_phase: Complex<f64>,
        b_phase: Complex<f64>,
        c_phase: Complex<f64>,
    ) -> Self {
        let a = fortescue_a();
        let a2 = a * a;
        SequenceComponents {
            zero: (a_phase + b_phase + c_phase) / 3.0,
            positive: (a_phase + a * b_phase + a2 * c_phase) / 3.0,
            negative: (a_phase + a2 * b_phase + a * c_phase) / 3.0,
        }
    }

    /// Phases A, B, C of these components (inverse transform, same source):
    /// Va = V0 + V1 + V2, Vb = V0 + a²V1 + aV2, Vc = V0 + aV1 + a²V2.
    pub fn to_phases(&self) -> [Complex<f64>; 3] {
        let a = fortescue_a();
        let a2 = a * a;
        [
            self.zero + self.positive + self.negative,
            self.zero + a2 * self.positive + a * self.negative,
            self.zero + a * self.positive + a2 * self.negative,
        ]
    }
}

/// Sequence components of three sampled phase waveforms, one per full-cycle window (entry `i`
/// belongs to sample `i + N − 1`, as in [`PhasorEstimator::phasors`]).
///
/// # Panics
/// When the three phases differ in length (a caller bug).
pub fn sequence_phasors(
    estimator: &PhasorEstimator,
    a_phase: &[f64],
    b_phase: &[f64],
    c_phase: &[f64],
) -> Result<Vec<SequenceComponents>, PhasorError> {
    assert!(
        a_phase.len() == b_phase.len() && b_phase.len() == c_phase.len(),
        "phase lengths differ: {} / {} / {}",
        a_phase.len(),
        b_phase.len(),
        c_phase.len()
    );
    let pa = estimator.phasors(a_phase)?;
    let pb = estimator.phasors(b_phase)?;
    let pc = estimator.phasors(c_phase)?;
    Ok(pa
        .into_iter()
        .zip(pb)
        .zip(pc)
        .map(|((a, b), c)| SequenceComponents::from_phases(a, b, c))
        .collect())
}

/// Times `start_s, start_s + 1/rate, …` up to `end_s` (inclusive, with a 1e-9-sample tolerance).
pub fn uniform_grid(
    start_s: f64,
    end_s: f64,
    sample_rate_hz: f64,
) -> Result<Vec<f64>, PhasorError> {
    if !(sample_rate_hz.is_finite() && sample_rate_hz > 0.0) {
        return Err(PhasorError::Setting {
            setting: "sample_rate_hz",
            value: sample_rate_hz,
            expected: "a positive finite rate in Hz",
        });
    }
    if !(start_s.is_finite() && end_s.is_finite() && end_s >= start_s) {
        return Err(PhasorError::Setting {
            setting: "end_s",
            value: end_s,
            expected: "a finite time not before start_s",
        });
    }
    let count = ((end_s - start_s) * sample_rate_hz + 1e-9).floor() as usize + 1;
    // each point from its index, not by accumulation, so rounding does not drift
    Ok((0..count)
        .map(|i| start_s + i as f64 / sample_rate_hz)
        .collect())
}

/// Values of the piecewise-linear interpolant through `(times_s, values)` at `new_times_s`.
/// Times must increase strictly; a new time outside the recorded span is an error (up to a
/// rounding tolerance of 1e-9 of the span, where the end value is used). A NaN (missing) value
/// makes the interpolant NaN on the intervals touching it.
///
/// # Panics
/// When `times_s` and `values` differ in length (a caller bug).
pub fn resample_linear(
    times_s: &[f64],
    values: &[f64],
    new_times_s: &[f64],
) -> Result<Vec<f64>, PhasorError> {
    assert_eq!(
        times_s.len(),
        values.len(),
        "times_s and values differ in length"
    );
    if times_s.len() < 2 {
        return Err(PhasorError::TooShort {
            needed: 2,
            found: times_s.len(),
        });
    }
    if let Some(i) = (1..times_s.len())
        .find(|&i| times_s[i] <= times_s[i - 1] || times_s[i].is_nan() || times_s[i - 1].is_nan())
    {
        return Err(PhasorError::NonIncreasingTimes {
            index: i,
            time_s: times_s[i],
            previous_s: times_s[i - 1],
        });
    }
    let first = times_s[0];
    let last = times_s[times_s.len() - 1];
    let tolerance = 1e-9 * (last - first);
    new_times_s
        .iter()
        .map(|&t| {
            if !(t >= first - tolerance && t <= last + tolerance) {
                return Err(PhasorError::OutsideSpan {
                    time_s: t,
                    first_s: first,
                    last_s: last,
                });
            }
            let t = t.clamp(first, last);
            // index of the interval [times[k], times[k+1]] that holds t
            let k = times_s
                .partition_point(|&s| s <= t)
                .clamp(1, times_s.len() - 1)
                - 1;
            let (t0, t1) = (times_s[k], times_s[k + 1]);
            let weight = (t - t0) / (t1 - t0);
            // on a sample exactly: return it (a missing neighbour must not leak in)
            Ok(if weight <= 0.0 {
                values[k]
            } else if weight >= 1.0 {
                values[k + 1]
            } else {
                values[k] + weight * (values[k + 1] - values[k])
            })
        })
        .collect()
}

#[cfg(test)]
mod tests {
    use super::*;
    use std::f64::consts::PI;

    fn close(a: Complex<f64>, b: Complex<f64>, tolerance: f64) -> bool {
        (a - b).norm() <= tolerance
    }

    #[test]
    fn steady_cosine_gives_rms_phasor_in_every_window() {
        // x = 10 cos(2π·50 t + 0.3) sampled at 1 kHz → 10/√2 ∠0.3 (definition of the phasor)
        let estimator = PhasorEstimator::new(1000.0, 50.0).unwrap();
        let samples: Vec<f64> = (0..100)
            .map(|k| 10.0 * (2.0 * PI * 50.0 * k as f64 / 1000.0 + 0.3).cos())
            .collect();
        let phasors = estimator.phasors(&samples).unwrap();
        assert_eq!(phasors.len(), 100 - 20 + 1);
        let expected = Complex::from_polar(10.0 / 2f64.sqrt(), 0.3);
        for p in phasors {
            assert!(close(p, expected, 1e-12), "{p} vs {expected}");
        }
    }

    #[test]
    fn missing_sample_spoils_only_its_windows() {
        let estimator = PhasorEstimator::new(400.0, 50.0).unwrap();
        let mut samples: Vec<f64> = (0..40).map(|k| (k as f64).sin()).collect();
        samples[20] = f64::NAN;
        let phasors = estimator.phasors(&samples).unwrap();
        for (i, p) in phasors.iter().enumerate() {
            let holds_nan = (i..i + 8).contains(&20);
            assert_eq!(p.re.is_nan(), holds_nan, "window {i}");
        }
    }

    #[test]
    fn non_integer_samples_per_cycle_names_the_rate() {
        let err = PhasorEstimator::new(1234.5, 50.0).unwrap_err();
        let text = err.to_string();
        assert!(text.contains("1234.5") && text.contains("24.69"), "{text}");
        assert!(PhasorEstimator::new(100.0, 50.0).is_err());
        assert!(PhasorEstimator::new(-1.0, 50.0).is_err());
    }

    #[test]
    fn fortescue_of_a_balanced_positive_set() {
        // Va = 1, Vb = a², Vc = a is pure positive sequence (Fortescue 1918)
        let a = fortescue_a();
        let s = SequenceComponents::from_phases(Complex::new(1.0, 0.0), a * a, a);
        assert!(close(s.positive, Complex::new(1.0, 0.0), 1e-15));
        assert!(close(s.negative, Complex::new(0.0, 0.0), 1e-15));
        assert!(close(s.zero, Complex::new(0.0, 0.0), 1e-15));
        let back = SequenceComponents::from_phases(
            Complex::new(0.2, 0.1),
            Complex::new(-0.7, 0.4),
            Complex::new(0.05, -0.9),
        );
        let [va, vb, vc] = back.to_phases();
        assert!(close(va, Complex::new(0.2, 0.1), 1e-15));
        assert!(close(vb, Complex::new(-0.7, 0.4), 1e-15));
        assert!(close(vc, Complex::new(0.05, -0.9), 1e-15));
    }

    #[test]
    fn linear_resampling_is_exact_on_lines_and_bounded_on_a_sine() {
        let times: Vec<f64> = [0.0, 0.1, 0.25, 0.3, 0.7, 1.0].to_vec();
        let line: Vec<f64> = times.iter().map(|t| 3.0 * t - 1.0).collect();
        let grid = uniform_grid(0.0, 1.0, 7.0).unwrap();
        assert_eq!(grid.len(), 8);
        for (t, v) in grid
            .iter()
            .zip(resample_linear(&times, &line, &grid).unwrap())
        {
            assert!((v - (3.0 * t - 1.0)).abs() < 1e-14);
        }
        // linear interpolation error ≤ h²/8 · max|f''| (textbook bound; f = sin, |f''| ≤ 1)
        let h = 0.05;
        let times: Vec<f64> = (0..=200).map(|i| i as f64 * h).collect();
        let sine: Vec<f64> = times.iter().map(|t| t.sin()).collect();
        let grid = uniform_grid(0.0, 10.0, 33.0).unwrap();
        for (t, v) in grid
            .iter()
            .zip(resample_linear(&times, &sine, &grid).unwrap())
        {
            assert!((v - t.sin()).abs() <= h * h / 8.0 + 1e-15);
        }
        assert!(matches!(
            resample_linear(&times, &sine, &[10.5]),
            Err(PhasorError::OutsideSpan { .. })
        ));
        assert!(matches!(
            resample_linear(&[0.0, 1.0, 1.0], &[0.0; 3], &[0.5]),
            Err(PhasorError::NonIncreasingTimes { index: 2, .. })
        ));
    }
}

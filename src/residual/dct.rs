//! Orthonormal DCT-II and its inverse (DCT-III), in O(n log n) for any length.
//!
//! Scaling matches `scipy.fft.dct(x, type=2, norm="ortho")`:
//! `X_k = s_k Σ_n x_n cos(π k (2n + 1) / (2N))`, `s_0 = √(1/N)`, `s_k = √(2/N)` for k ≥ 1,
//! so the transform matrix is orthogonal and the inverse is its transpose (DCT-III, same scaling).
//!
//! The transforms come from the `rustdct` crate (FFT-based via `rustfft`, with fast paths for
//! small and prime lengths) rather than a hand-written FFT: it is maintained, tested, and handles
//! every length in O(n log n).

use std::sync::Arc;

use nalgebra::DMatrix;
use rustdct::{DctPlanner, TransformType2And3};

use super::{check_finite, ResidualError};

/// A planned orthonormal DCT of one length; reuse it when transforming many vectors.
#[derive(Clone)]
pub struct Dct {
    n: usize,
    plan: Arc<dyn TransformType2And3<f64>>,
    scale_first: f64,
    scale_rest: f64,
}

impl std::fmt::Debug for Dct {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("Dct").field("n", &self.n).finish()
    }
}

impl Dct {
    /// Plan the transforms of length `n`.
    ///
    /// # Panics
    /// When `n == 0` (a caller bug: there is nothing to transform).
    pub fn new(n: usize) -> Self {
        assert!(n > 0, "DCT length must be positive");
        let plan = DctPlanner::new().plan_dct2(n);
        let nf = n as f64;
        Self {
            n,
            plan,
            scale_first: (1.0 / nf).sqrt(),
            scale_rest: (2.0 / nf).sqrt(),
        }
    }

    /// The transform length.
    pub fn len(&self) -> usize {
        self.n
    }

    /// Always false: a plan has a positive length.
    pub fn is_empty(&self) -> bool {
        false
    }

    /// Orthonormal DCT-II in place.
    ///
    /// # Panics
    /// When `buffer.len()` differs from the planned length.
    pub fn forward(&self, buffer: &mut [f64]) {
        assert_eq!(buffer.len(), self.n, "buffer length differs from the plan");
        // rustdct's DCT-II is unscaled: X_k = Σ x_n cos(π k (2n+1) / 2N).
        self.plan.process_dct2(buffer);
        buffer[0] *= self.scale_first;
        for value in &mut buffer[1..] {
            *value *= self.scale_rest;
        }
    }

    /// Orthonormal DCT-III (the inverse of [`Dct::forward`]) in place.
    ///
    /// # Panics
    /// When `buffer.len()` differs from the planned length.
    pub fn inverse(&self, buffer: &mut [f64]) {
        assert_eq!(buffer.len(), self.n, "buffer length differs from the plan");
        // rustdct's DCT-III is x_n = X_0 / 2 + Σ_{k≥1} X_k cos(π k (2n+1) / 2N); the orthonormal
        // inverse is x_n = X_0 √(1/N) + √(2/N) Σ_{k≥1} X_k cos(...), hence the factor 2 on X_0.
        buffer[0] *= 2.0 * self.scale_first;
        for value in &mut buffer[1..] {
            *value *= self.scale_rest;
        }
        self.plan.process_dct3(buffer);
    }

    /// Entry (n, k) of the orthonormal inverse-DCT matrix Ψ (x = Ψ c), without building Ψ.
    pub fn inverse_entry(&self, sample: usize, coefficient: usize) -> f64 {
        let scale = if coefficient == 0 {
            self.scale_first
        } else {
            self.scale_rest
        };
        let angle = std::f64::consts::PI * coefficient as f64 * (2 * sample + 1) as f64
            / (2 * self.n) as f64;
        scale * angle.cos()
    }
}

/// Orthonormal DCT-II of `signal` (scipy.fft.dct(norm="ortho")). Errors on NaN/inf.
pub fn dct(signal: &[f64]) -> Result<Vec<f64>, ResidualError> {
    check_finite("signal", signal)?;
    if signal.is_empty() {
        return Ok(Vec::new());
    }
    let mut out = signal.to_vec();
    Dct::new(out.len()).forward(&mut out);
    Ok(out)
}

/// Orthonormal DCT-III of `coefficients`: the inverse of [`dct`]. Errors on NaN/inf.
pub fn idct(coefficients: &[f64]) -> Result<Vec<f64>, ResidualError> {
    check_finite("coefficients", coefficients)?;
    if coefficients.is_empty() {
        return Ok(Vec::new());
    }
    let mut out = coefficients.to_vec();
    Dct::new(out.len()).inverse(&mut out);
    Ok(out)
}

/// Which way to transform a matrix.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Axis {
    /// Transform each column (each column is one trace; rows are time).
    Columns,
    /// Transform each row (each row is one trace; columns are time).
    Rows,
}

/// Orthonormal DCT-II of every column or every row of `m`.
pub fn dct_matrix(m: &DMatrix<f64>, axis: Axis) -> Result<DMatrix<f64>, ResidualError> {
    transform_matrix(m, axis, true)
}

/// Orthonormal DCT-III (inverse) of every column or every row of `m`.
pub fn idct_matrix(m: &DMatrix<f64>, axis: Axis) -> Result<DMatrix<f64>, ResidualError> {
    transform_matrix(m, axis, false)
}

fn transform_matrix(
    m: &DMatrix<f64>,
    axis: Axis,
    forward: bool,
) -> Result<DMatrix<f64>, ResidualError> {
    super::check_finite_matrix("matrix", m)?;
    if m.is_empty() {
        return Ok(m.clone());
    }
    match axis {
        Axis::Columns => {
            let mut out = m.clone();
            let plan = Dct::new(m.nrows());
            for mut column in out.column_iter_mut() {
                let slice = column.as_mut_slice();
                if forward {
                    plan.forward(slice)
                } else {
                    plan.inverse(slice)
                }
            }
            Ok(out)
        }
        Axis::Rows => {
            // nalgebra is column-major: transpose so each row becomes a contiguous column.
            let transposed = transform_matrix(&m.transpose(), Axis::Columns, forward)?;
            Ok(transposed.transpose())
        }
    }
}

/// The straight line through the first and last sample of a trace. A linear trend costs many
/// DCT coefficients (they decay only as 1/k²); removing the ramp through the end points stores
/// the trend exactly in two numbers and leaves a trace that is zero at both ends (common
/// practice before a DCT of a trace that starts and ends at different levels).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Ramp {
    /// Value of the ramp at the first sample.
    pub start: f64,
    /// Value of the ramp at the last sample.
    pub end: f64,
    /// Number of samples the ramp spans.
    pub len: usize,
}

impl Ramp {
    /// The ramp's value at sample `index`.
    pub fn value(&self, index: usize) -> f64 {
        if self.len <= 1 {
            return self.start;
        }
        self.start + (self.end - self.start) * index as f64 / (self.len - 1) as f64
    }

    /// Add the ramp back onto a trace of the same length.
    ///
    /// # Panics
    /// When `trace.len()` differs from the ramp's length.
    pub fn add_to(&self, trace: &mut [f64]) {
        assert_eq!(trace.len(), self.len, "trace length differs from the ramp");
        for (i, value) in trace.iter_mut().enumerate() {
            *value += self.value(i);
        }
    }
}

/// Subtract the ramp through the first and last sample; returns the detrended trace (which is
/// zero at both ends) and the ramp to add back.
pub fn remove_ramp(signal: &[f64]) -> Result<(Vec<f64>, Ramp), ResidualError> {
    check_finite("signal", signal)?;
    let ramp = Ramp {
        start: signal.first().copied().unwrap_or(0.0),
        end: signal.last().copied().unwrap_or(0.0),
        len: signal.len(),
    };
    let detrended = signal
        .iter()
        .enumerate()
        .map(|(i, v)| v - ramp.value(i))
        .collect();
    Ok((detrended, ramp))
}

#[cfg(test)]
mod tests {
    use super::*;

    /// The O(n²) definition, for cross-checking the fast path.
    fn dct_naive(x: &[f64]) -> Vec<f64> {
        let plan = Dct::new(x.len());
        (0..x.len())
            .map(|k| {
                x.iter()
                    .enumerate()
                    .map(|(n, v)| v * plan.inverse_entry(n, k))
                    .sum()
            })
            .collect()
    }

    #[test]
    fn fast_matches_definition_for_many_lengths() {
        for n in [1usize, 2, 3, 5, 7, 8, 13, 16, 31, 64, 97, 100] {
            let x: Vec<f64> = (0..n).map(|i| ((i * 7 + 3) % 11) as f64 - 4.5).collect();
            let fast = dct(&x).unwrap();
            let slow = dct_naive(&x);
            for (a, b) in fast.iter().zip(&slow) {
                assert!((a - b).abs() < 1e-12, "n = {n}: {a} vs {b}");
            }
            let back = idct(&fast).unwrap();
            for (a, b) in back.iter().zip(&x) {
                assert!((a - b).abs() < 1e-12, "n = {n}: round trip {a} vs {b}");
            }
        }
    }

    #[test]
    fn rows_and_columns_agree() {
        let m = DMatrix::from_fn(5, 7, |i, j| (i as f64 + 1.0) * (j as f64 - 2.0).sin());
        let by_rows = dct_matrix(&m, Axis::Rows).unwrap();
        let by_cols_of_t = dct_matrix(&m.transpose(), Axis::Columns).unwrap();
        assert!((by_rows - by_cols_of_t.transpose()).norm() < 1e-13);
        let back = idct_matrix(&dct_matrix(&m, Axis::Columns).unwrap(), Axis::Columns).unwrap();
        assert!((back - &m).norm() < 1e-13);
    }

    #[test]
    fn ramp_removal_zeroes_the_ends_and_adds_back() {
        let x: Vec<f64> = (0..10)
            .map(|i| 1.0 + 0.5 * i as f64 + (i as f64).sin())
            .collect();
        let (detrended, ramp) = remove_ramp(&x).unwrap();
        assert!(detrended[0].abs() < 1e-15 && detrended[9].abs() < 1e-14);
        let mut restored = detrended.clone();
        ramp.add_to(&mut restored);
        for (a, b) in restored.iter().zip(&x) {
            assert!((a - b).abs() < 1e-14);
        }
    }

    #[test]
    fn nan_is_named_with_its_index() {
        let err = dct(&[1.0, f64::NAN, 2.0]).unwrap_err();
        assert!(matches!(err, ResidualError::NonFinite { index: 1, .. }));
        assert!(err.to_string().contains("index 1"));
    }
}

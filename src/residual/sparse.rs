//! Compressed sensing of residual traces: sparse solutions of `A x ≈ b`.
//!
//! - Orthogonal Matching Pursuit (Pati, Rezaiifar & Krishnaprasad 1993; Tropp & Gilbert, IEEE
//!   Trans. Inf. Theory 2007): greedy, picks the column most correlated with the residual, then
//!   re-solves least squares on the chosen columns (kept as an incrementally updated QR).
//! - FISTA for the LASSO `min ½‖Ax − b‖² + λ‖x‖₁` (Beck & Teboulle, SIAM J. Imaging Sci. 2009),
//!   step 1/L with L the largest eigenvalue of AᵀA (power iteration), with the gradient-based
//!   adaptive restart of O'Donoghue & Candès (Found. Comput. Math. 2015) as an option.
//!
//! Operators are either explicit matrices or the implicit [`SampledInverseDct`] (`A = S·Ψ`, Ψ the
//! orthonormal inverse DCT, S a selection of samples), so a length-N trace is recovered from m
//! samples in O(N log N) per iteration without ever building an N×N matrix.

use nalgebra::DMatrix;

use super::dct::{remove_ramp, Dct};
use super::{check_finite, ResidualError};

/// A linear map `A: R^ncols → R^nrows` known through its action.
pub trait LinearOperator {
    /// Number of rows (measurements).
    fn nrows(&self) -> usize;
    /// Number of columns (unknowns).
    fn ncols(&self) -> usize;
    /// `y = A x`.
    fn apply(&self, x: &[f64], y: &mut [f64]);
    /// `x = Aᵀ y`.
    fn apply_transpose(&self, y: &[f64], x: &mut [f64]);
    /// Column `j` of A into `out` (length `nrows`).
    fn column(&self, j: usize, out: &mut [f64]);
}

impl LinearOperator for DMatrix<f64> {
    fn nrows(&self) -> usize {
        self.shape().0
    }
    fn ncols(&self) -> usize {
        self.shape().1
    }
    fn apply(&self, x: &[f64], y: &mut [f64]) {
        assert_eq!(x.len(), self.ncols());
        assert_eq!(y.len(), self.nrows());
        y.fill(0.0);
        for (j, &xj) in x.iter().enumerate() {
            if xj != 0.0 {
                for (yi, aij) in y.iter_mut().zip(self.column(j).iter()) {
                    *yi += aij * xj;
                }
            }
        }
    }
    fn apply_transpose(&self, y: &[f64], x: &mut [f64]) {
        assert_eq!(x.len(), self.ncols());
        assert_eq!(y.len(), self.nrows());
        for (j, xj) in x.iter_mut().enumerate() {
            *xj = dot(self.column(j).as_slice(), y);
        }
    }
    fn column(&self, j: usize, out: &mut [f64]) {
        out.copy_from_slice(self.column(j).as_slice());
    }
}

/// `A = S·Ψ`: the orthonormal inverse DCT of length `n` followed by picking the samples at
/// `indices`. Its transpose is the DCT-II of the zero-filled samples (Ψ is orthogonal).
#[derive(Debug, Clone)]
pub struct SampledInverseDct {
    plan: Dct,
    indices: Vec<usize>,
}

impl SampledInverseDct {
    /// The operator for a trace of length `n` observed at `indices` (distinct, each < n).
    pub fn new(n: usize, indices: &[usize]) -> Result<Self, ResidualError> {
        if n == 0 {
            return Err(ResidualError::TooLittleData {
                what: "n",
                got: 0,
                needed: 1,
            });
        }
        let mut seen = vec![false; n];
        for (position, &index) in indices.iter().enumerate() {
            if index >= n {
                return Err(ResidualError::SampleIndexOutOfRange { position, index, n });
            }
            if seen[index] {
                return Err(ResidualError::DuplicateSample { index });
            }
            seen[index] = true;
        }
        Ok(Self {
            plan: Dct::new(n),
            indices: indices.to_vec(),
        })
    }

    /// The sample indices.
    pub fn indices(&self) -> &[usize] {
        &self.indices
    }
}

impl LinearOperator for SampledInverseDct {
    fn nrows(&self) -> usize {
        self.indices.len()
    }
    fn ncols(&self) -> usize {
        self.plan.len()
    }
    fn apply(&self, x: &[f64], y: &mut [f64]) {
        let mut buffer = x.to_vec();
        self.plan.inverse(&mut buffer);
        for (yi, &index) in y.iter_mut().zip(&self.indices) {
            *yi = buffer[index];
        }
    }
    fn apply_transpose(&self, y: &[f64], x: &mut [f64]) {
        x.fill(0.0);
        for (&yi, &index) in y.iter().zip(&self.indices) {
            x[index] = yi;
        }
        self.plan.forward(x);
    }
    fn column(&self, j: usize, out: &mut [f64]) {
        for (o, &index) in out.iter_mut().zip(&self.indices) {
            *o = self.plan.inverse_entry(index, j);
        }
    }
}

fn dot(a: &[f64], b: &[f64]) -> f64 {
    a.iter().zip(b).map(|(x, y)| x * y).sum()
}

fn norm(a: &[f64]) -> f64 {
    dot(a, a).sqrt()
}

/// A sparse solution of `A x ≈ b`.
#[derive(Debug, Clone, PartialEq)]
pub struct SparseSolution {
    /// x (length `ncols`).
    pub coefficients: Vec<f64>,
    /// Indices of the nonzero coefficients (OMP: in the order chosen; FISTA: ascending).
    pub support: Vec<usize>,
    /// Iterations (OMP: atoms chosen; FISTA: proximal-gradient steps).
    pub iterations: usize,
    /// ‖A x − b‖.
    pub residual_norm: f64,
    /// FISTA only: whether the stopping tolerance was met before the iteration limit.
    pub converged: bool,
}

/// Settings of Orthogonal Matching Pursuit.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct OmpSettings {
    max_atoms: usize,
    residual_tolerance: f64,
}

impl OmpSettings {
    /// Stop after `max_atoms` atoms (≥ 1).
    pub fn new(max_atoms: usize) -> Result<Self, ResidualError> {
        if max_atoms == 0 {
            return Err(ResidualError::InvalidSetting {
                setting: "max_atoms",
                value: 0.0,
                expected: "at least 1 atom",
            });
        }
        Ok(Self {
            max_atoms,
            residual_tolerance: 0.0,
        })
    }
    /// Also stop once ‖b − A x‖ ≤ `tolerance`·‖b‖ (relative; 0 = atoms only).
    pub fn with_residual_tolerance(mut self, tolerance: f64) -> Result<Self, ResidualError> {
        if !(tolerance.is_finite() && (0.0..1.0).contains(&tolerance)) {
            return Err(ResidualError::InvalidSetting {
                setting: "residual_tolerance",
                value: tolerance,
                expected: "a relative residual in [0, 1)",
            });
        }
        self.residual_tolerance = tolerance;
        Ok(self)
    }
    pub fn max_atoms(&self) -> usize {
        self.max_atoms
    }
    pub fn residual_tolerance(&self) -> f64 {
        self.residual_tolerance
    }
}

/// Settings of FISTA for the LASSO.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct FistaSettings {
    lambda: f64,
    tolerance: f64,
    max_iterations: usize,
    restart: bool,
}

impl FistaSettings {
    /// The weight λ of ‖x‖₁ (> 0), with tolerance 1e-10 and 10 000 iterations at most.
    pub fn new(lambda: f64) -> Result<Self, ResidualError> {
        if !(lambda.is_finite() && lambda > 0.0) {
            return Err(ResidualError::InvalidSetting {
                setting: "lambda",
                value: lambda,
                expected: "a positive finite weight",
            });
        }
        Ok(Self {
            lambda,
            tolerance: 1e-10,
            max_iterations: 10_000,
            restart: true,
        })
    }
    /// Stop when ‖x_k − x_{k−1}‖ ≤ tolerance·max(‖x_k‖, tiny).
    pub fn with_tolerance(mut self, tolerance: f64) -> Result<Self, ResidualError> {
        if !(tolerance.is_finite() && tolerance > 0.0) {
            return Err(ResidualError::InvalidSetting {
                setting: "tolerance",
                value: tolerance,
                expected: "a positive relative step size",
            });
        }
        self.tolerance = tolerance;
        Ok(self)
    }
    pub fn with_max_iterations(mut self, max_iterations: usize) -> Result<Self, ResidualError> {
        if max_iterations == 0 {
            return Err(ResidualError::InvalidSetting {
                setting: "max_iterations",
                value: 0.0,
                expected: "at least 1 iteration",
            });
        }
        self.max_iterations = max_iterations;
        Ok(self)
    }
    /// Gradient-based adaptive restart (O'Donoghue & Candès 2015); on by default. It changes
    /// only the speed, not the minimiser.
    pub fn with_restart(mut self, restart: bool) -> Self {
        self.restart = restart;
        self
    }
    pub fn lambda(&self) -> f64 {
        self.lambda
    }
}

/// How to recover a sparse coefficient vector.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum RecoveryMethod {
    Omp(OmpSettings),
    Fista(FistaSettings),
}

/// Orthogonal Matching Pursuit on `A x ≈ b`.
///
/// Least squares on the chosen atoms is kept as a QR factorisation updated one column at a time
/// (classical Gram–Schmidt with one reorthogonalisation, "twice is enough"). Chooses the same
/// atoms as scikit-learn's `orthogonal_mp` (largest |Aᵀ r|, first index on ties).
///
/// # Panics
/// When `b.len() != op.nrows()`.
pub fn omp(
    op: &dyn LinearOperator,
    b: &[f64],
    settings: &OmpSettings,
) -> Result<SparseSolution, ResidualError> {
    assert_eq!(b.len(), op.nrows(), "b must have one entry per row of A");
    check_finite("b", b)?;
    let (m, n) = (op.nrows(), op.ncols());
    let max_atoms = settings.max_atoms;
    if max_atoms > m.min(n) {
        return Err(ResidualError::RankTooLarge {
            setting: "max_atoms",
            requested: max_atoms,
            max: m.min(n),
        });
    }
    let b_norm = norm(b);
    let stop_norm = settings.residual_tolerance * b_norm;
    let mut residual = b.to_vec();
    let mut q_columns: Vec<Vec<f64>> = Vec::with_capacity(max_atoms);
    // R stored by columns: r_columns[k] has k + 1 entries.
    let mut r_columns: Vec<Vec<f64>> = Vec::with_capacity(max_atoms);
    let mut qtb: Vec<f64> = Vec::with_capacity(max_atoms);
    let mut support: Vec<usize> = Vec::with_capacity(max_atoms);
    let mut correlation = vec![0.0; n];
    let mut atom = vec![0.0; m];
    while support.len() < max_atoms && norm(&residual) > stop_norm {
        op.apply_transpose(&residual, &mut correlation);
        let mut best: Option<(usize, f64)> = None;
        for (j, c) in correlation.iter().enumerate() {
            if support.contains(&j) {
                continue;
            }
            if best.is_none_or(|(_, v)| c.abs() > v) {
                best = Some((j, c.abs()));
            }
        }
        let Some((j, best_corr)) = best else { break };
        if best_corr <= 1e-14 * b_norm.max(f64::MIN_POSITIVE) {
            break; // the residual is orthogonal to every remaining atom
        }
        op.column(j, &mut atom);
        let atom_norm = norm(&atom);
        let mut coefficients = vec![0.0; q_columns.len()];
        for _pass in 0..2 {
            for (k, q) in q_columns.iter().enumerate() {
                let c = dot(q, &atom);
                coefficients[k] += c;
                for (a, qi) in atom.iter_mut().zip(q) {
                    *a -= c * qi;
                }
            }
        }
        let diagonal = norm(&atom);
        if diagonal <= 1e-12 * atom_norm {
            break; // the atom lies in the span of the chosen ones
        }
        let q: Vec<f64> = atom.iter().map(|a| a / diagonal).collect();
        let projection = dot(&q, &residual);
        for (r, qi) in residual.iter_mut().zip(&q) {
            *r -= projection * qi;
        }
        qtb.push(dot(&q, b));
        coefficients.push(diagonal);
        r_columns.push(coefficients);
        q_columns.push(q);
        support.push(j);
    }
    // Back substitution R x_S = Qᵀ b.
    let k = support.len();
    let mut x_support = vec![0.0; k];
    for i in (0..k).rev() {
        let mut s = qtb[i];
        for (jj, xj) in x_support.iter().enumerate().skip(i + 1) {
            s -= r_columns[jj][i] * xj;
        }
        x_support[i] = s / r_columns[i][i];
    }
    let mut coefficients = vec![0.0; n];
    for (&j, &v) in support.iter().zip(&x_support) {
        coefficients[j] = v;
    }
    let residual_norm = residual_norm(op, &coefficients, b);
    Ok(SparseSolution {
        coefficients,
        iterations: k,
        support,
        residual_norm,
        converged: true,
    })
}

fn residual_norm(op: &dyn LinearOperator, x: &[f64], b: &[f64]) -> f64 {
    let mut ax = vec![0.0; op.nrows()];
    op.apply(x, &mut ax);
    ax.iter()
        .zip(b)
        .map(|(a, bi)| (a - bi) * (a - bi))
        .sum::<f64>()
        .sqrt()
}

/// The largest eigenvalue of AᵀA (= ‖A‖₂²) by power iteration (common practice), to relative
/// change `tolerance` or `max_iterations`.
pub fn largest_eigenvalue_ata(
    op: &dyn LinearOperator,
    tolerance: f64,
    max_iterations: usize,
) -> f64 {
    let n = op.ncols();
    if n == 0 || op.nrows() == 0 {
        return 0.0;
    }
    // A fixed, non-symmetric start vector: deterministic, and unlikely to be orthogonal to the
    // leading eigenvector.
    let mut v: Vec<f64> = (0..n)
        .map(|i| 1.0 + 0.5 * ((i as f64) * 0.7).sin())
        .collect();
    let start_norm = norm(&v);
    v.iter_mut().for_each(|x| *x /= start_norm);
    let mut av = vec![0.0; op.nrows()];
    let mut atav = vec![0.0; n];
    let mut estimate = 0.0;
    for _ in 0..max_iterations {
        op.apply(&v, &mut av);
        op.apply_transpose(&av, &mut atav);
        let next = norm(&atav);
        if next == 0.0 {
            return 0.0;
        }
        v.iter_mut().zip(&atav).for_each(|(x, y)| *x = y / next);
        let converged = (next - estimate).abs() <= tolerance * next;
        estimate = next;
        if converged {
            break;
        }
    }
    estimate
}

/// FISTA for the LASSO `min ½‖Ax − b‖² + λ‖x‖₁` (Beck & Teboulle 2009, Algorithm FISTA with
/// constant step 1/L).
///
/// # Panics
/// When `b.len() != op.nrows()`.
pub fn fista(
    op: &dyn LinearOperator,
    b: &[f64],
    settings: &FistaSettings,
) -> Result<SparseSolution, ResidualError> {
    assert_eq!(b.len(), op.nrows(), "b must have one entry per row of A");
    check_finite("b", b)?;
    let n = op.ncols();
    // The power iteration approaches ‖A‖² from below; the tiny margin keeps the step safely
    // within 1/L without changing the minimiser.
    let lipschitz = largest_eigenvalue_ata(op, 1e-12, 10_000) * (1.0 + 1e-9);
    if lipschitz == 0.0 {
        return Ok(SparseSolution {
            coefficients: vec![0.0; n],
            support: Vec::new(),
            iterations: 0,
            residual_norm: norm(b),
            converged: true,
        });
    }
    let step = 1.0 / lipschitz;
    let threshold = settings.lambda * step;
    let mut x = vec![0.0; n];
    let mut x_previous = vec![0.0; n];
    let mut y = vec![0.0; n];
    let mut t = 1.0_f64;
    let mut ay = vec![0.0; op.nrows()];
    let mut gradient = vec![0.0; n];
    let mut converged = false;
    let mut iterations = 0;
    for k in 1..=settings.max_iterations {
        iterations = k;
        op.apply(&y, &mut ay);
        ay.iter_mut().zip(b).for_each(|(a, bi)| *a -= bi);
        op.apply_transpose(&ay, &mut gradient);
        std::mem::swap(&mut x, &mut x_previous);
        // proximal step: soft threshold of the gradient step
        for ((xi, yi), gi) in x.iter_mut().zip(&y).zip(&gradient) {
            let z = yi - step * gi;
            *xi = z.signum() * (z.abs() - threshold).max(0.0);
        }
        let t_next = 0.5 * (1.0 + (1.0 + 4.0 * t * t).sqrt());
        let momentum = (t - 1.0) / t_next;
        // restart when the momentum points uphill: (y − x)ᵀ(x − x_prev) > 0
        // (O'Donoghue & Candès 2015, gradient scheme)
        let uphill = settings.restart
            && y.iter()
                .zip(&x)
                .zip(&x_previous)
                .map(|((yi, xi), pi)| (yi - xi) * (xi - pi))
                .sum::<f64>()
                > 0.0;
        let step_norm = x
            .iter()
            .zip(&x_previous)
            .map(|(a, p)| (a - p) * (a - p))
            .sum::<f64>()
            .sqrt();
        if uphill {
            t = 1.0;
            y.copy_from_slice(&x);
        } else {
            for ((yi, xi), pi) in y.iter_mut().zip(&x).zip(&x_previous) {
                *yi = xi + momentum * (xi - pi);
            }
            t = t_next;
        }
        if k > 1 && step_norm <= settings.tolerance * norm(&x).max(f64::MIN_POSITIVE) {
            converged = true;
            break;
        }
    }
    let support = (0..n).filter(|&j| x[j] != 0.0).collect();
    let residual_norm = residual_norm(op, &x, b);
    Ok(SparseSolution {
        coefficients: x,
        support,
        iterations,
        residual_norm,
        converged,
    })
}

/// Solve `A x ≈ b` with the chosen method.
pub fn solve(
    op: &dyn LinearOperator,
    b: &[f64],
    method: &RecoveryMethod,
) -> Result<SparseSolution, ResidualError> {
    match method {
        RecoveryMethod::Omp(settings) => omp(op, b, settings),
        RecoveryMethod::Fista(settings) => fista(op, b, settings),
    }
}

/// Settings of DCT compression.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct SparseConfig {
    keep_fraction: f64,
    remove_ramp: bool,
}

impl Default for SparseConfig {
    fn default() -> Self {
        Self {
            keep_fraction: 0.1,
            remove_ramp: false,
        }
    }
}

impl SparseConfig {
    /// Fraction of DCT coefficients to keep, in (0, 1].
    pub fn with_keep_fraction(mut self, keep_fraction: f64) -> Result<Self, ResidualError> {
        check_fraction("keep_fraction", keep_fraction)?;
        self.keep_fraction = keep_fraction;
        Ok(self)
    }
    /// Remove the ramp through the end points before the DCT (and add it back after).
    pub fn with_remove_ramp(mut self, remove_ramp: bool) -> Self {
        self.remove_ramp = remove_ramp;
        self
    }
    pub fn keep_fraction(&self) -> f64 {
        self.keep_fraction
    }
}

pub(crate) fn check_fraction(setting: &'static str, value: f64) -> Result<(), ResidualError> {
    if value.is_finite() && value > 0.0 && value <= 1.0 {
        Ok(())
    } else {
        Err(ResidualError::InvalidSetting {
            setting,
            value,
            expected: "a fraction in (0, 1]",
        })
    }
}

/// A trace compressed to its largest DCT coefficients.
#[derive(Debug, Clone, PartialEq)]
pub struct Compressed {
    /// Indices of the kept DCT coefficients (by decreasing magnitude).
    pub kept_indices: Vec<usize>,
    /// Their values (orthonormal DCT-II).
    pub kept_values: Vec<f64>,
    /// The trace rebuilt from the kept coefficients (ramp added back if it was removed).
    pub reconstruction: Vec<f64>,
    /// Kept coefficients / trace length.
    pub kept_fraction: f64,
    /// ‖x − x̂‖ / ‖x‖ (0 for an all-zero trace).
    pub relative_error: f64,
}

/// Keep the largest `keep_fraction` of the orthonormal DCT coefficients of `signal`
/// (at least one), and report the kept fraction and the relative reconstruction error.
pub fn compress(signal: &[f64], keep_fraction: f64) -> Result<Compressed, ResidualError> {
    compress_with(
        signal,
        &SparseConfig::default().with_keep_fraction(keep_fraction)?,
    )
}

/// [`compress`] with all settings.
pub fn compress_with(signal: &[f64], config: &SparseConfig) -> Result<Compressed, ResidualError> {
    check_finite("signal", signal)?;
    let n = signal.len();
    if n == 0 {
        return Err(ResidualError::TooLittleData {
            what: "signal",
            got: 0,
            needed: 1,
        });
    }
    let (mut work, ramp) = if config.remove_ramp {
        let (detrended, ramp) = remove_ramp(signal)?;
        (detrended, Some(ramp))
    } else {
        (signal.to_vec(), None)
    };
    let plan = Dct::new(n);
    plan.forward(&mut work);
    let keep = ((config.keep_fraction * n as f64).ceil() as usize).clamp(1, n);
    let mut order: Vec<usize> = (0..n).collect();
    // stable sort: ties keep the lower index
    order.sort_by(|&i, &j| work[j].abs().total_cmp(&work[i].abs()));
    let kept_indices: Vec<usize> = order[..keep].to_vec();
    let kept_values: Vec<f64> = kept_indices.iter().map(|&i| work[i]).collect();
    let mut sparse = vec![0.0; n];
    for (&i, &v) in kept_indices.iter().zip(&kept_values) {
        sparse[i] = v;
    }
    plan.inverse(&mut sparse);
    if let Some(ramp) = ramp {
        ramp.add_to(&mut sparse);
    }
    let signal_norm = norm(signal);
    let error_norm = signal
        .iter()
        .zip(&sparse)
        .map(|(a, b)| (a - b) * (a - b))
        .sum::<f64>()
        .sqrt();
    Ok(Compressed {
        kept_indices,
        kept_values,
        reconstruction: sparse,
        kept_fraction: keep as f64 / n as f64,
        relative_error: if signal_norm > 0.0 {
            error_norm / signal_norm
        } else {
            0.0
        },
    })
}

/// A trace recovered from some of its samples.
#[derive(Debug, Clone, PartialEq)]
pub struct Recovered {
    /// The whole trace, length n.
    pub signal: Vec<f64>,
    /// Its sparse orthonormal DCT coefficients and solver report.
    pub solution: SparseSolution,
}

/// Recover a length-`n` trace that is sparse in the DCT domain from `values` observed at
/// `sample_indices` (gappy or sparse recordings), solving `S Ψ c ≈ values` with the implicit
/// operator and returning `Ψ c`.
pub fn recover_from_samples(
    n: usize,
    sample_indices: &[usize],
    values: &[f64],
    method: &RecoveryMethod,
) -> Result<Recovered, ResidualError> {
    if sample_indices.len() != values.len() {
        return Err(ResidualError::TooLittleData {
            what: "values (one per sample index)",
            got: values.len(),
            needed: sample_indices.len(),
        });
    }
    check_finite("values", values)?;
    let op = SampledInverseDct::new(n, sample_indices)?;
    let solution = solve(&op, values, method)?;
    let mut signal = solution.coefficients.clone();
    op.plan.inverse(&mut signal);
    Ok(Recovered { signal, solution })
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn sampled_operator_matches_its_explicit_matrix() {
        let n = 17;
        let indices = [0usize, 3, 4, 9, 16];
        let op = SampledInverseDct::new(n, &indices).unwrap();
        let explicit = DMatrix::from_fn(indices.len(), n, |i, j| {
            op.plan.inverse_entry(indices[i], j)
        });
        let x: Vec<f64> = (0..n).map(|i| (i as f64 * 0.37).cos()).collect();
        let (mut y1, mut y2) = (vec![0.0; 5], vec![0.0; 5]);
        op.apply(&x, &mut y1);
        LinearOperator::apply(&explicit, &x, &mut y2);
        for (a, b) in y1.iter().zip(&y2) {
            assert!((a - b).abs() < 1e-13);
        }
        let y = [1.0, -2.0, 0.5, 0.25, 3.0];
        let (mut x1, mut x2) = (vec![0.0; n], vec![0.0; n]);
        op.apply_transpose(&y, &mut x1);
        explicit.apply_transpose(&y, &mut x2);
        for (a, b) in x1.iter().zip(&x2) {
            assert!((a - b).abs() < 1e-13);
        }
        // rows of an orthogonal matrix: ‖A‖₂² = 1
        let l = largest_eigenvalue_ata(&op, 1e-12, 1000);
        assert!((l - 1.0).abs() < 1e-9, "{l}");
    }

    #[test]
    fn omp_solves_an_exactly_sparse_square_system() {
        let a = DMatrix::from_fn(6, 6, |i, j| {
            if i == j {
                2.0
            } else {
                0.1 * (i + 2 * j) as f64
            }
        });
        let mut x_true = vec![0.0; 6];
        x_true[1] = 3.0;
        x_true[4] = -1.0;
        let mut b = vec![0.0; 6];
        LinearOperator::apply(&a, &x_true, &mut b);
        let s = omp(&a, &b, &OmpSettings::new(2).unwrap()).unwrap();
        for (u, v) in s.coefficients.iter().zip(&x_true) {
            assert!((u - v).abs() < 1e-12);
        }
        assert!(s.residual_norm < 1e-12);
    }

    #[test]
    fn compress_keeps_a_pure_cosine_in_one_coefficient() {
        let n = 64;
        let plan = Dct::new(n);
        let signal: Vec<f64> = (0..n).map(|i| 3.0 * plan.inverse_entry(i, 5)).collect();
        let c = compress(&signal, 1.0 / 64.0).unwrap();
        assert_eq!(c.kept_indices, vec![5]);
        assert!((c.kept_values[0] - 3.0).abs() < 1e-12);
        assert!(c.relative_error < 1e-13);
        assert!((c.kept_fraction - 1.0 / 64.0).abs() < 1e-15);
    }

    #[test]
    fn settings_are_checked_by_name() {
        for bad in [0.0, 1.5, f64::NAN] {
            let err = SparseConfig::default().with_keep_fraction(bad).unwrap_err();
            assert!(err.to_string().contains("keep_fraction"), "{err}");
        }
        assert!(FistaSettings::new(0.0)
            .unwrap_err()
            .to_string()
            .contains("lambda"));
        assert!(OmpSettings::new(0)
            .unwrap_err()
            .to_string()
            .contains("max_atoms"));
    }
}

//! Residual modelling: the numerical core that turns residuals (detailed − reduced model) into a
//! compact correction.
//!
//! - [`dct`]: orthonormal DCT-II / DCT-III (fast, any length), on vectors and matrix columns/rows,
//!   and the end-point ramp removal that keeps a trace's DCT compact.
//! - [`sparse`]: compressed sensing — Orthogonal Matching Pursuit and FISTA for the LASSO, over
//!   explicit matrices or the implicit "sampled inverse DCT" operator; compression of a trace by
//!   keeping its largest DCT coefficients; recovery of a trace from missing or sparse samples.
//! - [`dmd`]: exact DMD and DMD with control (known or unknown input matrix), delay embedding,
//!   rank selection by the optimal hard threshold, stability enforcement and conversion to
//!   continuous time. The result is a real linear system `z⁺ = A z + B u`, `y = C z`.
//!
//! All quantities are dimensionless here (per unit as delivered by the caller); times carry `_s`.

pub mod dct;
pub mod dmd;
pub mod sparse;

/// Failures of the residual-modelling numerics. Each names the setting or data it concerns.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum ResidualError {
    /// A setting is outside its allowed range.
    #[error("setting `{setting}` = {value} is invalid: expected {expected}")]
    InvalidSetting {
        setting: &'static str,
        value: f64,
        expected: &'static str,
    },
    /// A value of the input data is NaN or infinite.
    #[error("`{what}` has a non-finite value ({value}) at index {index}")]
    NonFinite {
        what: &'static str,
        index: usize,
        value: f64,
    },
    /// A value of a matrix of input data is NaN or infinite.
    #[error("`{what}` has a non-finite value ({value}) at row {row}, column {column}")]
    NonFiniteMatrix {
        what: &'static str,
        row: usize,
        column: usize,
        value: f64,
    },
    /// Not enough data for the requested operation.
    #[error("`{what}` has {got} entries, but at least {needed} are needed")]
    TooLittleData {
        what: &'static str,
        got: usize,
        needed: usize,
    },
    /// A requested rank exceeds what the data can support.
    #[error("setting `{setting}` = {requested} exceeds the largest rank the data allow ({max})")]
    RankTooLarge {
        setting: &'static str,
        requested: usize,
        max: usize,
    },
    /// A sample index lies outside the trace.
    #[error("sample index {index} (position {position} in `sample_indices`) is outside a trace of length {n}")]
    SampleIndexOutOfRange {
        position: usize,
        index: usize,
        n: usize,
    },
    /// A sample index occurs twice.
    #[error("sample index {index} occurs twice in `sample_indices`")]
    DuplicateSample { index: usize },
    /// A matrix decomposition did not converge.
    #[error("the {what} did not converge")]
    Decomposition { what: &'static str },
    /// The eigenvector matrix is too ill-conditioned to rebuild the system from its eigenvalues.
    #[error(
        "cannot {purpose}: the eigenvector matrix is ill-conditioned (condition number ≈ {condition:.3e}); \
         the fitted matrix is (nearly) defective"
    )]
    IllConditionedEigenvectors {
        purpose: &'static str,
        condition: f64,
    },
    /// Stability enforcement failed to bring all eigenvalues inside the margin.
    #[error(
        "the correction cannot be stabilised: after scaling, eigenvalue {index} still has modulus \
         {modulus} > stability margin {margin}"
    )]
    Unstabilisable {
        index: usize,
        modulus: f64,
        margin: f64,
    },
    /// An eigenvalue has no real logarithm (zero or on the negative real axis).
    #[error(
        "eigenvalue {index} = {re} + {im}i of the discrete system has no real logarithm \
         ({reason}); the continuous-time form does not exist for sample time {dt_s} s"
    )]
    NoRealLogarithm {
        index: usize,
        re: f64,
        im: f64,
        reason: &'static str,
        dt_s: f64,
    },
}

/// Error on the first non-finite entry of `values`, named `what`.
pub(crate) fn check_finite(what: &'static str, values: &[f64]) -> Result<(), ResidualError> {
    match values.iter().position(|v| !v.is_finite()) {
        Some(index) => Err(ResidualError::NonFinite {
            what,
            index,
            value: values[index],
        }),
        None => Ok(()),
    }
}

/// Error on the first non-finite entry of `m` (column-major scan), named `what`.
pub(crate) fn check_finite_matrix(
    what: &'static str,
    m: &nalgebra::DMatrix<f64>,
) -> Result<(), ResidualError> {
    for column in 0..m.ncols() {
        for row in 0..m.nrows() {
            let value = m[(row, column)];
            if !value.is_finite() {
                return Err(ResidualError::NonFiniteMatrix {
                    what,
                    row,
                    column,
                    value,
                });
            }
        }
    }
    Ok(())
}

//! The model capability trait and its derivatives (exact when the model has them, finite
//! differences otherwise).

use nalgebra::{DMatrix, DVector};
use rayon::prelude::*;
use thiserror::Error;

/// Why a model could not be evaluated.
#[derive(Debug, Clone, PartialEq, Error)]
pub enum ModelError {
    /// The model itself failed (a simulation diverged, a parameter combination is invalid...).
    #[error("model evaluation failed at log-parameters {log_params:?}: {reason}")]
    Evaluation {
        log_params: Vec<f64>,
        reason: String,
    },
    /// A residual, Jacobian entry or second derivative came out NaN or infinite.
    #[error("non-finite {what} (entry {index} = {value}) at log-parameters {log_params:?}")]
    NonFinite {
        what: &'static str,
        index: usize,
        value: f64,
        log_params: Vec<f64>,
    },
    /// The model does not offer what was asked of it (for example a reduction it cannot make).
    #[error("the model does not support {what}")]
    Unsupported { what: String },
}

/// Where a derivative came from; carried into every result so a report can say so.
#[derive(Debug, Clone, Copy, PartialEq, Eq, serde::Serialize, serde::Deserialize)]
pub enum DerivativeSource {
    /// supplied by the model (analytic or forward sensitivities)
    Exact,
    /// central finite differences taken by the tool
    FiniteDifferences,
}

impl std::fmt::Display for DerivativeSource {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.write_str(match self {
            DerivativeSource::Exact => "exact (from the model)",
            DerivativeSource::FiniteDifferences => "central finite differences",
        })
    }
}

/// A least-squares model in log-parameters θ = ln(p) of positive physical parameters p.
///
/// `residuals` writes r(θ) = (prediction − data)·weight, so the cost is ½‖r‖² and the Fisher
/// information of unit-variance Gaussian noise is JᵀJ with J = ∂r/∂θ.
pub trait LeastSquaresModel: Sync {
    /// Names of the physical parameters p (not of their logarithms), in θ order.
    fn parameter_names(&self) -> Vec<String>;

    /// Number of parameters; override when `parameter_names` is costly.
    fn parameter_count(&self) -> usize {
        self.parameter_names().len()
    }

    /// Length of the residual vector.
    fn residual_count(&self) -> usize;

    /// Weighted residuals r(θ) into `out` (length `residual_count`).
    fn residuals(&self, log_params: &[f64], out: &mut [f64]) -> Result<(), ModelError>;

    /// Exact Jacobian ∂r/∂θ (residual_count × parameter_count) if the model has one. `None`
    /// (the default) makes the tool use central finite differences, labelled as such in results.
    fn jacobian(&self, _log_params: &[f64]) -> Option<Result<DMatrix<f64>, ModelError>> {
        None
    }

    /// Exact second directional derivative A_vv = Σ_ij ∂²r/∂θi∂θj v_i v_j if the model has one.
    /// `None` (the default) makes the tool use the central second difference along v.
    fn second_directional(
        &self,
        _log_params: &[f64],
        _direction: &[f64],
    ) -> Option<Result<DVector<f64>, ModelError>> {
        None
    }

    /// Box bounds (lower, upper) on each log-parameter; `None` (the default) means unbounded.
    /// The fitter projects its steps onto the box and rejects a start outside it.
    fn log_bounds(&self) -> Option<Vec<(f64, f64)>> {
        None
    }
}

fn first_non_finite(values: &[f64]) -> Option<(usize, f64)> {
    values
        .iter()
        .enumerate()
        .find(|(_, v)| !v.is_finite())
        .map(|(i, v)| (i, *v))
}

/// r(θ) as a vector, with a typed error when any entry is not finite.
///
/// # Panics
/// When `log_params` has not `parameter_count` entries (a caller bug).
pub fn evaluate_residuals<M: LeastSquaresModel + ?Sized>(
    model: &M,
    log_params: &[f64],
) -> Result<DVector<f64>, ModelError> {
    assert_eq!(
        log_params.len(),
        model.parameter_count(),
        "log-parameter vector length differs from the model's parameter count"
    );
    let mut out = DVector::zeros(model.residual_count());
    model.residuals(log_params, out.as_mut_slice())?;
    if let Some((index, value)) = first_non_finite(out.as_slice()) {
        return Err(ModelError::NonFinite {
            what: "residual",
            index,
            value,
            log_params: log_params.to_vec(),
        });
    }
    Ok(out)
}

/// Relative step of central first differences: ε^(1/3) balances truncation O(h²) against
/// round-off O(ε/h) (Nocedal & Wright, Numerical Optimization, 2nd ed., eq. 8.10).
const CENTRAL_FIRST_STEP: f64 = 6.055_454_452_393_343e-6; // f64::EPSILON.cbrt()

/// Relative step of the central second difference: ε^(1/4) balances truncation O(h²) against
/// round-off O(ε/h²) (same reasoning as above, common practice).
const CENTRAL_SECOND_STEP: f64 = 1.220_703_125e-4; // f64::EPSILON.powf(0.25)

/// Central finite-difference Jacobian ∂r/∂θ, columns evaluated in parallel (rayon).
/// Step h_i = ε^(1/3)·max(1, |θ_i|). Note: near a bound the stencil may step outside the box;
/// models are expected to be defined for any finite θ.
pub fn central_difference_jacobian<M: LeastSquaresModel + ?Sized>(
    model: &M,
    log_params: &[f64],
) -> Result<DMatrix<f64>, ModelError> {
    let n = log_params.len();
    let m = model.residual_count();
    let columns: Vec<DVector<f64>> = (0..n)
        .into_par_iter()
        .map(|i| {
            let h = CENTRAL_FIRST_STEP * log_params[i].abs().max(1.0);
            let mut plus = log_params.to_vec();
            let mut minus = log_params.to_vec();
            plus[i] += h;
            minus[i] -= h;
            // the step actually represented in floating point
            let width = plus[i] - minus[i];
            let r_plus = evaluate_residuals(model, &plus)?;
            let r_minus = evaluate_residuals(model, &minus)?;
            Ok((r_plus - r_minus) / width)
        })
        .collect::<Result<_, ModelError>>()?;
    let mut jac = DMatrix::zeros(m, n);
    for (i, col) in columns.into_iter().enumerate() {
        jac.set_column(i, &col);
    }
    Ok(jac)
}

/// The Jacobian: the model's exact one when it has it, central differences otherwise.
pub fn evaluate_jacobian<M: LeastSquaresModel + ?Sized>(
    model: &M,
    log_params: &[f64],
) -> Result<(DMatrix<f64>, DerivativeSource), ModelError> {
    let (jac, source) = match model.jacobian(log_params) {
        Some(result) => (result?, DerivativeSource::Exact),
        None => (
            central_difference_jacobian(model, log_params)?,
            DerivativeSource::FiniteDifferences,
        ),
    };
    assert_eq!(
        jac.shape(),
        (model.residual_count(), log_params.len()),
        "Jacobian shape differs from (residual_count, parameter_count)"
    );
    // column-major storage: entry k is (k % m, k / m); report the flat index
    if let Some((index, value)) = first_non_finite(jac.as_slice()) {
        return Err(ModelError::NonFinite {
            what: "Jacobian entry (column-major index)",
            index,
            value,
            log_params: log_params.to_vec(),
        });
    }
    Ok((jac, source))
}

/// Central second difference along v: A_vv ≈ (r(θ+hv) − 2r(θ) + r(θ−hv))/h², with
/// h = ε^(1/4)·max(1, ‖θ‖∞)/‖v‖ so the stencil moves θ by a fixed relative amount.
/// `residuals_at` is r(θ) when the caller already has it.
pub fn finite_difference_second_directional<M: LeastSquaresModel + ?Sized>(
    model: &M,
    log_params: &[f64],
    direction: &[f64],
    residuals_at: Option<&DVector<f64>>,
) -> Result<DVector<f64>, ModelError> {
    assert_eq!(log_params.len(), direction.len(), "direction length");
    let v_norm = direction.iter().map(|x| x * x).sum::<f64>().sqrt();
    if v_norm == 0.0 {
        return Ok(DVector::zeros(model.residual_count()));
    }
    let scale = log_params.iter().fold(1.0_f64, |a, x| a.max(x.abs()));
    let h = CENTRAL_SECOND_STEP * scale / v_norm;
    let plus: Vec<f64> = log_params
        .iter()
        .zip(direction)
        .map(|(t, v)| t + h * v)
        .collect();
    let minus: Vec<f64> = log_params
        .iter()
        .zip(direction)
        .map(|(t, v)| t - h * v)
        .collect();
    let (r_plus, r_minus) = rayon::join(
        || evaluate_residuals(model, &plus),
        || evaluate_residuals(model, &minus),
    );
    let centre = match residuals_at {
        Some(r) => r.clone(),
        None => evaluate_residuals(model, log_params)?,
    };
    Ok((r_plus? - centre * 2.0 + r_minus?) / (h * h))
}

/// A_vv: the model's exact one when it has it, the central second difference otherwise.
pub fn evaluate_second_directional<M: LeastSquaresModel + ?Sized>(
    model: &M,
    log_params: &[f64],
    direction: &[f64],
    residuals_at: Option<&DVector<f64>>,
) -> Result<(DVector<f64>, DerivativeSource), ModelError> {
    let (avv, source) = match model.second_directional(log_params, direction) {
        Some(result) => (result?, DerivativeSource::Exact),
        None => (
            finite_difference_second_directional(model, log_params, direction, residuals_at)?,
            DerivativeSource::FiniteDifferences,
        ),
    };
    assert_eq!(avv.len(), model.residual_count(), "A_vv length");
    if let Some((index, value)) = first_non_finite(avv.as_slice()) {
        return Err(ModelError::NonFinite {
            what: "second directional derivative",
            index,
            value,
            log_params: log_params.to_vec(),
        });
    }
    Ok((avv, source))
}

#[cfg(test)]
mod tests {
    use super::*;

    /// r_k = Σ_i exp(−e^{θ_i} t_k) − y_k with exact derivatives.
    struct TwoExp {
        times: Vec<f64>,
        data: Vec<f64>,
    }

    impl LeastSquaresModel for TwoExp {
        fn parameter_names(&self) -> Vec<String> {
            vec!["k1".into(), "k2".into()]
        }
        fn residual_count(&self) -> usize {
            self.times.len()
        }
        fn residuals(&self, th: &[f64], out: &mut [f64]) -> Result<(), ModelError> {
            for (k, t) in self.times.iter().enumerate() {
                out[k] = th.iter().map(|x| (-x.exp() * t).exp()).sum::<f64>() - self.data[k];
            }
            Ok(())
        }
    }

    fn exact_avv(times: &[f64], th: &[f64], v: &[f64]) -> DVector<f64> {
        DVector::from_iterator(
            times.len(),
            times.iter().map(|t| {
                th.iter()
                    .zip(v)
                    .map(|(x, vi)| {
                        let p = x.exp();
                        vi * vi * (-t * p + t * t * p * p) * (-p * t).exp()
                    })
                    .sum::<f64>()
            }),
        )
    }

    #[test]
    fn second_difference_matches_exact_second_derivative() {
        let model = TwoExp {
            times: vec![0.5, 1.0, 2.0],
            data: vec![0.3, 0.2, 0.1],
        };
        let th = [0.2, 0.9];
        let v = [0.6, -1.7];
        let fd = finite_difference_second_directional(&model, &th, &v, None).unwrap();
        let exact = exact_avv(&model.times, &th, &v);
        let err = (&fd - &exact).amax() / exact.amax();
        assert!(err < 1e-6, "relative error {err}");
    }

    #[test]
    fn non_finite_residual_names_entry_and_parameters() {
        struct Bad;
        impl LeastSquaresModel for Bad {
            fn parameter_names(&self) -> Vec<String> {
                vec!["a".into()]
            }
            fn residual_count(&self) -> usize {
                2
            }
            fn residuals(&self, th: &[f64], out: &mut [f64]) -> Result<(), ModelError> {
                out[0] = th[0];
                out[1] = f64::NAN;
                Ok(())
            }
        }
        let err = evaluate_residuals(&Bad, &[0.5]).unwrap_err();
        match err {
            ModelError::NonFinite {
                index, log_params, ..
            } => {
                assert_eq!(index, 1);
                assert_eq!(log_params, vec![0.5]);
            }
            other => panic!("unexpected {other}"),
        }
    }
}

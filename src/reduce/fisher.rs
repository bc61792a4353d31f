//! Fisher information in log-parameters and its eigen-decomposition.

use nalgebra::{DMatrix, DVector, SymmetricEigen};

use super::ReduceError;
use crate::fit::{evaluate_jacobian, DerivativeSource, LeastSquaresModel};

/// I = JᵀJ in log-parameters (unit-variance weighted residuals), eigenvalues ascending.
#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct FisherInformation {
    pub log_params: Vec<f64>,
    /// JᵀJ, row by row
    pub matrix: Vec<Vec<f64>>,
    /// ascending
    pub eigenvalues: Vec<f64>,
    /// `eigenvectors[k]` belongs to `eigenvalues[k]`; each is unit length with its
    /// largest-magnitude component positive, so the sign is reproducible
    pub eigenvectors: Vec<Vec<f64>>,
    pub jacobian_source: DerivativeSource,
}

impl FisherInformation {
    /// Evaluate the Jacobian of `model` at θ and decompose JᵀJ.
    pub fn at<M: LeastSquaresModel + ?Sized>(
        model: &M,
        log_params: &[f64],
    ) -> Result<Self, ReduceError> {
        let (jac, source) =
            evaluate_jacobian(model, log_params).map_err(|source| ReduceError::Model {
                stage: "Fisher information",
                source,
            })?;
        Ok(Self::from_jacobian(log_params, &jac, source))
    }

    /// Decompose JᵀJ of a given Jacobian.
    pub fn from_jacobian(log_params: &[f64], jac: &DMatrix<f64>, source: DerivativeSource) -> Self {
        let matrix = jac.tr_mul(jac);
        let (eigenvalues, eigenvectors) = sorted_eigen(&matrix);
        FisherInformation {
            log_params: log_params.to_vec(),
            matrix: matrix
                .row_iter()
                .map(|r| r.iter().copied().collect())
                .collect(),
            eigenvalues: eigenvalues.as_slice().to_vec(),
            eigenvectors: eigenvectors
                .column_iter()
                .map(|c| c.iter().copied().collect())
                .collect(),
            jacobian_source: source,
        }
    }

    /// The smallest eigenvalue and its eigenvector (the least-sensitive direction).
    pub fn least_sensitive(&self) -> (f64, DVector<f64>) {
        (
            self.eigenvalues[0],
            DVector::from_column_slice(&self.eigenvectors[0]),
        )
    }

    /// JᵀJ as a matrix.
    pub fn to_matrix(&self) -> DMatrix<f64> {
        let n = self.matrix.len();
        DMatrix::from_fn(n, n, |i, j| self.matrix[i][j])
    }

    /// λ_max / λ_min (infinite when λ_min ≤ 0).
    pub fn condition_number(&self) -> f64 {
        let n = self.eigenvalues.len();
        let smallest = self.eigenvalues[0];
        if smallest > 0.0 {
            self.eigenvalues[n - 1] / smallest
        } else {
            f64::INFINITY
        }
    }
}

/// Symmetric eigen-decomposition with eigenvalues ascending and a sign convention on vectors.
pub(crate) fn sorted_eigen(matrix: &DMatrix<f64>) -> (DVector<f64>, DMatrix<f64>) {
    let eig = SymmetricEigen::new(matrix.clone());
    let n = eig.eigenvalues.len();
    let mut order: Vec<usize> = (0..n).collect();
    order.sort_by(|&a, &b| eig.eigenvalues[a].total_cmp(&eig.eigenvalues[b]));
    let values = DVector::from_iterator(n, order.iter().map(|&k| eig.eigenvalues[k]));
    let mut vectors = DMatrix::zeros(n, n);
    for (col, &k) in order.iter().enumerate() {
        let mut v = eig.eigenvectors.column(k).into_owned();
        let pivot = v.iamax();
        if v[pivot] < 0.0 {
            v = -v;
        }
        vectors.set_column(col, &v);
    }
    (values, vectors)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn eigenvalues_ascending_and_vectors_reconstruct_matrix() {
        let jac = DMatrix::from_row_slice(3, 3, &[1.0, 2.0, 0.5, -1.0, 0.3, 4.0, 2.0, 2.0, 2.0]);
        let fim = FisherInformation::from_jacobian(&[0.0; 3], &jac, DerivativeSource::Exact);
        assert!(
            fim.eigenvalues[0] <= fim.eigenvalues[1] && fim.eigenvalues[1] <= fim.eigenvalues[2]
        );
        let vectors = DMatrix::from_fn(3, 3, |i, k| fim.eigenvectors[k][i]);
        let rebuilt = &vectors
            * DMatrix::from_diagonal(&DVector::from_column_slice(&fim.eigenvalues))
            * vectors.transpose();
        let matrix = fim.to_matrix();
        assert!((rebuilt - &matrix).amax() < 1e-12 * matrix.amax());
        for v in &fim.eigenvectors {
            let v = DVector::from_column_slice(v);
            assert!(v[v.iamax()] > 0.0);
        }
    }
}

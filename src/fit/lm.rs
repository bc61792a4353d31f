//! Levenberg–Marquardt as an explicit stepper over [`LmState`].
//!
//! Damped Gauss–Newton step (JᵀJ + λ D²) δ = −Jᵀr with Marquardt's diagonal scaling D² = diag(JᵀJ)
//! kept at its running maximum (Marquardt 1963; the running maximum as in Moré 1978, "The
//! Levenberg–Marquardt algorithm: implementation and theory", eq. 6.3), and the damping updated
//! from the gain ratio ρ = actual / predicted reduction (Nielsen 1999; Madsen, Nielsen & Tingleff
//! 2004, "Methods for non-linear least squares problems", Algorithm 3.16):
//! accepted: λ ← λ·max(1/3, 1 − (2ρ − 1)³), ν ← 2; rejected: λ ← λ·ν, ν ← 2ν.
//!
//! Box bounds on θ: variables sitting on a bound whose descent direction points outward are held
//! fixed for the step (an active set), and the trial point is projected (clamped) onto the box.
//!
//! One call of [`LevenbergMarquardt::next_iter`] is one iteration = one damped solve and one
//! trial evaluation (accepted or rejected), so an observer sees every trial.

use nalgebra::{DMatrix, DVector};
use thiserror::Error;

use super::model::{
    evaluate_jacobian, evaluate_residuals, evaluate_second_directional, DerivativeSource,
    LeastSquaresModel,
};
use super::ModelError;
use crate::fit::ConfigError;

/// Settings of the Levenberg–Marquardt fitter.
#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct LmConfig {
    max_iterations: usize,
    cost_tolerance: f64,
    step_tolerance: f64,
    gradient_tolerance: f64,
    initial_damping: f64,
    geodesic_acceleration: Option<f64>,
}

impl Default for LmConfig {
    fn default() -> Self {
        LmConfig {
            max_iterations: 500,
            cost_tolerance: 1e-10,
            step_tolerance: 1e-10,
            gradient_tolerance: 1e-10,
            // τ = 1e-3 (Madsen, Nielsen & Tingleff 2004, section 3.2)
            initial_damping: 1e-3,
            geodesic_acceleration: None,
        }
    }
}

fn check_tolerance(setting: &'static str, value: f64) -> Result<f64, ConfigError> {
    if value.is_finite() && value >= 0.0 {
        Ok(value)
    } else {
        Err(ConfigError::Invalid {
            setting,
            value: value.to_string(),
            expected: "a finite number ≥ 0",
        })
    }
}

impl LmConfig {
    /// Upper limit on iterations (trial steps); must be ≥ 1.
    pub fn with_max_iterations(mut self, max_iterations: usize) -> Result<Self, ConfigError> {
        if max_iterations == 0 {
            return Err(ConfigError::Invalid {
                setting: "max_iterations",
                value: "0".into(),
                expected: "at least 1",
            });
        }
        self.max_iterations = max_iterations;
        Ok(self)
    }

    /// Stop tolerances, each ≥ 0:
    /// `cost`: relative actual and predicted cost reductions of an accepted step both ≤ this;
    /// `step`: ‖δθ‖ ≤ step·(‖θ‖ + step);
    /// `gradient`: ‖Jᵀr‖∞ (projected onto the box) ≤ this.
    pub fn with_tolerances(
        mut self,
        cost: f64,
        step: f64,
        gradient: f64,
    ) -> Result<Self, ConfigError> {
        self.cost_tolerance = check_tolerance("cost_tolerance", cost)?;
        self.step_tolerance = check_tolerance("step_tolerance", step)?;
        self.gradient_tolerance = check_tolerance("gradient_tolerance", gradient)?;
        Ok(self)
    }

    /// Initial damping relative to the scaling: λ₀ = τ (with D² = diag JᵀJ); must be > 0.
    pub fn with_initial_damping(mut self, tau: f64) -> Result<Self, ConfigError> {
        if !(tau.is_finite() && tau > 0.0) {
            return Err(ConfigError::Invalid {
                setting: "initial_damping",
                value: tau.to_string(),
                expected: "a finite number > 0",
            });
        }
        self.initial_damping = tau;
        Ok(self)
    }

    /// Add the geodesic-acceleration correction to each step (Transtrum & Sethna 2012,
    /// "Improvements to the Levenberg-Marquardt algorithm for nonlinear least-squares
    /// minimization", arXiv:1201.5885): δ = δ₁ + ½δ₂ with δ₂ = −(JᵀJ + λD²)⁻¹Jᵀ A_vv(δ₁), and a
    /// trial is rejected when 2‖δ₂‖/‖δ₁‖ > `alpha` (they suggest 0.75; must lie in (0, 1]).
    /// `None` (the default) turns it off. Costs one A_vv per iteration.
    pub fn with_geodesic_acceleration(mut self, alpha: Option<f64>) -> Result<Self, ConfigError> {
        if let Some(a) = alpha {
            if a.is_nan() || a <= 0.0 || a > 1.0 {
                return Err(ConfigError::Invalid {
                    setting: "geodesic_acceleration",
                    value: a.to_string(),
                    expected: "a ratio in (0, 1] or none",
                });
            }
        }
        self.geodesic_acceleration = alpha;
        Ok(self)
    }

    pub fn max_iterations(&self) -> usize {
        self.max_iterations
    }
}

/// Why a fit ended successfully.
#[derive(Debug, Clone, Copy, PartialEq, Eq, serde::Serialize, serde::Deserialize)]
pub enum TerminationReason {
    /// relative cost reduction (actual and predicted) below `cost_tolerance`
    CostTolerance,
    /// step below `step_tolerance`
    StepTolerance,
    /// projected gradient below `gradient_tolerance`
    GradientTolerance,
}

/// Why a fit failed.
#[derive(Debug, Clone, PartialEq, Error)]
pub enum FitError {
    #[error("setting: {0}")]
    Config(#[from] ConfigError),
    #[error("start vector has {found} log-parameters, the model has {expected}")]
    StartLength { expected: usize, found: usize },
    #[error("model bounds list {found} entries, the model has {expected} parameters")]
    BoundsLength { expected: usize, found: usize },
    #[error("bounds of parameter `{parameter}` are invalid: lower {lower} > upper {upper} or NaN")]
    InvalidBounds {
        parameter: String,
        lower: f64,
        upper: f64,
    },
    #[error(
        "start log-parameter of `{parameter}` (index {index}) = {log_value} lies outside its \
         bounds [{lower}, {upper}]"
    )]
    StartOutOfBounds {
        parameter: String,
        index: usize,
        log_value: f64,
        lower: f64,
        upper: f64,
    },
    #[error(
        "non-finite residual (entry {residual_index} = {value}) at iteration {iteration}, \
         log-parameters {log_params:?}"
    )]
    NonFiniteResiduals {
        iteration: usize,
        log_params: Vec<f64>,
        residual_index: usize,
        value: f64,
    },
    #[error("model failed at iteration {iteration}: {source}")]
    Model {
        iteration: usize,
        #[source]
        source: ModelError,
    },
    #[error("no convergence after {iterations} iterations (cost {cost})")]
    NoConvergence { iterations: usize, cost: f64 },
    #[error("damping grew to {damping} at iteration {iteration} without progress (cost {cost})")]
    Stalled {
        iteration: usize,
        cost: f64,
        damping: f64,
    },
}

/// What happened to one trial step.
#[derive(Debug, Clone, Copy, PartialEq, Eq, serde::Serialize, serde::Deserialize)]
pub enum StepOutcome {
    Accepted,
    /// the cost did not decrease
    RejectedNoDecrease,
    /// the trial residuals were not finite
    RejectedNonFinite,
    /// the damped normal matrix was not positive definite
    RejectedSingular,
    /// the geodesic acceleration was too large against the velocity (2‖δ₂‖/‖δ₁‖ > α)
    RejectedAcceleration,
}

/// The record of one trial, for observers and logs.
#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct LmStep {
    pub outcome: StepOutcome,
    /// ‖δθ‖₂ of the (projected) trial step
    pub step_norm: f64,
    /// gain ratio actual/predicted reduction (NaN when not evaluated)
    pub gain_ratio: f64,
    /// damping λ used for this trial
    pub damping: f64,
    /// the trial point
    pub trial_log_params: Vec<f64>,
}

/// Everything the fitter knows between iterations.
#[derive(Debug, Clone)]
pub struct LmState {
    /// iterations done (trial steps, accepted or not)
    pub iteration: usize,
    pub accepted_steps: usize,
    pub residual_evaluations: usize,
    pub jacobian_evaluations: usize,
    pub log_params: DVector<f64>,
    pub residuals: DVector<f64>,
    /// ½‖r‖²
    pub cost: f64,
    pub jacobian: DMatrix<f64>,
    pub jacobian_source: DerivativeSource,
    /// Jᵀr
    pub gradient: DVector<f64>,
    pub damping: f64,
    damping_growth: f64,
    /// D², running maximum of diag(JᵀJ)
    scaling: DVector<f64>,
    lower: DVector<f64>,
    upper: DVector<f64>,
    pub last_step: Option<LmStep>,
    /// set when the fit has converged; further `next_iter` calls do nothing
    pub termination: Option<TerminationReason>,
}

impl LmState {
    /// ‖Jᵀr‖∞ with components that push against an active bound removed.
    pub fn projected_gradient_norm(&self) -> f64 {
        (0..self.gradient.len())
            .filter(|&i| !self.pinned(i))
            .map(|i| self.gradient[i].abs())
            .fold(0.0, f64::max)
    }

    /// A variable on a bound whose steepest-descent direction −g points out of the box.
    fn pinned(&self, i: usize) -> bool {
        let g = self.gradient[i];
        (self.log_params[i] <= self.lower[i] && g > 0.0)
            || (self.log_params[i] >= self.upper[i] && g < 0.0)
    }
}

/// The outcome of a successful fit.
#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct FitResult {
    pub parameter_names: Vec<String>,
    pub log_params: Vec<f64>,
    /// physical parameters p = exp(θ)
    pub params: Vec<f64>,
    /// ½‖r‖² at the result
    pub cost: f64,
    pub iterations: usize,
    pub accepted_steps: usize,
    pub residual_evaluations: usize,
    pub jacobian_evaluations: usize,
    pub termination: TerminationReason,
    pub jacobian_source: DerivativeSource,
    /// ‖Jᵀr‖∞ (projected) at the result
    pub gradient_norm: f64,
}

/// The Levenberg–Marquardt stepper.
#[derive(Debug, Clone, Default)]
pub struct LevenbergMarquardt {
    pub config: LmConfig,
}

fn model_error(iteration: usize, source: ModelError) -> FitError {
    match source {
        ModelError::NonFinite {
            what: "residual",
            index,
            value,
            log_params,
        } => FitError::NonFiniteResiduals {
            iteration,
            log_params,
            residual_index: index,
            value,
        },
        source => FitError::Model { iteration, source },
    }
}

impl LevenbergMarquardt {
    pub fn new(config: LmConfig) -> Self {
        LevenbergMarquardt { config }
    }

    /// Check the start and bounds, evaluate r and J at the start.
    pub fn init<M: LeastSquaresModel + ?Sized>(
        &self,
        model: &M,
        start_log_params: &[f64],
    ) -> Result<LmState, FitError> {
        let names = model.parameter_names();
        let n = names.len();
        if start_log_params.len() != n {
            return Err(FitError::StartLength {
                expected: n,
                found: start_log_params.len(),
            });
        }
        let bounds = model
            .log_bounds()
            .unwrap_or_else(|| vec![(f64::NEG_INFINITY, f64::INFINITY); n]);
        if bounds.len() != n {
            return Err(FitError::BoundsLength {
                expected: n,
                found: bounds.len(),
            });
        }
        for (i, (&(lower, upper), &x)) in bounds.iter().zip(start_log_params).enumerate() {
            if lower.is_nan() || upper.is_nan() || lower > upper {
                return Err(FitError::InvalidBounds {
                    parameter: names[i].clone(),
                    lower,
                    upper,
                });
            }
            if !(x >= lower && x <= upper) {
                return Err(FitError::StartOutOfBounds {
                    parameter: names[i].clone(),
                    index: i,
                    log_value: x,
                    lower,
                    upper,
                });
            }
        }
        let residuals =
            evaluate_residuals(model, start_log_params).map_err(|e| model_error(0, e))?;
        let (jacobian, jacobian_source) =
            evaluate_jacobian(model, start_log_params).map_err(|e| model_error(0, e))?;
        let gradient = jacobian.tr_mul(&residuals);
        let scaling = scaling_floor(jacobian.column_iter().map(|c| c.norm_squared()).collect());
        let cost = 0.5 * residuals.norm_squared();
        let mut state = LmState {
            iteration: 0,
            accepted_steps: 0,
            residual_evaluations: 1,
            jacobian_evaluations: 1,
            log_params: DVector::from_column_slice(start_log_params),
            residuals,
            cost,
            jacobian,
            jacobian_source,
            gradient,
            damping: self.config.initial_damping,
            damping_growth: 2.0,
            scaling,
            lower: DVector::from_iterator(n, bounds.iter().map(|b| b.0)),
            upper: DVector::from_iterator(n, bounds.iter().map(|b| b.1)),
            last_step: None,
            termination: None,
        };
        if state.projected_gradient_norm() <= self.config.gradient_tolerance {
            state.termination = Some(TerminationReason::GradientTolerance);
        }
        Ok(state)
    }

    /// One iteration: a damped solve and a trial evaluation. Does nothing once
    /// `state.termination` is set.
    pub fn next_iter<M: LeastSquaresModel + ?Sized>(
        &self,
        model: &M,
        state: &mut LmState,
    ) -> Result<(), FitError> {
        if state.termination.is_some() {
            return Ok(());
        }
        if state.iteration >= self.config.max_iterations {
            return Err(FitError::NoConvergence {
                iterations: state.iteration,
                cost: state.cost,
            });
        }
        if state.damping.is_nan() || state.damping >= 1e300 {
            return Err(FitError::Stalled {
                iteration: state.iteration,
                cost: state.cost,
                damping: state.damping,
            });
        }
        let n = state.log_params.len();
        let free: Vec<usize> = (0..n).filter(|&i| !state.pinned(i)).collect();
        state.iteration += 1;
        let iteration = state.iteration;
        let lambda = state.damping;

        // damped normal equations over the free variables
        let nf = free.len();
        let mut normal = DMatrix::zeros(nf, nf);
        let mut rhs = DVector::zeros(nf);
        for (a, &i) in free.iter().enumerate() {
            rhs[a] = -state.gradient[i];
            for (b, &j) in free.iter().enumerate() {
                normal[(a, b)] = state.jacobian.column(i).dot(&state.jacobian.column(j));
            }
            normal[(a, a)] += lambda * state.scaling[i];
        }
        let Some(chol) = normal.cholesky() else {
            self.reject(
                state,
                StepOutcome::RejectedSingular,
                f64::NAN,
                f64::NAN,
                vec![],
            );
            return Ok(());
        };
        let mut delta_free = chol.solve(&rhs);
        if let Some(alpha) = self.config.geodesic_acceleration {
            let mut velocity = DVector::zeros(n);
            for (a, &i) in free.iter().enumerate() {
                velocity[i] = delta_free[a];
            }
            let avv = match evaluate_second_directional(
                model,
                state.log_params.as_slice(),
                velocity.as_slice(),
                Some(&state.residuals),
            ) {
                Ok((avv, source)) => {
                    if source == DerivativeSource::FiniteDifferences {
                        state.residual_evaluations += 2;
                    }
                    avv
                }
                Err(ModelError::NonFinite { log_params, .. }) => {
                    self.reject(
                        state,
                        StepOutcome::RejectedNonFinite,
                        velocity.norm(),
                        f64::NAN,
                        log_params,
                    );
                    return Ok(());
                }
                Err(e) => return Err(model_error(iteration, e)),
            };
            let jt_avv = state.jacobian.tr_mul(&avv);
            let accel_rhs = DVector::from_iterator(nf, free.iter().map(|&i| -jt_avv[i]));
            let acceleration = chol.solve(&accel_rhs);
            if 2.0 * acceleration.norm() > alpha * delta_free.norm() {
                self.reject(
                    state,
                    StepOutcome::RejectedAcceleration,
                    delta_free.norm(),
                    f64::NAN,
                    vec![],
                );
                return Ok(());
            }
            delta_free += acceleration * 0.5;
        }
        let mut trial = state.log_params.clone();
        for (a, &i) in free.iter().enumerate() {
            trial[i] = (trial[i] + delta_free[a]).clamp(state.lower[i], state.upper[i]);
        }
        let delta = &trial - &state.log_params;
        let step_norm = delta.norm();
        let tol = self.config.step_tolerance;
        if step_norm <= tol * (state.log_params.norm() + tol) {
            if let Some(LmStep {
                outcome: StepOutcome::RejectedNonFinite,
                trial_log_params,
                ..
            }) = &state.last_step
            {
                // the minimum seems to lie where the model is not finite: say where
                let r = evaluate_residuals(model, trial_log_params);
                if let Err(e) = r {
                    return Err(model_error(iteration, e));
                }
            }
            state.termination = Some(TerminationReason::StepTolerance);
            return Ok(());
        }

        let trial_slice = trial.as_slice().to_vec();
        state.residual_evaluations += 1;
        let trial_residuals = match evaluate_residuals(model, &trial_slice) {
            Ok(r) => r,
            Err(ModelError::NonFinite { .. }) => {
                self.reject(
                    state,
                    StepOutcome::RejectedNonFinite,
                    step_norm,
                    f64::NAN,
                    trial_slice,
                );
                return Ok(());
            }
            Err(e) => return Err(model_error(iteration, e)),
        };
        let trial_cost = 0.5 * trial_residuals.norm_squared();
        // predicted reduction of the local quadratic model: −gᵀδ − ½‖Jδ‖²
        let predicted =
            -state.gradient.dot(&delta) - 0.5 * (&state.jacobian * &delta).norm_squared();
        let actual = state.cost - trial_cost;
        let gain_ratio = actual / predicted;
        if !(actual > 0.0 && predicted > 0.0) {
            self.reject(
                state,
                StepOutcome::RejectedNoDecrease,
                step_norm,
                gain_ratio,
                trial_slice,
            );
            return Ok(());
        }

        let small_reduction = actual <= self.config.cost_tolerance * state.cost
            && predicted <= self.config.cost_tolerance * state.cost;
        let (jacobian, source) =
            evaluate_jacobian(model, &trial_slice).map_err(|e| model_error(iteration, e))?;
        state.jacobian_evaluations += 1;
        state.log_params = trial;
        state.residuals = trial_residuals;
        state.cost = trial_cost;
        state.gradient = jacobian.tr_mul(&state.residuals);
        for (d, col) in state.scaling.iter_mut().zip(jacobian.column_iter()) {
            *d = d.max(col.norm_squared());
        }
        state.jacobian = jacobian;
        state.jacobian_source = source;
        state.accepted_steps += 1;
        // Nielsen's damping update (Madsen, Nielsen & Tingleff 2004, eq. 3.16)
        state.damping = lambda * (1.0 / 3.0_f64).max(1.0 - (2.0 * gain_ratio - 1.0).powi(3));
        state.damping_growth = 2.0;
        state.last_step = Some(LmStep {
            outcome: StepOutcome::Accepted,
            step_norm,
            gain_ratio,
            damping: lambda,
            trial_log_params: trial_slice,
        });
        if state.projected_gradient_norm() <= self.config.gradient_tolerance {
            state.termination = Some(TerminationReason::GradientTolerance);
        } else if small_reduction {
            state.termination = Some(TerminationReason::CostTolerance);
        }
        Ok(())
    }

    fn reject(
        &self,
        state: &mut LmState,
        outcome: StepOutcome,
        step_norm: f64,
        gain_ratio: f64,
        trial_log_params: Vec<f64>,
    ) {
        state.last_step = Some(LmStep {
            outcome,
            step_norm,
            gain_ratio,
            damping: state.damping,
            trial_log_params,
        });
        state.damping *= state.damping_growth;
        state.damping_growth *= 2.0;
    }

    /// Run to convergence, calling `observer` after the start and after every iteration.
    pub fn run<M: LeastSquaresModel + ?Sized>(
        &self,
        model: &M,
        start_log_params: &[f64],
        mut observer: impl FnMut(&LmState),
    ) -> Result<FitResult, FitError> {
        let mut state = self.init(model, start_log_params)?;
        observer(&state);
        while state.termination.is_none() {
            self.next_iter(model, &mut state)?;
            observer(&state);
        }
        Ok(self.result(model, &state))
    }

    /// The result of a converged state.
    ///
    /// # Panics
    /// When the state has not terminated (a caller bug).
    pub fn result<M: LeastSquaresModel + ?Sized>(&self, model: &M, state: &LmState) -> FitResult {
        let termination = state
            .termination
            .expect("LevenbergMarquardt::result called before termination");
        FitResult {
            parameter_names: model.parameter_names(),
            log_params: state.log_params.as_slice().to_vec(),
            params: state.log_params.iter().map(|x| x.exp()).collect(),
            cost: state.cost,
            iterations: state.iteration,
            accepted_steps: state.accepted_steps,
            residual_evaluations: state.residual_evaluations,
            jacobian_evaluations: state.jacobian_evaluations,
            termination,
            jacobian_source: state.jacobian_source,
            gradient_norm: state.projected_gradient_norm(),
        }
    }
}

/// Zero columns (parameters without effect) would leave the damped matrix singular; give them a
/// tiny positive scale relative to the largest.
fn scaling_floor(diag: Vec<f64>) -> DVector<f64> {
    let largest = diag.iter().cloned().fold(0.0, f64::max);
    let floor = (largest * 1e-12).max(f64::MIN_POSITIVE);
    DVector::from_iterator(diag.len(), diag.into_iter().map(|d| d.max(floor)))
}

/// Fit `model` from `start_log_params` with `config`, no observer.
pub fn fit<M: LeastSquaresModel + ?Sized>(
    model: &M,
    start_log_params: &[f64],
    config: &LmConfig,
) -> Result<FitResult, FitError> {
    LevenbergMarquardt::new(config.clone()).run(model, start_log_params, |_| {})
}

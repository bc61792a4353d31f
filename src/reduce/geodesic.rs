//! Geodesics of the model manifold in log-parameters, as an explicit stepper.
//!
//! Geodesic equation with the metric g = JᵀJ (Transtrum, Machta & Sethna, "Geometry of nonlinear
//! least squares with applications to sloppy models and optimization", Phys. Rev. E 83, 036701,
//! 2011): θ̈ = −(JᵀJ)⁻¹ Jᵀ A_vv with A_vv = Σ ∂²r/∂θi∂θj v_i v_j. We solve it as the minimum-norm
//! least-squares solution a = −J⁺ A_vv through the SVD of J with a relative cut-off, which equals
//! the formula when J has full rank and stays bounded when J is (nearly) rank deficient.
//!
//! The state (θ, v) is integrated in the arc-length-like parameter τ with the embedded
//! Dormand–Prince 5(4) pair (Dormand & Prince 1980; coefficients and step-size control from
//! Hairer, Nørsett & Wanner, "Solving Ordinary Differential Equations I", 2nd ed., Table 5.2 and
//! section II.4). With the default speed normalisation |J v| = 1 at the start, τ is arc length on
//! the model manifold in units of the weighted residuals, and |J v| stays 1 along an exact
//! geodesic (a built-in accuracy check kept in the path).

use nalgebra::{DMatrix, DVector};

use super::fisher::sorted_eigen;
use super::ReduceError;
use crate::fit::{
    evaluate_jacobian, evaluate_second_directional, ConfigError, DerivativeSource,
    LeastSquaresModel, ModelError,
};

/// How the initial velocity is scaled.
#[derive(Debug, Clone, Copy, PartialEq, Eq, serde::Serialize, serde::Deserialize)]
pub enum SpeedNormalisation {
    /// |J v| = 1: τ is arc length on the model manifold (the default)
    DataSpace,
    /// |v| = 1: τ starts as arc length in log-parameter space
    ParameterSpace,
}

/// Settings of the geodesic integrator and its stop conditions.
#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct GeodesicConfig {
    speed: SpeedNormalisation,
    relative_tolerance: f64,
    absolute_tolerance: f64,
    max_velocity_growth: f64,
    max_log_excursion: f64,
    eigenvalue_collapse: f64,
    max_arc_length: f64,
    max_steps: usize,
    pseudo_inverse_cutoff: f64,
}

impl Default for GeodesicConfig {
    fn default() -> Self {
        GeodesicConfig {
            speed: SpeedNormalisation::DataSpace,
            relative_tolerance: 1e-8,
            absolute_tolerance: 1e-10,
            max_velocity_growth: 100.0,
            max_log_excursion: 15.0,
            eigenvalue_collapse: 1e-8,
            max_arc_length: f64::INFINITY,
            max_steps: 20_000,
            pseudo_inverse_cutoff: 1e-12,
        }
    }
}

fn positive(setting: &'static str, value: f64) -> Result<f64, ConfigError> {
    if value > 0.0 && !value.is_nan() {
        Ok(value)
    } else {
        Err(ConfigError::Invalid {
            setting,
            value: value.to_string(),
            expected: "a number > 0",
        })
    }
}

impl GeodesicConfig {
    pub fn with_speed_normalisation(mut self, speed: SpeedNormalisation) -> Self {
        self.speed = speed;
        self
    }

    /// Error tolerances of the Runge–Kutta pair (both > 0).
    pub fn with_tolerances(mut self, relative: f64, absolute: f64) -> Result<Self, ConfigError> {
        self.relative_tolerance = positive("relative_tolerance", relative)?;
        self.absolute_tolerance = positive("absolute_tolerance", absolute)?;
        Ok(self)
    }

    /// Stop when |v| exceeds this multiple of its start value (> 1).
    pub fn with_max_velocity_growth(mut self, factor: f64) -> Result<Self, ConfigError> {
        if factor.is_nan() || factor <= 1.0 {
            return Err(ConfigError::Invalid {
                setting: "max_velocity_growth",
                value: factor.to_string(),
                expected: "a factor > 1",
            });
        }
        self.max_velocity_growth = factor;
        Ok(self)
    }

    /// Stop when any |θ_i − θ_i(0)| exceeds this (> 0; a factor e^this in the parameter).
    pub fn with_max_log_excursion(mut self, excursion: f64) -> Result<Self, ConfigError> {
        self.max_log_excursion = positive("max_log_excursion", excursion)?;
        Ok(self)
    }

    /// Stop when the smallest Fisher eigenvalue falls below this fraction of its start value
    /// (in (0, 1)).
    pub fn with_eigenvalue_collapse(mut self, ratio: f64) -> Result<Self, ConfigError> {
        if !(ratio > 0.0 && ratio < 1.0) {
            return Err(ConfigError::Invalid {
                setting: "eigenvalue_collapse",
                value: ratio.to_string(),
                expected: "a ratio in (0, 1)",
            });
        }
        self.eigenvalue_collapse = ratio;
        Ok(self)
    }

    /// Stop at this arc length τ (> 0; may be infinite). The last step lands on it exactly.
    pub fn with_max_arc_length(mut self, tau: f64) -> Result<Self, ConfigError> {
        self.max_arc_length = positive("max_arc_length", tau)?;
        Ok(self)
    }

    /// Upper limit on accepted steps (≥ 1).
    pub fn with_max_steps(mut self, steps: usize) -> Result<Self, ConfigError> {
        if steps == 0 {
            return Err(ConfigError::Invalid {
                setting: "max_steps",
                value: "0".into(),
                expected: "at least 1",
            });
        }
        self.max_steps = steps;
        Ok(self)
    }

    /// Singular values of J below this fraction of the largest are treated as zero in J⁺
    /// (in (0, 1)).
    pub fn with_pseudo_inverse_cutoff(mut self, cutoff: f64) -> Result<Self, ConfigError> {
        if !(cutoff > 0.0 && cutoff < 1.0) {
            return Err(ConfigError::Invalid {
                setting: "pseudo_inverse_cutoff",
                value: cutoff.to_string(),
                expected: "a fraction in (0, 1)",
            });
        }
        self.pseudo_inverse_cutoff = cutoff;
        Ok(self)
    }
}

/// Why a geodesic stopped.
#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
pub enum GeodesicStop {
    /// |v| grew by `factor` (≥ the configured limit): the metric degenerates ahead
    VelocityGrowth { factor: f64 },
    /// log-parameter `index` has moved by `delta` (beyond the configured excursion)
    ParameterExcursion { index: usize, delta: f64 },
    /// smallest Fisher eigenvalue fell to `ratio` × its start value
    EigenvalueCollapse { ratio: f64 },
    /// the step size underflowed (a singularity of the equation)
    StepSizeUnderflow { step_size: f64 },
    /// the configured maximum arc length was reached
    ArcLength,
    /// the configured maximum number of steps was reached
    MaxSteps,
}

impl GeodesicStop {
    /// Whether this stop indicates the edge of the model manifold.
    pub fn is_boundary(&self) -> bool {
        !matches!(self, GeodesicStop::ArcLength | GeodesicStop::MaxSteps)
    }
}

/// One recorded point of the path (for plots and reports).
#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct GeodesicPoint {
    /// τ
    pub arc_length: f64,
    pub log_params: Vec<f64>,
    pub velocity: Vec<f64>,
    /// |v| in log-parameters
    pub speed: f64,
    /// |J v|, the speed on the model manifold
    pub data_speed: f64,
    pub smallest_eigenvalue: f64,
}

/// Everything the integrator knows between steps.
#[derive(Debug, Clone)]
pub struct GeodesicState {
    /// accepted steps
    pub steps: usize,
    pub rejected_steps: usize,
    pub arc_length: f64,
    pub log_params: DVector<f64>,
    pub velocity: DVector<f64>,
    /// the step size the next attempt will use
    pub step_size: f64,
    pub jacobian: DMatrix<f64>,
    pub smallest_eigenvalue: f64,
    pub derivative_source: DerivativeSource,
    pub path: Vec<GeodesicPoint>,
    pub stop: Option<GeodesicStop>,
    start_log_params: DVector<f64>,
    initial_speed: f64,
    initial_smallest_eigenvalue: f64,
    /// d(θ, v)/dτ at the current point (first stage of the next step)
    derivative: DVector<f64>,
}

/// The finished geodesic.
#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct GeodesicResult {
    pub path: Vec<GeodesicPoint>,
    pub stop: GeodesicStop,
    pub arc_length: f64,
    pub steps: usize,
    pub rejected_steps: usize,
    /// exact or finite-difference J and A_vv
    pub derivative_source: DerivativeSource,
}

impl GeodesicResult {
    pub fn end(&self) -> &GeodesicPoint {
        self.path.last().expect("a geodesic path holds its start")
    }
    pub fn start(&self) -> &GeodesicPoint {
        &self.path[0]
    }
}

/// The geodesic acceleration a = −J⁺ A_vv at (θ, v), with J and the derivative source.
pub fn geodesic_acceleration<M: LeastSquaresModel + ?Sized>(
    model: &M,
    log_params: &[f64],
    velocity: &[f64],
    pseudo_inverse_cutoff: f64,
) -> Result<(DVector<f64>, DMatrix<f64>, DerivativeSource), ModelError> {
    let (jac, avv) = rayon::join(
        || evaluate_jacobian(model, log_params),
        || evaluate_second_directional(model, log_params, velocity, None),
    );
    let (jac, j_source) = jac?;
    let (avv, a_source) = avv?;
    let svd = jac.clone().svd(true, true);
    let largest = svd.singular_values.max();
    let cutoff = largest * pseudo_inverse_cutoff;
    let u = svd.u.as_ref().expect("SVD computed with U");
    let v_t = svd.v_t.as_ref().expect("SVD computed with Vᵀ");
    let mut coefficients = u.tr_mul(&avv);
    for (c, s) in coefficients.iter_mut().zip(svd.singular_values.iter()) {
        *c = if *s > cutoff && *s > 0.0 {
            -*c / s
        } else {
            0.0
        };
    }
    let acceleration = v_t.tr_mul(&coefficients);
    let source = if j_source == DerivativeSource::Exact && a_source == DerivativeSource::Exact {
        DerivativeSource::Exact
    } else {
        DerivativeSource::FiniteDifferences
    };
    Ok((acceleration, jac, source))
}

fn smallest_eigenvalue(jac: &DMatrix<f64>) -> f64 {
    sorted_eigen(&jac.tr_mul(jac)).0[0]
}

// Dormand–Prince 5(4) (Hairer, Nørsett & Wanner, Table 5.2); the geodesic equation does not
// depend on τ, so the nodes c_i are not needed
const A: [[f64; 6]; 7] = [
    [0.0; 6],
    [1.0 / 5.0, 0.0, 0.0, 0.0, 0.0, 0.0],
    [3.0 / 40.0, 9.0 / 40.0, 0.0, 0.0, 0.0, 0.0],
    [44.0 / 45.0, -56.0 / 15.0, 32.0 / 9.0, 0.0, 0.0, 0.0],
    [
        19372.0 / 6561.0,
        -25360.0 / 2187.0,
        64448.0 / 6561.0,
        -212.0 / 729.0,
        0.0,
        0.0,
    ],
    [
        9017.0 / 3168.0,
        -355.0 / 33.0,
        46732.0 / 5247.0,
        49.0 / 176.0,
        -5103.0 / 18656.0,
        0.0,
    ],
    [
        35.0 / 384.0,
        0.0,
        500.0 / 1113.0,
        125.0 / 192.0,
        -2187.0 / 6784.0,
        11.0 / 84.0,
    ],
];
/// b − b̂: fifth-order minus embedded fourth-order weights
const E: [f64; 7] = [
    71.0 / 57600.0,
    0.0,
    -71.0 / 16695.0,
    71.0 / 1920.0,
    -17253.0 / 339200.0,
    22.0 / 525.0,
    -1.0 / 40.0,
];

/// The geodesic integrator.
#[derive(Debug, Clone, Default)]
pub struct Geodesic {
    pub config: GeodesicConfig,
}

impl Geodesic {
    pub fn new(config: GeodesicConfig) -> Self {
        Geodesic { config }
    }

    fn derivative<M: LeastSquaresModel + ?Sized>(
        &self,
        model: &M,
        y: &DVector<f64>,
    ) -> Result<(DVector<f64>, DMatrix<f64>, DerivativeSource), ModelError> {
        let n = y.len() / 2;
        let (acc, jac, source) = geodesic_acceleration(
            model,
            &y.as_slice()[..n],
            &y.as_slice()[n..],
            self.config.pseudo_inverse_cutoff,
        )?;
        let mut dy = DVector::zeros(2 * n);
        dy.rows_mut(0, n).copy_from(&y.rows(n, n));
        dy.rows_mut(n, n).copy_from(&acc);
        Ok((dy, jac, source))
    }

    /// Start at θ₀ along `direction` (any length; it is rescaled to the configured speed).
    pub fn init<M: LeastSquaresModel + ?Sized>(
        &self,
        model: &M,
        start_log_params: &[f64],
        direction: &[f64],
    ) -> Result<GeodesicState, ReduceError> {
        let n = model.parameter_count();
        assert_eq!(start_log_params.len(), n, "start length");
        assert_eq!(direction.len(), n, "direction length");
        let model_error = |source| ReduceError::Model {
            stage: "geodesic start",
            source,
        };
        let (jac, _) = evaluate_jacobian(model, start_log_params).map_err(model_error)?;
        let dir = DVector::from_column_slice(direction);
        let norm = match self.config.speed {
            SpeedNormalisation::DataSpace => (&jac * &dir).norm(),
            SpeedNormalisation::ParameterSpace => dir.norm(),
        };
        if !(norm > 0.0 && norm.is_finite()) {
            return Err(ReduceError::DegenerateFisher {
                log_params: start_log_params.to_vec(),
                eigenvalues: sorted_eigen(&jac.tr_mul(&jac)).0.as_slice().to_vec(),
            });
        }
        let velocity = dir / norm;
        let mut y = DVector::zeros(2 * n);
        y.rows_mut(0, n).copy_from_slice(start_log_params);
        y.rows_mut(n, n).copy_from(&velocity);
        let (derivative, jacobian, source) = self.derivative(model, &y).map_err(model_error)?;
        let lambda_min = smallest_eigenvalue(&jacobian);
        let speed = velocity.norm();
        let first = GeodesicPoint {
            arc_length: 0.0,
            log_params: start_log_params.to_vec(),
            velocity: velocity.as_slice().to_vec(),
            speed,
            data_speed: (&jacobian * &velocity).norm(),
            smallest_eigenvalue: lambda_min,
        };
        // a first step moving θ by about 1 % of a unit in log-parameters
        let step_size = (0.01 / speed).min(self.config.max_arc_length);
        Ok(GeodesicState {
            steps: 0,
            rejected_steps: 0,
            arc_length: 0.0,
            log_params: DVector::from_column_slice(start_log_params),
            velocity,
            step_size,
            jacobian,
            smallest_eigenvalue: lambda_min,
            derivative_source: source,
            path: vec![first],
            stop: None,
            start_log_params: DVector::from_column_slice(start_log_params),
            initial_speed: speed,
            initial_smallest_eigenvalue: lambda_min,
            derivative,
        })
    }

    /// One attempted Runge–Kutta step (accepted or rejected). Does nothing once `state.stop`
    /// is set.
    pub fn next_iter<M: LeastSquaresModel + ?Sized>(
        &self,
        model: &M,
        state: &mut GeodesicState,
    ) -> Result<(), ReduceError> {
        if state.stop.is_some() {
            return Ok(());
        }
        let n = state.log_params.len();
        let min_step = 1e-14 * (1.0 + state.arc_length);
        let h = state
            .step_size
            .min(self.config.max_arc_length - state.arc_length);
        if h < min_step {
            state.stop = Some(GeodesicStop::StepSizeUnderflow { step_size: h });
            return Ok(());
        }
        let mut y = DVector::zeros(2 * n);
        y.rows_mut(0, n).copy_from(&state.log_params);
        y.rows_mut(n, n).copy_from(&state.velocity);

        let mut k: Vec<DVector<f64>> = Vec::with_capacity(7);
        k.push(state.derivative.clone());
        let mut last_jacobian = None;
        for (stage, row) in A.iter().enumerate().skip(1) {
            let mut y_stage = y.clone();
            for (kj, &a) in k.iter().zip(row).take(stage) {
                if a != 0.0 {
                    y_stage.axpy(h * a, kj, 1.0);
                }
            }
            match self.derivative(model, &y_stage) {
                Ok((dy, jac, source)) => {
                    k.push(dy);
                    if stage == 6 {
                        last_jacobian = Some((jac, source));
                    }
                }
                // the stage left the region where the model is finite: shrink the step
                Err(ModelError::NonFinite { .. }) => {
                    state.rejected_steps += 1;
                    state.step_size = h * 0.25;
                    return Ok(());
                }
                Err(source) => {
                    return Err(ReduceError::Model {
                        stage: "geodesic step",
                        source,
                    })
                }
            }
        }
        // the last stage (row 7 of the tableau = the 5th-order weights) sits at the new point:
        // its derivative starts the next step (first same as last)
        let mut y_new = y.clone();
        for (j, kj) in k.iter().enumerate().take(6) {
            if A[6][j] != 0.0 {
                y_new.axpy(h * A[6][j], kj, 1.0);
            }
        }
        let (jacobian_new, source) = last_jacobian.expect("seven stages evaluated");
        let mut error = DVector::zeros(2 * n);
        for (j, kj) in k.iter().enumerate() {
            if E[j] != 0.0 {
                error.axpy(h * E[j], kj, 1.0);
            }
        }
        // Hairer, Nørsett & Wanner eq. (4.11)
        let err = (error
            .iter()
            .zip(y.iter().zip(y_new.iter()))
            .map(|(e, (a, b))| {
                let scale = self.config.absolute_tolerance
                    + self.config.relative_tolerance * a.abs().max(b.abs());
                (e / scale).powi(2)
            })
            .sum::<f64>()
            / (2 * n) as f64)
            .sqrt();
        if !err.is_finite() {
            state.rejected_steps += 1;
            state.step_size = h * 0.25;
            return Ok(());
        }
        // step-size controller, Hairer, Nørsett & Wanner eq. (4.13) with fac = 0.9
        let factor = if err > 0.0 { 0.9 * err.powf(-0.2) } else { 5.0 };
        if err > 1.0 {
            state.rejected_steps += 1;
            state.step_size = h * factor.clamp(0.2, 1.0);
            return Ok(());
        }
        state.steps += 1;
        state.arc_length += h;
        state.log_params = y_new.rows(0, n).into_owned();
        state.velocity = y_new.rows(n, n).into_owned();
        state.derivative = k.pop().expect("seven stages");
        state.smallest_eigenvalue = smallest_eigenvalue(&jacobian_new);
        state.derivative_source = source;
        state.step_size = h * factor.clamp(0.2, 5.0);
        let speed = state.velocity.norm();
        state.path.push(GeodesicPoint {
            arc_length: state.arc_length,
            log_params: state.log_params.as_slice().to_vec(),
            velocity: state.velocity.as_slice().to_vec(),
            speed,
            data_speed: (&jacobian_new * &state.velocity).norm(),
            smallest_eigenvalue: state.smallest_eigenvalue,
        });
        state.jacobian = jacobian_new;
        state.stop = self.check_stop(state);
        Ok(())
    }

    fn check_stop(&self, state: &GeodesicState) -> Option<GeodesicStop> {
        let growth = state.velocity.norm() / state.initial_speed;
        if growth >= self.config.max_velocity_growth {
            return Some(GeodesicStop::VelocityGrowth { factor: growth });
        }
        let excursion = &state.log_params - &state.start_log_params;
        let index = excursion.iamax();
        if excursion[index].abs() >= self.config.max_log_excursion {
            return Some(GeodesicStop::ParameterExcursion {
                index,
                delta: excursion[index],
            });
        }
        let ratio = state.smallest_eigenvalue / state.initial_smallest_eigenvalue;
        if ratio <= self.config.eigenvalue_collapse {
            return Some(GeodesicStop::EigenvalueCollapse { ratio });
        }
        if state.arc_length >= self.config.max_arc_length {
            return Some(GeodesicStop::ArcLength);
        }
        if state.steps >= self.config.max_steps {
            return Some(GeodesicStop::MaxSteps);
        }
        None
    }

    /// Integrate from θ₀ along `direction` until a stop condition, calling `observer` after the
    /// start and after every attempted step.
    pub fn run<M: LeastSquaresModel + ?Sized>(
        &self,
        model: &M,
        start_log_params: &[f64],
        direction: &[f64],
        mut observer: impl FnMut(&GeodesicState),
    ) -> Result<GeodesicResult, ReduceError> {
        let mut state = self.init(model, start_log_params, direction)?;
        observer(&state);
        while state.stop.is_none() {
            self.next_iter(model, &mut state)?;
            observer(&state);
        }
        Ok(GeodesicResult {
            stop: state.stop.expect("loop ends on a stop"),
            arc_length: state.arc_length,
            steps: state.steps,
            rejected_steps: state.rejected_steps,
            derivative_source: state.derivative_source,
            path: state.path,
        })
    }
}

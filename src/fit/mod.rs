//! Least-squares fitting in log-parameters.
//!
//! Every model the tool fits is seen through one small capability trait,
//! [`LeastSquaresModel`]: it maps log-parameters θ = ln(p) of positive physical parameters p to a
//! vector of weighted residuals r(θ) (prediction − data, already divided by the noise scale).
//! The fitter ([`LevenbergMarquardt`]) and the reduction (`crate::reduce`) only ever talk to that
//! trait, so a block-model template, a hand-written test model, or a reduced model all plug in
//! the same way.
//!
//! The cost is ½‖r‖² throughout (the convention of `scipy.optimize.least_squares`).

#![deny(clippy::float_cmp)]

mod lm;
mod model;

pub use lm::{
    fit, FitError, FitResult, LevenbergMarquardt, LmConfig, LmState, LmStep, StepOutcome,
    TerminationReason,
};
pub use model::{
    central_difference_jacobian, evaluate_jacobian, evaluate_residuals,
    evaluate_second_directional, finite_difference_second_directional, DerivativeSource,
    LeastSquaresModel, ModelError,
};

/// A setting outside its allowed range; names the setting and what was expected.
#[derive(Debug, Clone, PartialEq, Eq, thiserror::Error)]
pub enum ConfigError {
    #[error("setting `{setting}` = {value}: expected {expected}")]
    Invalid {
        setting: &'static str,
        value: String,
        expected: &'static str,
    },
}

//! Model reduction by the manifold boundary approximation method (MBAM).
//!
//! Transtrum & Qiu, "Model reduction by manifold boundaries", Phys. Rev. Lett. 113, 098701 (2014):
//! at the fitted point, take the least-sensitive direction of the Fisher information, follow the
//! geodesic of the model manifold along it until the manifold's edge, read which limit of the
//! parameters that edge is, let the model take that limit (one parameter fewer), refit.
//!
//! Everything here works in log-parameters θ = ln(p) (see [`crate::fit`]) and only talks to
//! [`crate::fit::LeastSquaresModel`]; the model supplies the reduction itself ([`Reducer`]).

#![deny(clippy::float_cmp)]

mod boundary;
mod fisher;
mod geodesic;
mod mbam;
pub mod reduction;

pub use boundary::{read_boundary, BoundaryConfig, BoundaryLimit, BoundaryReading, LimitDirection};
pub use fisher::FisherInformation;
pub use geodesic::{
    geodesic_acceleration, Geodesic, GeodesicConfig, GeodesicPoint, GeodesicResult, GeodesicState,
    GeodesicStop, SpeedNormalisation,
};
pub use mbam::{
    check_fisher, mbam_boundary, mbam_boundary_from, mbam_geodesics, mbam_step, MbamBoundary,
    MbamConfig, MbamRecord, ReducedModel, Reducer,
};
pub use reduction::{
    read_reduced, reduce_template, split_traces, write_reduced, ReducedFile, ReductionConfig,
    ReductionError, ReductionEvent, ReductionOutcome, ReductionStep, StopReason, REDUCED_FORMAT,
};

use crate::fit::{ConfigError, FitError, ModelError};

/// Why a reduction step failed.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum ReduceError {
    #[error("setting: {0}")]
    Config(#[from] ConfigError),
    #[error("model failed during the {stage}: {source}")]
    Model {
        stage: &'static str,
        #[source]
        source: ModelError,
    },
    #[error(
        "the Fisher information at log-parameters {log_params:?} has no usable least-sensitive \
         direction (eigenvalues {eigenvalues:?})"
    )]
    DegenerateFisher {
        log_params: Vec<f64>,
        eigenvalues: Vec<f64>,
    },
    #[error(
        "no geodesic reached a manifold boundary (arc lengths {arc_lengths:?}, stops {stops:?})"
    )]
    NoBoundary {
        arc_lengths: Vec<f64>,
        stops: Vec<String>,
    },
    #[error("geodesic step size fell below {min_step} at arc length {arc_length}")]
    StepSizeUnderflow { arc_length: f64, min_step: f64 },
    #[error("the reduced model refused the limit `{limit}`: {source}")]
    Reduction {
        limit: String,
        #[source]
        source: ModelError,
    },
    #[error("refit of the reduced model failed: {0}")]
    Refit(#[source] FitError),
}

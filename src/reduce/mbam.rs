//! One MBAM step: geodesics both ways, read the boundary, let the model reduce itself, refit.

use super::boundary::{read_boundary, BoundaryConfig, BoundaryReading};
use super::fisher::FisherInformation;
use super::geodesic::{Geodesic, GeodesicConfig, GeodesicResult};
use super::ReduceError;
use crate::fit::{evaluate_residuals, fit, FitResult, LeastSquaresModel, LmConfig, ModelError};

/// A reduced model handed back by a [`Reducer`], with where its refit starts.
pub struct ReducedModel {
    pub model: Box<dyn LeastSquaresModel + Send>,
    /// start of the refit, usually the geodesic end point with the limit applied
    pub start_log_params: Vec<f64>,
    /// what was done, for the reduction log
    pub description: String,
}

impl std::fmt::Debug for ReducedModel {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("ReducedModel")
            .field("parameters", &self.model.parameter_names())
            .field("start_log_params", &self.start_log_params)
            .field("description", &self.description)
            .finish()
    }
}

/// The model-level hook: apply a boundary limit, return the reduced model (one parameter fewer,
/// typically). Return `ModelError::Unsupported` for limits the model cannot take; `mbam_step`
/// then tries the other direction. Any `Fn(&BoundaryReading) -> Result<ReducedModel, ModelError>`
/// is a reducer.
pub trait Reducer: Sync {
    fn reduce(&self, reading: &BoundaryReading) -> Result<ReducedModel, ModelError>;
}

impl<F> Reducer for F
where
    F: Fn(&BoundaryReading) -> Result<ReducedModel, ModelError> + Sync,
{
    fn reduce(&self, reading: &BoundaryReading) -> Result<ReducedModel, ModelError> {
        self(reading)
    }
}

/// Settings of one MBAM step (each part already checked by its own setters).
#[derive(Debug, Clone, Default, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct MbamConfig {
    pub geodesic: GeodesicConfig,
    pub boundary: BoundaryConfig,
    pub refit: LmConfig,
}

/// The record of one MBAM step, for the reduction log.
#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct MbamRecord {
    /// Fisher information at the fitted point (eigenvalues kept for reports)
    pub fisher: FisherInformation,
    /// geodesic along +e_min and along −e_min (e_min with its largest component positive)
    pub geodesics: [GeodesicResult; 2],
    /// which of `geodesics` was used (0: +, 1: −)
    pub chosen: usize,
    pub reading: BoundaryReading,
    pub reduction: String,
    pub names_before: Vec<String>,
    pub log_params_before: Vec<f64>,
    pub cost_before: f64,
    pub names_after: Vec<String>,
    pub log_params_after: Vec<f64>,
    pub cost_after: f64,
    pub refit: FitResult,
}

/// The boundary part of one MBAM step, before the refit: where the geodesics went, which one
/// was used, the limit read off it and the reduced model (its refit start included).
#[derive(Debug)]
pub struct MbamBoundary {
    pub fisher: FisherInformation,
    /// which eigen-direction the geodesics followed: 0 the least sensitive, 1 the next, ...
    pub direction_rank: usize,
    pub geodesics: [GeodesicResult; 2],
    pub chosen: usize,
    pub reading: BoundaryReading,
    pub reduced: ReducedModel,
    /// limits the reducer refused before the one taken (sentence, reason)
    pub refused: Vec<(String, String)>,
}

/// Steps 1–3 of [`mbam_step`] (no refit), for callers that refit in their own way.
pub fn mbam_boundary<M: LeastSquaresModel + ?Sized>(
    model: &M,
    fitted_log_params: &[f64],
    reducer: &dyn Reducer,
    config: &MbamConfig,
) -> Result<MbamBoundary, ReduceError> {
    let fisher = FisherInformation::at(model, fitted_log_params)?;
    check_fisher(&fisher)?;
    let geodesics = mbam_geodesics(model, &fisher, 0, config)?;
    mbam_boundary_from(model, fisher, 0, geodesics, reducer, config)
}

/// A Fisher information whose eigen-directions can be followed (all eigenvalues finite).
pub fn check_fisher(fisher: &FisherInformation) -> Result<(), ReduceError> {
    if fisher.eigenvalues.iter().all(|e| e.is_finite()) {
        Ok(())
    } else {
        Err(ReduceError::DegenerateFisher {
            log_params: fisher.log_params.clone(),
            eigenvalues: fisher.eigenvalues.clone(),
        })
    }
}

/// Geodesics from `fisher.log_params` along +e and −e (in parallel), e the `rank`-th
/// least-sensitive eigenvector of the Fisher information (0: the sloppiest direction; the next
/// ones are tried when the sloppiest leads to a limit the model cannot take).
///
/// # Panics
/// When `rank` is not below the number of parameters.
pub fn mbam_geodesics<M: LeastSquaresModel + ?Sized>(
    model: &M,
    fisher: &FisherInformation,
    rank: usize,
    config: &MbamConfig,
) -> Result<[GeodesicResult; 2], ReduceError> {
    assert!(rank < fisher.eigenvectors.len(), "direction rank {rank}");
    let integrator = Geodesic::new(config.geodesic.clone());
    let plus: Vec<f64> = fisher.eigenvectors[rank].clone();
    let minus: Vec<f64> = plus.iter().map(|x| -x).collect();
    let start = &fisher.log_params;
    let (forward, backward) = rayon::join(
        || integrator.run(model, start, &plus, |_| {}),
        || integrator.run(model, start, &minus, |_| {}),
    );
    Ok([forward?, backward?])
}

/// Step 3 of [`mbam_step`] on given geodesics: among those that reached a boundary, nearest
/// first, read the limit and ask `reducer` for the reduced model.
pub fn mbam_boundary_from<M: LeastSquaresModel + ?Sized>(
    model: &M,
    fisher: FisherInformation,
    direction_rank: usize,
    geodesics: [GeodesicResult; 2],
    reducer: &dyn Reducer,
    config: &MbamConfig,
) -> Result<MbamBoundary, ReduceError> {
    let names = model.parameter_names();
    let mut candidates: Vec<usize> = (0..2)
        .filter(|&k| geodesics[k].stop.is_boundary())
        .collect();
    if candidates.is_empty() {
        return Err(ReduceError::NoBoundary {
            arc_lengths: geodesics.iter().map(|g| g.arc_length).collect(),
            stops: geodesics.iter().map(|g| format!("{:?}", g.stop)).collect(),
        });
    }
    candidates.sort_by(|&a, &b| geodesics[a].arc_length.total_cmp(&geodesics[b].arc_length));
    let mut first_refusal = None;
    let mut refused = Vec::new();
    for chosen in candidates {
        let reading = read_boundary(&names, &geodesics[chosen], &config.boundary)?;
        match reducer.reduce(&reading) {
            Ok(reduced) => {
                return Ok(MbamBoundary {
                    fisher,
                    direction_rank,
                    geodesics,
                    chosen,
                    reading,
                    reduced,
                    refused,
                })
            }
            Err(source) => {
                refused.push((reading.sentence.clone(), source.to_string()));
                first_refusal.get_or_insert(ReduceError::Reduction {
                    limit: reading.sentence.clone(),
                    source,
                });
            }
        }
    }
    Err(first_refusal.expect("every candidate was refused"))
}

/// One MBAM step from a fitted point (Transtrum & Qiu 2014):
/// 1. Fisher information at `fitted_log_params`, least-sensitive eigenvector e_min;
/// 2. geodesics along ±e_min (in parallel) until their stop conditions;
/// 3. among those that reached a boundary, nearest first (shortest arc length: the limit that
///    changes the predictions least), read the limit and ask `reducer` for the reduced model;
///    a direction the reducer refuses is skipped;
/// 4. refit the reduced model from its suggested start.
pub fn mbam_step<M: LeastSquaresModel + ?Sized>(
    model: &M,
    fitted_log_params: &[f64],
    reducer: &dyn Reducer,
    config: &MbamConfig,
) -> Result<(MbamRecord, ReducedModel), ReduceError> {
    let names = model.parameter_names();
    let cost_before = 0.5
        * evaluate_residuals(model, fitted_log_params)
            .map_err(|source| ReduceError::Model {
                stage: "cost at the fitted point",
                source,
            })?
            .norm_squared();
    let MbamBoundary {
        fisher,
        geodesics,
        chosen,
        reading,
        reduced,
        ..
    } = mbam_boundary(model, fitted_log_params, reducer, config)?;
    let refit = fit(
        reduced.model.as_ref(),
        &reduced.start_log_params,
        &config.refit,
    )
    .map_err(ReduceError::Refit)?;
    let record = MbamRecord {
        fisher,
        geodesics,
        chosen,
        reduction: reduced.description.clone(),
        names_before: names,
        log_params_before: fitted_log_params.to_vec(),
        cost_before,
        names_after: refit.parameter_names.clone(),
        log_params_after: refit.log_params.clone(),
        cost_after: refit.cost,
        refit,
        reading,
    };
    Ok((record, reduced))
}

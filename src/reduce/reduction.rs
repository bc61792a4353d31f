//! The reduction loop of a grey-box template: fit the full template, then repeat MBAM steps
//! (Transtrum & Qiu, Phys. Rev. Lett. 113, 098701, 2014) with a refit and a held-out check after
//! each, until the next reduction would cost more held-out accuracy than the user allows, a
//! parameter floor is reached, or no manifold boundary is found. The result is written as
//! `understudy-reduced/1` JSON (the reduced template with fitted values, the full template, the
//! reduction log, the split, the errors) plus a plain-text log beside it.
//!
//! This is the one place in `reduce` that knows templates (`crate::greybox`); the MBAM pieces
//! stay model-agnostic. Errors are NRMSE of the pooled traces (RMS of model − data divided by
//! the data's range, per signal); all signals per unit on the unit rating.

use super::mbam::{
    check_fisher, mbam_boundary_from, mbam_geodesics, MbamConfig, ReducedModel, Reducer,
};
use super::{
    BoundaryLimit, BoundaryReading, FisherInformation, GeodesicConfig, LimitDirection, ReduceError,
    SpeedNormalisation,
};
use crate::fit::{ConfigError, LeastSquaresModel, LevenbergMarquardt, LmConfig, ModelError};
use crate::greybox::{FitTrace, SignalWeights, TemplateFit, TemplateReducer};
use crate::validate::plot::{line_chart, log_spectrum, Series};
use serde::{Deserialize, Serialize};
use std::fmt::Write as _;
use std::path::{Path, PathBuf};
use std::sync::Mutex;
use thiserror::Error;
use understudy_runtime::block::{EvalConfig, Reduction, Template};

/// The `format` field of a reduced-model file.
pub const REDUCED_FORMAT: &str = "understudy-reduced/1";

/// Why the reduction could not run at all (a stop of the loop is not an error: see
/// [`StopReason`]).
#[derive(Debug, Error)]
pub enum ReductionError {
    #[error("setting: {0}")]
    Config(#[from] ConfigError),
    #[error("template `{template}`: {message}")]
    Template { template: String, message: String },
    #[error("no {which} traces (need at least one training and one held-out trace)")]
    NoTraces { which: &'static str },
    #[error("trace `{trace}`: {message}")]
    BadTrace { trace: String, message: String },
    #[error("fit of the full template failed: {0}")]
    FullFit(String),
    #[error("{path}: {message}")]
    File { path: PathBuf, message: String },
}

impl ReductionError {
    /// Whether the error lies in what the user gave (template, traces, settings, a file to
    /// read) rather than in the work.
    pub fn is_bad_input(&self) -> bool {
        !matches!(self, ReductionError::FullFit(_))
    }
}

/// Settings of the reduction loop; each `with_*` setter checks its value and names the setting.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ReductionConfig {
    held_out_factor: f64,
    held_out_margin: f64,
    min_parameters: usize,
    max_steps: usize,
    attempts_per_step: usize,
    decimation: usize,
    geodesic_traces: usize,
    full_fit_iterations: usize,
    refit_iterations: usize,
    final_full_rate_refit: bool,
    mbam: MbamConfig,
    lm: LmConfig,
}

impl Default for ReductionConfig {
    /// Defaults (our choices, measured on the demo plant, not from the literature):
    /// - a reduction is kept while the held-out (and training) NRMSE of P and of Q each stay
    ///   within 1.5 × the full template's + 0.005 (half a percent of the data range): a reduced model
    ///   may lose half again of the full template's accuracy, and a tiny absolute slack keeps a
    ///   near-perfect full fit from forbidding every reduction;
    /// - floor of 1 parameter, at most 12 reductions;
    /// - every 2nd sample kept while reducing (the demo traces are sampled at 1 ms; the
    ///   template's fastest kept dynamics are the ~10 ms filters), then one refit of the reduced
    ///   and of the full template at the full sample rate (same budget, fair comparison);
    /// - 40 Levenberg–Marquardt iterations for the full fit, 25 for each refit (the residuals are
    ///   piecewise smooth because switches act on samples, so a budget and the best point are
    ///   used rather than tight tolerances);
    /// - geodesics in parameter-space speed (the data-space start speed of a template's sloppiest
    ///   direction can underflow), relative tolerance 1e-5, stop at 30× velocity growth or a
    ///   log-excursion of 8 (a factor e⁸ ≈ 3000 in the parameter), at most 300 steps.
    fn default() -> Self {
        let geodesic = GeodesicConfig::default()
            .with_speed_normalisation(SpeedNormalisation::ParameterSpace)
            .with_tolerances(1e-5, 1e-8)
            .and_then(|g| g.with_max_velocity_growth(30.0))
            .and_then(|g| g.with_max_log_excursion(8.0))
            .and_then(|g| g.with_max_steps(300))
            .expect("valid built-in geodesic settings");
        let lm = LmConfig::default()
            .with_tolerances(1e-6, 1e-8, 1e-8)
            .expect("valid built-in tolerances");
        Self {
            held_out_factor: 1.5,
            held_out_margin: 0.005,
            min_parameters: 1,
            max_steps: 12,
            attempts_per_step: 3,
            decimation: 2,
            geodesic_traces: 6,
            full_fit_iterations: 40,
            refit_iterations: 25,
            final_full_rate_refit: true,
            mbam: MbamConfig {
                geodesic,
                refit: lm.clone(),
                ..MbamConfig::default()
            },
            lm,
        }
    }
}

fn invalid(setting: &'static str, value: impl ToString, expected: &'static str) -> ConfigError {
    ConfigError::Invalid {
        setting,
        value: value.to_string(),
        expected,
    }
}

impl ReductionConfig {
    /// Tolerance: a reduction is kept while, for P and for Q, on the held-out and on the
    /// training traces, NRMSE(reduced) ≤ `factor` · NRMSE(full) + `margin`.
    /// `factor` ≥ 1, `margin` ≥ 0 (a fraction of the data range, e.g. 0.005).
    pub fn with_tolerance(mut self, factor: f64, margin: f64) -> Result<Self, ConfigError> {
        if !(factor.is_finite() && factor >= 1.0) {
            return Err(invalid("tolerance", factor, "a factor ≥ 1, e.g. 1.5"));
        }
        if !(margin.is_finite() && margin >= 0.0) {
            return Err(invalid(
                "tolerance_margin",
                margin,
                "a margin ≥ 0, e.g. 0.005",
            ));
        }
        self.held_out_factor = factor;
        self.held_out_margin = margin;
        Ok(self)
    }

    /// Stop when the model has this many free parameters (≥ 1).
    pub fn with_min_parameters(mut self, n: usize) -> Result<Self, ConfigError> {
        if n == 0 {
            return Err(invalid("min_parameters", n, "at least 1"));
        }
        self.min_parameters = n;
        Ok(self)
    }

    /// At most this many reductions (≥ 1).
    pub fn with_max_steps(mut self, n: usize) -> Result<Self, ConfigError> {
        if n == 0 {
            return Err(invalid("max_steps", n, "at least 1"));
        }
        self.max_steps = n;
        Ok(self)
    }

    /// How many eigen-directions of the Fisher information one step may follow (≥ 1), the
    /// sloppiest first. Along each, every limit read at either end of its geodesics (a coupled
    /// limit whole, then each part) is applied, refitted and judged in turn; when none is
    /// declared by the template or none stays within the tolerance, the geodesics along the
    /// next-sloppiest direction are run.
    pub fn with_attempts_per_step(mut self, n: usize) -> Result<Self, ConfigError> {
        if n == 0 {
            return Err(invalid("attempts_per_step", n, "at least 1"));
        }
        self.attempts_per_step = n;
        Ok(self)
    }

    /// Keep every `k`-th sample while reducing (≥ 1; 1 keeps all).
    pub fn with_decimation(mut self, k: usize) -> Result<Self, ConfigError> {
        if k == 0 {
            return Err(invalid(
                "decimation",
                k,
                "at least 1 (keep every k-th sample)",
            ));
        }
        self.decimation = k;
        Ok(self)
    }

    /// How many training traces (spread evenly over the name-sorted set) the Fisher information
    /// and the geodesics use (≥ 1). The geodesic only has to find the direction in which the
    /// model is sloppy and the boundary it runs into — a property of the model structure that a
    /// few varied faults show as well as many — while every refit and every tolerance check still
    /// uses all training and held-out traces. Each geodesic step costs a Jacobian and a second
    /// directional derivative over these traces, so this is the loop's main speed lever.
    pub fn with_geodesic_traces(mut self, n: usize) -> Result<Self, ConfigError> {
        if n == 0 {
            return Err(invalid("geodesic_traces", n, "at least 1"));
        }
        self.geodesic_traces = n;
        Ok(self)
    }

    pub fn geodesic_traces(&self) -> usize {
        self.geodesic_traces
    }

    /// Iteration budgets of the full fit and of each refit (each ≥ 1).
    pub fn with_iterations(mut self, full_fit: usize, refit: usize) -> Result<Self, ConfigError> {
        if full_fit == 0 {
            return Err(invalid("full_fit_iterations", full_fit, "at least 1"));
        }
        if refit == 0 {
            return Err(invalid("refit_iterations", refit, "at least 1"));
        }
        self.full_fit_iterations = full_fit;
        self.refit_iterations = refit;
        Ok(self)
    }

    /// Refit the reduced and the full template once more at the full sample rate (when
    /// decimating); otherwise the file's errors are those of the decimated-rate fits.
    pub fn with_final_full_rate_refit(mut self, on: bool) -> Self {
        self.final_full_rate_refit = on;
        self
    }

    /// Geodesic and boundary settings of each MBAM step (its `refit` is not used: refits run on
    /// the iteration budget with [`Self::with_lm`]'s tolerances).
    pub fn with_mbam(mut self, mbam: MbamConfig) -> Self {
        self.mbam = mbam;
        self
    }

    /// Levenberg–Marquardt tolerances (the iteration budget comes from `with_iterations`).
    pub fn with_lm(mut self, lm: LmConfig) -> Self {
        self.lm = lm;
        self
    }

    pub fn tolerance(&self) -> (f64, f64) {
        (self.held_out_factor, self.held_out_margin)
    }
    pub fn min_parameters(&self) -> usize {
        self.min_parameters
    }
    pub fn max_steps(&self) -> usize {
        self.max_steps
    }
    pub fn decimation(&self) -> usize {
        self.decimation
    }

    /// Whether the errors `reduced` stay within the tolerance of `full`: P and Q, on the
    /// held-out traces and also on the training traces (with few held-out cases, a reduction
    /// that ruins the fit could otherwise pass on cases that barely excite the removed part).
    pub fn within_tolerance(&self, full: &ErrorPair, reduced: &ErrorPair) -> bool {
        let ok = |f: f64, r: f64| r <= self.held_out_factor * f + self.held_out_margin;
        let both = |f: &SignalErrors, r: &SignalErrors| ok(f.p, r.p) && ok(f.q, r.q);
        both(&full.held_out, &reduced.held_out) && both(&full.training, &reduced.training)
    }
}

/// NRMSE per output signal (fraction of the data range, pooled over traces).
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct SignalErrors {
    pub i_re: f64,
    pub i_im: f64,
    pub p: f64,
    pub q: f64,
}

impl From<[f64; 4]> for SignalErrors {
    fn from(e: [f64; 4]) -> Self {
        Self {
            i_re: e[0],
            i_im: e[1],
            p: e[2],
            q: e[3],
        }
    }
}

/// Training and held-out errors of one model.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct ErrorPair {
    pub training: SignalErrors,
    pub held_out: SignalErrors,
}

/// One MBAM step of the loop, for the reduction log and its plots.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ReductionStep {
    /// 1, 2, ...
    pub index: usize,
    /// what the template rewrite did, in physical words (from `apply_limit`)
    pub sentence: String,
    /// the limit read off the geodesic's end point
    pub boundary: String,
    /// which eigen-direction of the Fisher information the geodesic followed: 0 the least
    /// sensitive, 1 the next, ... (a later one when the earlier ones led to limits the template
    /// does not declare or that broke the tolerance)
    #[serde(default)]
    pub direction_rank: usize,
    /// every limit tried before the one taken, in physical words (what, why not kept): limits
    /// the template does not declare, refused rewrites, refits beyond the tolerance
    pub refused: Vec<(String, String)>,
    /// whether the held-out check kept this reduction
    pub accepted: bool,
    pub parameters_before: usize,
    pub parameters_after: usize,
    pub states_before: usize,
    pub states_after: usize,
    pub errors_before: ErrorPair,
    pub errors_after: ErrorPair,
    /// free parameters before the step (the order of the Fisher matrix and the path)
    pub parameter_names: Vec<String>,
    /// fitted log-parameters before the step
    pub log_params_before: Vec<f64>,
    /// eigenvalues of JᵀJ at the fitted point (ascending)
    pub fisher_eigenvalues: Vec<f64>,
    /// arc length of each recorded point of the chosen geodesic
    pub geodesic_arc_length: Vec<f64>,
    /// log-parameters along the chosen geodesic, one row per recorded point
    pub geodesic_log_params: Vec<Vec<f64>>,
    /// why the chosen geodesic stopped
    pub geodesic_stop: String,
    /// refit: iterations used and the cost ½‖r‖² at its end (decimated training traces)
    pub refit_iterations: usize,
    pub refit_cost: f64,
}

/// Why the loop stopped (the model kept is the last accepted one).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(tag = "kind", rename_all = "kebab-case")]
pub enum StopReason {
    /// the next reduction broke the held-out tolerance
    Tolerance { step: usize },
    /// the parameter floor was reached
    ParameterFloor { parameters: usize },
    /// the configured number of reductions was done
    MaxSteps { steps: usize },
    /// no geodesic reached a boundary of the model manifold
    NoBoundary { reason: String },
    /// every boundary limit found was refused by the template (e.g. a coupled limit no
    /// declared limit matches)
    Refused { reason: String },
    /// a model evaluation or refit failed; the last accepted model is kept
    Failed { reason: String },
}

impl StopReason {
    pub fn describe(&self) -> String {
        match self {
            StopReason::Tolerance { step } => format!(
                "step {step} would raise the held-out error beyond the tolerance; the model \
                 before it is kept"
            ),
            StopReason::ParameterFloor { parameters } => {
                format!("the parameter floor ({parameters}) is reached")
            }
            StopReason::MaxSteps { steps } => format!("the maximum of {steps} reductions is done"),
            StopReason::NoBoundary { reason } => {
                format!("no geodesic reached a manifold boundary: {reason}")
            }
            StopReason::Refused { reason } => {
                format!("the template has no declared limit for the boundary found: {reason}")
            }
            StopReason::Failed { reason } => format!("a step failed: {reason}"),
        }
    }
}

/// What the loop produced.
#[derive(Debug, Clone, PartialEq)]
pub struct ReductionOutcome {
    /// the full template with its fitted values
    pub full_template: Template,
    /// the reduced template with its fitted values
    pub template: Template,
    pub full_errors: ErrorPair,
    pub reduced_errors: ErrorPair,
    pub steps: Vec<ReductionStep>,
    pub stop: StopReason,
}

/// What the loop reports while it runs.
#[derive(Debug)]
pub enum ReductionEvent<'a> {
    /// the full template is fitted
    FullFitted {
        parameters: usize,
        errors: &'a ErrorPair,
    },
    /// one MBAM step is done (accepted or not)
    Step(&'a ReductionStep),
    /// the final refit at the full sample rate starts
    FinalRefit,
}

/// Every `k`-th sample of a trace (the first kept), sample step × k.
pub fn decimate(trace: &FitTrace, k: usize) -> FitTrace {
    assert!(k >= 1, "decimation factor must be ≥ 1");
    let pick = |v: &[f64]| v.iter().step_by(k).copied().collect::<Vec<f64>>();
    FitTrace {
        name: trace.name.clone(),
        step_s: trace.step_s * k as f64,
        v_re: pick(&trace.v_re),
        v_im: pick(&trace.v_im),
        f_grid: trace.f_grid.as_deref().map(pick),
        i_re: pick(&trace.i_re),
        i_im: pick(&trace.i_im),
        p: pick(&trace.p),
        q: pick(&trace.q),
    }
}

/// `n` traces spread evenly over `traces` (all of them when `n` ≥ their count).
fn spread_subset(traces: &[FitTrace], n: usize) -> Vec<FitTrace> {
    if n >= traces.len() {
        return traces.to_vec();
    }
    (0..n)
        .map(|j| traces[j * traces.len() / n].clone())
        .collect()
}

fn problem(template: &Template, traces: &[FitTrace]) -> Result<TemplateFit, ReductionError> {
    TemplateFit::new(
        template,
        traces.to_vec(),
        SignalWeights::default(),
        EvalConfig::default(),
    )
    .map_err(|e| ReductionError::Template {
        template: template.name.clone(),
        message: e.to_string(),
    })
}

/// Levenberg–Marquardt on an iteration budget, keeping the best point (LM only accepts
/// decreases, so the current state is the best). A failure mid-way keeps the point reached.
fn budget_fit(
    model: &dyn LeastSquaresModel,
    start: &[f64],
    lm: &LmConfig,
    budget: usize,
) -> Result<(Vec<f64>, f64, usize), String> {
    let config = lm
        .clone()
        .with_max_iterations(budget + 1)
        .map_err(|e| e.to_string())?;
    let lm = LevenbergMarquardt::new(config);
    let mut state = lm.init(model, start).map_err(|e| e.to_string())?;
    while state.termination.is_none() && state.iteration < budget {
        if lm.next_iter(model, &mut state).is_err() {
            break;
        }
    }
    Ok((
        state.log_params.iter().copied().collect(),
        state.cost,
        state.iteration,
    ))
}

/// Errors of `template` (values as they stand) on the training and held-out traces.
fn errors_of(
    template: &Template,
    training: &[FitTrace],
    held_out: &[FitTrace],
) -> Result<ErrorPair, ReductionError> {
    let t = problem(template, training)?;
    let h = problem(template, held_out)?;
    let (a, b) = rayon::join(
        || t.nrmse(&t.start_log_params()),
        || h.nrmse(&h.start_log_params()),
    );
    Ok(ErrorPair {
        training: a.into(),
        held_out: b.into(),
    })
}

/// The template reducer, also remembering the reduction it made and every limit it refused
/// (in physical words, for the log). A coupled limit is tried whole first (a PI's gains going to
/// ∞ together is ideal tracking), then as each of its single-parameter parts (the refit and the
/// held-out check judge it).
struct Capturing {
    inner: TemplateReducer,
    /// limits already tried at this step (parameter and limit), refused on a retry
    skip: Vec<String>,
    taken: Mutex<Option<(String, Reduction, TemplateFit)>>,
    refusals: Mutex<Vec<(String, String)>>,
}

/// "1st", "2nd", "3rd", "4th", ...
fn ordinal(k: usize) -> String {
    let suffix = match (k % 10, k % 100) {
        (_, 11..=13) => "th",
        (1, _) => "st",
        (2, _) => "nd",
        (3, _) => "rd",
        _ => "th",
    };
    format!("{k}{suffix}")
}

impl Capturing {
    fn candidates(reading: &BoundaryReading) -> Vec<BoundaryReading> {
        let mut all = vec![reading.clone()];
        if let BoundaryLimit::Coupled { components } = &reading.limit {
            all.extend(components.iter().map(|&(index, component)| {
                let direction = if component < 0.0 {
                    LimitDirection::ToZero
                } else {
                    LimitDirection::ToInfinity
                };
                BoundaryReading {
                    limit: BoundaryLimit::Single { index, direction },
                    sentence: format!(
                        "{} (taken as its part {} → {})",
                        reading.sentence,
                        reading.parameter_names[index],
                        if component < 0.0 { "0" } else { "∞" }
                    ),
                    ..reading.clone()
                }
            }));
        }
        all
    }

    /// The reading's sentence with the physical meaning of the parameters it moves.
    fn in_words(&self, reading: &BoundaryReading) -> String {
        let indices: Vec<usize> = match &reading.limit {
            BoundaryLimit::Single { index, .. } => vec![*index],
            BoundaryLimit::Fold { first, second } => vec![*first, *second],
            BoundaryLimit::Coupled { components } => components.iter().map(|c| c.0).collect(),
        };
        let meanings: Vec<String> = indices
            .iter()
            .filter_map(|&i| {
                let name = &reading.parameter_names[i];
                self.inner
                    .template
                    .parameter(name)
                    .map(|p| format!("{name}: {}", p.meaning))
            })
            .collect();
        format!("{} [{}]", reading.sentence, meanings.join("; "))
    }
}

impl Reducer for Capturing {
    fn reduce(&self, reading: &BoundaryReading) -> Result<ReducedModel, ModelError> {
        let mut first_error = None;
        let refuse = |candidate: &BoundaryReading, e: &ModelError| {
            self.refusals
                .lock()
                .expect("not poisoned")
                .push((self.in_words(candidate), e.to_string()));
        };
        let candidates = Self::candidates(reading);
        let whole_and_parts = candidates.len() > 1;
        for (k, candidate) in candidates.iter().enumerate() {
            let key = match self.inner.limit_of(candidate) {
                Ok((parameter, limit)) => format!("{parameter} {limit:?}"),
                Err(e) => {
                    // a coupled limit that is no declared limit as a whole is tried by its parts
                    // without a log line of its own
                    if !(whole_and_parts && k == 0) {
                        refuse(candidate, &e);
                    }
                    first_error.get_or_insert(e);
                    continue;
                }
            };
            if self.skip.contains(&key) {
                first_error.get_or_insert(ModelError::Unsupported {
                    what: format!("`{}`: tried already at this step", candidate.sentence),
                });
                continue;
            }
            match self.inner.reduce_template(candidate) {
                Ok((reduction, fit, start)) => {
                    let description = reduction.sentence.clone();
                    *self.taken.lock().expect("not poisoned") = Some((key, reduction, fit.clone()));
                    return Ok(ReducedModel {
                        model: Box::new(fit),
                        start_log_params: start,
                        description,
                    });
                }
                Err(e) => {
                    refuse(candidate, &e);
                    first_error.get_or_insert(e);
                }
            }
        }
        Err(first_error.unwrap_or_else(|| ModelError::Unsupported {
            what: format!("the limit `{}`", reading.sentence),
        }))
    }
}

fn check_traces(which: &'static str, traces: &[FitTrace]) -> Result<(), ReductionError> {
    if traces.is_empty() {
        return Err(ReductionError::NoTraces { which });
    }
    for t in traces {
        let bad = |message: String| ReductionError::BadTrace {
            trace: t.name.clone(),
            message,
        };
        if t.len() < 4 {
            return Err(bad(format!("{} samples; need at least 4", t.len())));
        }
        if !(t.step_s.is_finite() && t.step_s > 0.0) {
            return Err(bad(format!("sample step {} s; expected > 0", t.step_s)));
        }
        let channels: [(&str, &[f64]); 6] = [
            ("v_re", &t.v_re),
            ("v_im", &t.v_im),
            ("i_re", &t.i_re),
            ("i_im", &t.i_im),
            ("p", &t.p),
            ("q", &t.q),
        ];
        for (name, c) in channels {
            if c.len() != t.len() {
                return Err(bad(format!(
                    "channel `{name}` has {} samples, v_re has {}",
                    c.len(),
                    t.len()
                )));
            }
            if let Some(k) = c.iter().position(|v| !v.is_finite()) {
                return Err(bad(format!("channel `{name}` is not finite at sample {k}")));
            }
        }
    }
    Ok(())
}

/// Fit `template` to `training`, then reduce it step by step (see the module docs).
/// `observer` sees the full fit and every step as it happens.
pub fn reduce_template(
    template: &Template,
    training: &[FitTrace],
    held_out: &[FitTrace],
    config: &ReductionConfig,
    mut observer: impl FnMut(ReductionEvent<'_>),
) -> Result<ReductionOutcome, ReductionError> {
    check_traces("training", training)?;
    check_traces("held-out", held_out)?;
    let k = config.decimation;
    let train_dec: Vec<FitTrace> = training.iter().map(|t| decimate(t, k)).collect();
    let held_dec: Vec<FitTrace> = held_out.iter().map(|t| decimate(t, k)).collect();
    let geo_dec = spread_subset(&train_dec, config.geodesic_traces);

    // the full template
    let full_problem = problem(template, &train_dec)?;
    let (full_lp, _, _) = budget_fit(
        &full_problem,
        &full_problem.start_log_params(),
        &config.lm,
        config.full_fit_iterations,
    )
    .map_err(ReductionError::FullFit)?;
    let full_template = full_problem.template_at(&full_lp);
    let full_errors_dec = errors_of(&full_template, &train_dec, &held_dec)?;
    observer(ReductionEvent::FullFitted {
        parameters: full_lp.len(),
        errors: &full_errors_dec,
    });

    let mut current = full_problem;
    let mut current_lp = full_lp;
    let mut current_errors = full_errors_dec;
    let mut steps = Vec::new();
    let stop = loop {
        let parameters = current_lp.len();
        if parameters <= config.min_parameters {
            break StopReason::ParameterFloor { parameters };
        }
        if steps.len() >= config.max_steps {
            break StopReason::MaxSteps {
                steps: config.max_steps,
            };
        }
        // the Fisher information and the geodesics see a spread subset of the training traces
        // (same parameters, same order); the reducer and the refit below see them all
        let geodesic_problem = if geo_dec.len() < train_dec.len() {
            Some(problem(&current.template_at(&current_lp), &geo_dec)?)
        } else {
            None
        };
        let geo_model = geodesic_problem.as_ref().unwrap_or(&current);
        let fisher = match FisherInformation::at(geo_model, &current_lp)
            .and_then(|f| check_fisher(&f).map(|()| f))
        {
            Ok(f) => f,
            Err(e) => {
                break StopReason::Failed {
                    reason: e.to_string(),
                }
            }
        };
        let n = current_lp.len();
        // limits already tried at this step (parameter and limit), refused when read again
        let mut skip: Vec<String> = Vec::new();
        // every limit tried and not kept at this step, in physical words (what, why)
        let mut attempts: Vec<(String, String)> = Vec::new();
        let mut outcome = None;
        let mut last_rejected = None;
        let mut halt = None;
        let mut no_boundary = Vec::new();
        'directions: for rank in 0..config.attempts_per_step.min(n) {
            let label = format!(
                "{} sloppiest direction (Fisher eigenvalue {:.3e})",
                ordinal(rank + 1),
                fisher.eigenvalues[rank]
            );
            let geodesics = match mbam_geodesics(geo_model, &fisher, rank, &config.mbam) {
                Ok(g) => g,
                Err(e) => {
                    attempts.push((label, format!("the geodesics failed: {e}")));
                    continue;
                }
            };
            // the limits along this direction, nearest first, until one is kept or all are
            // tried (a tried limit is skipped when read again)
            loop {
                let reducer = Capturing {
                    inner: TemplateReducer {
                        template: current.template_at(&current_lp),
                        traces: train_dec.clone(),
                        weights: SignalWeights::default(),
                        eval: EvalConfig::default(),
                    },
                    skip: skip.clone(),
                    taken: Mutex::new(None),
                    refusals: Mutex::new(Vec::new()),
                };
                let result = mbam_boundary_from(
                    geo_model,
                    fisher.clone(),
                    rank,
                    geodesics.clone(),
                    &reducer,
                    &config.mbam,
                );
                for (what, why) in reducer.refusals.lock().expect("not poisoned").drain(..) {
                    attempts.push((format!("{label}: {what}"), why));
                }
                let boundary = match result {
                    Ok(b) => b,
                    Err(ReduceError::NoBoundary { arc_lengths, stops }) => {
                        let why = format!(
                            "no manifold boundary: geodesic stops {stops:?} at arc lengths \
                             {arc_lengths:?}"
                        );
                        no_boundary.push(format!("{label}: {why}"));
                        attempts.push((label, why));
                        continue 'directions;
                    }
                    // every limit read along this direction was refused (logged above)
                    Err(ReduceError::Reduction { .. }) => continue 'directions,
                    Err(e) => {
                        halt = Some(StopReason::Failed {
                            reason: e.to_string(),
                        });
                        break 'directions;
                    }
                };
                let (key, reduction, reduced_problem) = reducer
                    .taken
                    .into_inner()
                    .expect("not poisoned")
                    .expect("the accepted reduction was recorded");
                skip.push(key);
                let refit = budget_fit(
                    &reduced_problem,
                    &boundary.reduced.start_log_params,
                    &config.lm,
                    config.refit_iterations,
                );
                let (reduced_lp, refit_cost, refit_iterations) = match refit {
                    Ok(r) => r,
                    Err(reason) => {
                        attempts.push((
                            format!("{label}: {}", reduction.sentence),
                            format!("refit failed: {reason}"),
                        ));
                        continue;
                    }
                };
                let reduced_template = reduced_problem.template_at(&reduced_lp);
                let errors_after = errors_of(&reduced_template, &train_dec, &held_dec)?;
                let accepted = config.within_tolerance(&full_errors_dec, &errors_after);
                let chosen = &boundary.geodesics[boundary.chosen];
                // points where the integration produced non-finite numbers are left out of the
                // record (JSON has no infinities)
                let finite: Vec<&super::GeodesicPoint> = chosen
                    .path
                    .iter()
                    .filter(|p| {
                        p.arc_length.is_finite() && p.log_params.iter().all(|x| x.is_finite())
                    })
                    .collect();
                let step = ReductionStep {
                    index: steps.len() + 1,
                    sentence: reduction.sentence.clone(),
                    boundary: boundary.reading.sentence.clone(),
                    direction_rank: rank,
                    refused: attempts.clone(),
                    accepted,
                    parameters_before: current_lp.len(),
                    parameters_after: reduced_lp.len(),
                    states_before: reduction.states_before,
                    states_after: reduction.states_after,
                    errors_before: current_errors,
                    errors_after,
                    parameter_names: current.parameter_names(),
                    log_params_before: current_lp.clone(),
                    fisher_eigenvalues: boundary
                        .fisher
                        .eigenvalues
                        .iter()
                        .map(|e| if e.is_finite() { *e } else { 0.0 })
                        .collect(),
                    geodesic_arc_length: finite.iter().map(|p| p.arc_length).collect(),
                    geodesic_log_params: finite.iter().map(|p| p.log_params.clone()).collect(),
                    geodesic_stop: format!("{:?}", chosen.stop),
                    refit_iterations,
                    refit_cost,
                };
                if accepted {
                    outcome = Some((step, reduced_problem, reduced_lp, errors_after));
                    break 'directions;
                }
                attempts.push((
                    format!("{label}: {}", step.sentence),
                    format!(
                        "beyond the tolerance: NRMSE P/Q training {:.2}/{:.2} %, held out \
                         {:.2}/{:.2} %",
                        100.0 * errors_after.training.p,
                        100.0 * errors_after.training.q,
                        100.0 * errors_after.held_out.p,
                        100.0 * errors_after.held_out.q
                    ),
                ));
                last_rejected = Some(step);
            }
        }
        let Some((step, reduced_problem, reduced_lp, errors_after)) = outcome else {
            if let Some(mut step) = last_rejected {
                step.refused = attempts;
                observer(ReductionEvent::Step(&step));
                steps.push(step);
                break StopReason::Tolerance { step: steps.len() };
            }
            if let Some(halt) = halt {
                break halt;
            }
            if no_boundary.len() == attempts.len() {
                break StopReason::NoBoundary {
                    reason: no_boundary.join("; "),
                };
            }
            break StopReason::Refused {
                reason: attempts
                    .iter()
                    .map(|(what, why)| format!("{what}: {why}"))
                    .collect::<Vec<_>>()
                    .join("; "),
            };
        };
        observer(ReductionEvent::Step(&step));
        steps.push(step);
        current = reduced_problem;
        current_lp = reduced_lp;
        current_errors = errors_after;
    };

    // the kept model and the full one, both polished at the full sample rate with the same
    // budget, so their errors compare fairly
    let mut reduced_template = current.template_at(&current_lp);
    let mut full_template = full_template;
    if k > 1 && config.final_full_rate_refit {
        observer(ReductionEvent::FinalRefit);
        let polish = |t: &Template| -> Result<Template, ReductionError> {
            let full_rate = problem(t, training)?;
            Ok(
                match budget_fit(
                    &full_rate,
                    &full_rate.start_log_params(),
                    &config.lm,
                    config.refit_iterations,
                ) {
                    Ok((lp, _, _)) => full_rate.template_at(&lp),
                    Err(_) => t.clone(),
                },
            )
        };
        reduced_template = polish(&reduced_template)?;
        full_template = polish(&full_template)?;
    }
    let (full_errors, reduced_errors) = (
        errors_of(&full_template, training, held_out)?,
        errors_of(&reduced_template, training, held_out)?,
    );
    Ok(ReductionOutcome {
        full_template,
        template: reduced_template,
        full_errors,
        reduced_errors,
        steps,
        stop,
    })
}

/// The held-out split as written to the file.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct SplitRecord {
    /// the rule, in words (`crate::split`)
    pub rule: String,
    pub held_out_fraction: f64,
    pub training: Vec<String>,
    pub held_out: Vec<String>,
}

/// Full and reduced errors on the original (not decimated) traces.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct FileErrors {
    pub full: ErrorPair,
    pub reduced: ErrorPair,
}

/// The reduced-model file (`understudy-reduced/1`).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ReducedFile {
    pub format: String,
    /// the reduced template with fitted values (what the hybrid surrogate starts from)
    pub template: Template,
    /// the full template with fitted values
    pub full_template: Template,
    pub steps: Vec<ReductionStep>,
    pub stop: StopReason,
    pub split: SplitRecord,
    pub errors: FileErrors,
    pub settings: ReductionSettings,
}

/// The loop's settings as written to the file.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ReductionSettings {
    pub tolerance_factor: f64,
    pub tolerance_margin: f64,
    pub min_parameters: usize,
    pub max_steps: usize,
    pub attempts_per_step: usize,
    pub decimation: usize,
    pub full_fit_iterations: usize,
    pub refit_iterations: usize,
    pub final_full_rate_refit: bool,
}

impl ReducedFile {
    pub fn new(outcome: ReductionOutcome, split: SplitRecord, config: &ReductionConfig) -> Self {
        Self {
            format: REDUCED_FORMAT.into(),
            template: outcome.template,
            full_template: outcome.full_template,
            steps: outcome.steps,
            stop: outcome.stop,
            split,
            errors: FileErrors {
                full: outcome.full_errors,
                reduced: outcome.reduced_errors,
            },
            settings: ReductionSettings {
                tolerance_factor: config.held_out_factor,
                tolerance_margin: config.held_out_margin,
                min_parameters: config.min_parameters,
                max_steps: config.max_steps,
                attempts_per_step: config.attempts_per_step,
                decimation: config.decimation,
                full_fit_iterations: config.full_fit_iterations,
                refit_iterations: config.refit_iterations,
                final_full_rate_refit: config.final_full_rate_refit,
            },
        }
    }

    /// The reduction log in plain text, one paragraph per step.
    pub fn log_text(&self) -> String {
        let mut s = String::new();
        let pct = |x: f64| 100.0 * x;
        let free = |t: &Template| t.parameters.iter().filter(|p| !p.fixed).count();
        let _ = writeln!(
            s,
            "understudy reduction of template `{}`\n\
             training traces: {}; held-out traces: {} ({})\n\
             full template: {} free parameters, {} states; NRMSE P {:.2} %, Q {:.2} % \
             (training), P {:.2} %, Q {:.2} % (held out)\n",
            self.full_template.name,
            self.split.training.len(),
            self.split.held_out.len(),
            self.split.rule,
            free(&self.full_template),
            self.full_template.state_count(),
            pct(self.errors.full.training.p),
            pct(self.errors.full.training.q),
            pct(self.errors.full.held_out.p),
            pct(self.errors.full.held_out.q),
        );
        for step in &self.steps {
            let _ = writeln!(
                s,
                "step {}: {}{}\n  boundary: {} (geodesic along the {} sloppiest direction)\n  \
                 parameters {} → {}, states {} → {}\n  \
                 NRMSE P/Q training {:.2}/{:.2} % → {:.2}/{:.2} %, held out {:.2}/{:.2} % → \
                 {:.2}/{:.2} % (decimated traces)\n  smallest Fisher eigenvalue {:.3e}, \
                 largest {:.3e}; geodesic stop: {}",
                step.index,
                step.sentence,
                if step.accepted {
                    ""
                } else {
                    "  [NOT KEPT: held-out error beyond the tolerance]"
                },
                step.boundary,
                ordinal(step.direction_rank + 1),
                step.parameters_before,
                step.parameters_after,
                step.states_before,
                step.states_after,
                pct(step.errors_before.training.p),
                pct(step.errors_before.training.q),
                pct(step.errors_after.training.p),
                pct(step.errors_after.training.q),
                pct(step.errors_before.held_out.p),
                pct(step.errors_before.held_out.q),
                pct(step.errors_after.held_out.p),
                pct(step.errors_after.held_out.q),
                step.fisher_eigenvalues.first().copied().unwrap_or(f64::NAN),
                step.fisher_eigenvalues.last().copied().unwrap_or(f64::NAN),
                step.geodesic_stop,
            );
            for (limit, reason) in &step.refused {
                let _ = writeln!(s, "  tried first: {limit}: {reason}");
            }
        }
        let (factor, margin) = (
            self.settings.tolerance_factor,
            self.settings.tolerance_margin,
        );
        let _ = writeln!(
            s,
            "\nstopped: {}\nreduced template: {} free parameters, {} states; NRMSE P {:.2} %, \
             Q {:.2} % (training), P {:.2} %, Q {:.2} % (held out); tolerance: NRMSE ≤ \
             {factor} × full + {margin} (training and held out)",
            self.stop.describe(),
            free(&self.template),
            self.template.state_count(),
            pct(self.errors.reduced.training.p),
            pct(self.errors.reduced.training.q),
            pct(self.errors.reduced.held_out.p),
            pct(self.errors.reduced.held_out.q),
        );
        s
    }

    /// The FIM eigen-spectrum of each step, one SVG per step.
    pub fn fisher_spectra_svg(&self) -> Vec<String> {
        self.steps.iter().map(fisher_spectrum_svg).collect()
    }
}

/// The Fisher information eigen-spectrum at the start of one step (log scale).
pub fn fisher_spectrum_svg(step: &ReductionStep) -> String {
    log_spectrum(
        &format!(
            "Step {}: Fisher information eigenvalues ({} parameters)",
            step.index, step.parameters_before
        ),
        "eigenvalue of JᵀJ",
        &step.fisher_eigenvalues,
    )
}

/// The log-parameters along the chosen geodesic of one step, against arc length.
pub fn geodesic_path_svg(step: &ReductionStep) -> String {
    let columns: Vec<Vec<f64>> = (0..step.parameter_names.len())
        .map(|j| step.geodesic_log_params.iter().map(|row| row[j]).collect())
        .collect();
    let series: Vec<Series> = step
        .parameter_names
        .iter()
        .zip(&columns)
        .map(|(name, y)| Series {
            name: name.as_str(),
            x: &step.geodesic_arc_length,
            y,
            dashed: false,
        })
        .collect();
    line_chart(
        &format!("Step {}: geodesic toward {}", step.index, step.boundary),
        "arc length τ",
        "ln(parameter)",
        &series,
    )
}

/// Write `file` as JSON atomically, and its plain-text log beside it
/// ([`log_path`]); returns the log's path.
pub fn write_reduced(path: &Path, file: &ReducedFile) -> Result<PathBuf, ReductionError> {
    let io = |p: &Path, e: std::io::Error| ReductionError::File {
        path: p.to_path_buf(),
        message: e.to_string(),
    };
    let json = serde_json::to_string_pretty(file).map_err(|e| ReductionError::File {
        path: path.to_path_buf(),
        message: e.to_string(),
    })?;
    crate::atomic::write_atomic(path, json.as_bytes()).map_err(|e| io(path, e))?;
    let log = log_path(path);
    crate::atomic::write_atomic(&log, file.log_text().as_bytes()).map_err(|e| io(&log, e))?;
    Ok(log)
}

/// The plain-text log beside a reduced-model file: `reduced.json` → `reduced.log.txt`.
pub fn log_path(path: &Path) -> PathBuf {
    path.with_extension("log.txt")
}

/// Read a reduced-model file; checks the format and the reduced template.
pub fn read_reduced(path: &Path) -> Result<ReducedFile, ReductionError> {
    let err = |message: String| ReductionError::File {
        path: path.to_path_buf(),
        message,
    };
    let text = std::fs::read_to_string(path).map_err(|e| err(e.to_string()))?;
    let file: ReducedFile = serde_json::from_str(&text).map_err(|e| err(e.to_string()))?;
    if file.format != REDUCED_FORMAT {
        return Err(err(format!(
            "format `{}`; expected `{REDUCED_FORMAT}`",
            file.format
        )));
    }
    understudy_runtime::block::BlockModel::compile(&file.template)
        .map_err(|e| err(format!("field `template`: {e}")))?;
    Ok(file)
}

/// Sort `traces` by name and split them with the shared held-out rule
/// ([`crate::split::held_out_split`]).
pub fn split_traces(
    mut traces: Vec<FitTrace>,
    held_out_fraction: f64,
) -> Result<(Vec<FitTrace>, Vec<FitTrace>, SplitRecord), crate::split::SplitError> {
    traces.sort_by(|a, b| a.name.cmp(&b.name));
    let split = crate::split::held_out_split(traces.len(), held_out_fraction)?;
    let pick = |ix: &[usize]| ix.iter().map(|&i| traces[i].clone()).collect::<Vec<_>>();
    let (training, held_out) = (pick(&split.training), pick(&split.held_out));
    let record = SplitRecord {
        rule: format!(
            "traces sorted by name, every {}-th from the second held out",
            (1.0 / held_out_fraction).round().max(2.0) as usize
        ),
        held_out_fraction,
        training: training.iter().map(|t| t.name.clone()).collect(),
        held_out: held_out.iter().map(|t| t.name.clone()).collect(),
    };
    Ok((training, held_out, record))
}

//! The hybrid surrogate: reduced physics + a data-driven correction of what it misses, fitted
//! on training traces and validated on held-out ones through the runtime's own code (the same
//! code the FMU runs).
//!
//! Steps: physics template (the reduction's result, or an LM fit of a template) → residuals
//! (detailed − physics, as current in the pre-fault voltage frame, see
//! `understudy_runtime::correction`) → DCT compression of the residual set (kept fraction and
//! reconstruction error reported; for the report only: at 5 % it loses too much to fit on) →
//! DMD with control on the delay-embedded raw residuals, driven by the correction's inputs →
//! stability enforced → its poles in continuous time → a modal realisation per input whose
//! output map (C, D) is fitted for free run on states simulated by the runtime's own stepper
//! (see [`free_run_correction`]) → model file.
//! Per unit on the unit rating throughout.

#![deny(clippy::float_cmp)]

mod report;

pub use report::{write_report, write_report_with};

use crate::fit::{LevenbergMarquardt, LmConfig};
use crate::greybox::{FitTrace, GreyboxError, SignalWeights, TemplateFit};
use crate::residual::dmd::{
    delay_embed, fit_dmdc, Complex64, DmdConfig, MovedEigenvalue, RankSelection, StabilityReport,
};
use crate::residual::sparse::compress;
use crate::residual::ResidualError;
use crate::signal::trace::Trace;
use crate::split::{held_out_split, SplitError};
use crate::validate::metrics::{
    compare_signal, median, MetricError, SignalComparison, WindowConfig,
};
use nalgebra::DMatrix;
use rayon::prelude::*;
use std::path::{Path, PathBuf};
use thiserror::Error;
use understudy_runtime::block::{EvalConfig, OutputSeries, Template};
use understudy_runtime::correction::{
    in_dip, rows_of, Correction, CorrectionStepper, PreFault, PreFaultFrame, CORRECTION_OUTPUTS,
    N_INPUTS, PHYSICS_INPUTS,
};
use understudy_runtime::cosim::{
    Bases, CoSimError, CoSimModel, Envelope, Inputs, ModelFile, ModelKind, Outputs, Setpoints,
    StartValues, HYBRID_MODEL_FORMAT,
};
use understudy_runtime::hybrid::OperatingRange;

/// Failures of the hybrid fit. Bad settings and bad data name the setting or trace.
#[derive(Debug, Error)]
pub enum HybridError {
    #[error("setting `{setting}` = {value} is invalid: expected {expected}")]
    Setting {
        setting: &'static str,
        value: f64,
        expected: &'static str,
    },
    #[error(transparent)]
    Split(#[from] SplitError),
    #[error(transparent)]
    Greybox(#[from] GreyboxError),
    #[error("{path}: {message}")]
    BadFile { path: PathBuf, message: String },
    #[error("trace `{trace}`: {message}")]
    BadTrace { trace: String, message: String },
    #[error("residual of trace `{trace}`, {signal}: not finite at sample {index}")]
    NonFiniteResidual {
        trace: String,
        signal: &'static str,
        index: usize,
    },
    #[error("correction: {0}")]
    Residual(#[from] ResidualError),
    #[error("the fitted correction is unstable (spectral radius {radius:.6} > 1) and stability enforcement is off: not exported")]
    Unstable { radius: f64 },
    #[error("runtime evaluation of trace `{trace}`: {source}")]
    Runtime { trace: String, source: CoSimError },
    #[error("physics fit: {0}")]
    PhysicsFit(String),
    #[error(transparent)]
    Metric(#[from] MetricError),
    #[error("correction output map: the regularised normal matrix of {features} features is not positive definite (ridge {ridge:e})")]
    OutputMap { features: usize, ridge: f64 },
}

impl HybridError {
    /// Bad input (2) or a failure of the work (1), as the CLI contract says.
    pub fn is_bad_input(&self) -> bool {
        !matches!(
            self,
            HybridError::Runtime { .. }
                | HybridError::PhysicsFit(_)
                | HybridError::Unstable { .. }
                | HybridError::OutputMap { .. }
        )
    }
}

/// Settings of the hybrid fit.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct HybridConfig {
    held_out_fraction: f64,
    keep_fraction: f64,
    delays: usize,
    rank: RankSelection,
    stability_margin: f64,
    enforce_stability: bool,
    physics_iterations: usize,
    /// `None`: chosen by cross-validation from [`RIDGE_CANDIDATES`]
    ridge: Option<f64>,
    cross_validate: bool,
    windows: WindowConfig,
}

/// Ridge weights the leave-one-trace-out cross-validation chooses from (relative to the mean
/// diagonal of the scaled normal matrix; a grid by decades, common practice for ridge).
pub const RIDGE_CANDIDATES: [f64; 6] = [1e-6, 1e-4, 1e-3, 1e-2, 1e-1, 0.5];

/// Shrink factors of each output row of the output map the cross-validation chooses from
/// (0: that output of the correction is dropped; 1: kept as fitted).
pub const SHRINK_CANDIDATES: [f64; 5] = [0.0, 0.25, 0.5, 0.75, 1.0];

impl Default for HybridConfig {
    fn default() -> Self {
        Self {
            held_out_fraction: 0.25,
            // 5 %: the default of the compressed-sensing step (issue 4)
            keep_fraction: 0.05,
            delays: 6,
            rank: RankSelection::Energy(0.9999),
            stability_margin: 0.999,
            enforce_stability: true,
            physics_iterations: 25,
            ridge: None,
            cross_validate: true,
            windows: WindowConfig::default(),
        }
    }
}

impl HybridConfig {
    pub fn with_held_out_fraction(mut self, f: f64) -> Result<Self, HybridError> {
        if !(f > 0.0 && f <= 0.5) {
            return Err(HybridError::Setting {
                setting: "held_out_fraction",
                value: f,
                expected: "a fraction in (0, 0.5]",
            });
        }
        self.held_out_fraction = f;
        Ok(self)
    }
    /// Fraction of DCT coefficients kept per residual trace, in (0, 1].
    pub fn with_keep_fraction(mut self, f: f64) -> Result<Self, HybridError> {
        if !(f > 0.0 && f <= 1.0) {
            return Err(HybridError::Setting {
                setting: "keep_fraction",
                value: f,
                expected: "a fraction in (0, 1]",
            });
        }
        self.keep_fraction = f;
        Ok(self)
    }
    /// Delay-embedding depth (samples), at least 1.
    pub fn with_delays(mut self, d: usize) -> Result<Self, HybridError> {
        if d == 0 {
            return Err(HybridError::Setting {
                setting: "delays",
                value: 0.0,
                expected: "at least 1 delay",
            });
        }
        self.delays = d;
        Ok(self)
    }
    /// Rank of the correction (a fixed rank larger than the data allow is an error at fit time).
    pub fn with_rank(mut self, rank: RankSelection) -> Result<Self, HybridError> {
        DmdConfig::default().with_rank(rank)?;
        self.rank = rank;
        Ok(self)
    }
    pub fn with_stability_margin(mut self, m: f64) -> Result<Self, HybridError> {
        DmdConfig::default().with_stability_margin(m)?;
        self.stability_margin = m;
        Ok(self)
    }
    /// Turning enforcement off makes an unstable fit an error instead of a moved eigenvalue.
    pub fn with_enforce_stability(mut self, on: bool) -> Self {
        self.enforce_stability = on;
        self
    }
    pub fn with_physics_iterations(mut self, n: usize) -> Result<Self, HybridError> {
        if n == 0 {
            return Err(HybridError::Setting {
                setting: "physics_iterations",
                value: 0.0,
                expected: "at least 1 LM iteration",
            });
        }
        self.physics_iterations = n;
        Ok(self)
    }
    /// A fixed ridge weight of the output-map fit, relative to the mean diagonal of the (scaled)
    /// normal matrix, in [0, 1). Without it the cross-validation chooses it.
    pub fn with_ridge(mut self, r: f64) -> Result<Self, HybridError> {
        if !(0.0..1.0).contains(&r) {
            return Err(HybridError::Setting {
                setting: "ridge",
                value: r,
                expected: "a relative weight in [0, 1)",
            });
        }
        self.ridge = Some(r);
        Ok(self)
    }
    /// Leave-one-trace-out cross-validation of the correction on the training traces (default
    /// on): it chooses the ridge weight (unless fixed) and shrinks each output of the
    /// correction towards zero, down to dropping it, where the left-out traces say the fitted
    /// correction does not help. Off: the correction is exported as fitted, with the fixed
    /// ridge (or the smallest candidate).
    pub fn with_cross_validation(mut self, on: bool) -> Self {
        self.cross_validate = on;
        self
    }
    pub fn with_windows(mut self, w: WindowConfig) -> Self {
        self.windows = w;
        self
    }
    pub fn keep_fraction(&self) -> f64 {
        self.keep_fraction
    }
    pub fn windows(&self) -> &WindowConfig {
        &self.windows
    }
}

/// Where the physics part comes from.
#[derive(Debug, Clone, PartialEq)]
pub enum Physics {
    /// A reduced template with fitted values, used as it is.
    Reduced(Template),
    /// A template fitted here by Levenberg–Marquardt on the training traces.
    FitTemplate(Template),
}

/// Read `--reduced PATH`: a reduction file (`{"format": "understudy-reduced/1", "template":
/// ...}`) or a plain template file (TOML or JSON).
pub fn read_reduced(path: &Path) -> Result<Template, HybridError> {
    let bad = |message: String| HybridError::BadFile {
        path: path.to_path_buf(),
        message,
    };
    let text = std::fs::read_to_string(path).map_err(|e| bad(e.to_string()))?;
    if let Ok(value) = serde_json::from_str::<serde_json::Value>(&text) {
        if let Some(t) = value.get("template") {
            let template: Template = serde_json::from_value(t.clone())
                .map_err(|e| bad(format!("field `template`: {e}")))?;
            understudy_runtime::block::BlockModel::compile(&template)
                .map_err(|e| bad(format!("field `template`: {e}")))?;
            return Ok(template);
        }
    }
    Ok(crate::greybox::read_template(path)?)
}

/// The physics part for the training traces: THE one place that decides it (the reduction is
/// wired in here).
pub fn physics_template(
    physics: &Physics,
    training: &[FitTrace],
    config: &HybridConfig,
) -> Result<Template, HybridError> {
    match physics {
        Physics::Reduced(t) => Ok(t.clone()),
        Physics::FitTemplate(t) => {
            let problem = TemplateFit::new(
                t,
                training.to_vec(),
                SignalWeights::default(),
                EvalConfig::default(),
            )?;
            let lm = LevenbergMarquardt::new(
                LmConfig::default()
                    .with_max_iterations(config.physics_iterations)
                    .and_then(|c| c.with_tolerances(1e-6, 1e-8, 1e-8))
                    .map_err(|e| HybridError::PhysicsFit(e.to_string()))?,
            );
            let start = problem.start_log_params();
            let mut state = lm
                .init(&problem, &start)
                .map_err(|e| HybridError::PhysicsFit(e.to_string()))?;
            // the residuals are piecewise smooth (switches act on samples): a fixed budget,
            // keeping the best accepted point
            while state.termination.is_none() && state.iteration < config.physics_iterations {
                if lm.next_iter(&problem, &mut state).is_err() {
                    break;
                }
            }
            let fitted: Vec<f64> = state.log_params.iter().copied().collect();
            Ok(problem.template_at(&fitted))
        }
    }
}

/// One trace as the hybrid fit sees it.
#[derive(Debug, Clone)]
pub struct Case {
    pub name: String,
    pub time_s: Vec<f64>,
    pub data: FitTrace,
    /// Disturbance window [start, end) (s), when the trace's case says so.
    pub fault: Option<(f64, f64)>,
}

impl Case {
    pub fn from_trace(trace: &Trace, name: &str) -> Result<Self, HybridError> {
        let data = FitTrace::from_trace(trace, name)?;
        let d = trace.meta.case.get("disturbance");
        let get = |k: &str| {
            d.and_then(|d| {
                d.as_object()
                    .and_then(|o| o.values().find_map(|v| v.get(k)))
                    .or_else(|| d.get(k))
            })
            .and_then(serde_json::Value::as_f64)
        };
        let fault = get("start_s").map(|s| (s, s + get("duration_s").unwrap_or(0.0)));
        Ok(Self {
            name: name.into(),
            time_s: trace.time_s.clone(),
            data,
            fault,
        })
    }

    fn pre_fault(&self) -> PreFault {
        let v = num_complex(self.data.v_re[0], self.data.v_im[0]);
        PreFault {
            u0: v.0,
            theta0: v.1,
            f0: self.data.f_grid.as_ref().map_or(1.0, |f| f[0]),
            p0: self.data.p[0],
            q0: self.data.q[0],
        }
    }

    /// The correction's raw input vector at sample `k` with the physics' outputs `physics` on
    /// this case, in the pre-fault frame `pf` ([`PreFaultFrame::input`]).
    fn correction_input(
        &self,
        pf: &PreFaultFrame,
        physics: &OutputSeries<f64>,
        k: usize,
    ) -> [f64; N_INPUTS] {
        let i = self.inputs(k);
        pf.input(i.v_re, i.v_im, i.f_grid, (physics.i_re[k], physics.i_im[k]))
    }

    fn inputs(&self, k: usize) -> Inputs {
        Inputs {
            v_re: self.data.v_re[k],
            v_im: self.data.v_im[k],
            f_grid: self.data.f_grid.as_ref().map_or(1.0, |f| f[k]),
        }
    }
}

fn num_complex(re: f64, im: f64) -> (f64, f64) {
    (re.hypot(im), im.atan2(re))
}

/// Run a model file over a recorded case through the runtime (initialise at the first sample
/// with the recorded P, Q as setpoints; output at each sample, then a step at the sample step):
/// exactly what an FMU host does.
pub fn evaluate(model: &ModelFile, case: &Case) -> Result<OutputSeries<f64>, HybridError> {
    let err = |source| HybridError::Runtime {
        trace: case.name.clone(),
        source,
    };
    let mut m = model.build().map_err(err)?;
    let sp = Setpoints {
        p_ref: case.data.p[0],
        q_ref: case.data.q[0],
    };
    m.initialise(&case.inputs(0), &sp).map_err(err)?;
    let n = case.data.len();
    let mut out = OutputSeries {
        i_re: Vec::with_capacity(n),
        i_im: Vec::with_capacity(n),
        p: Vec::with_capacity(n),
        q: Vec::with_capacity(n),
    };
    for k in 0..n {
        let u = case.inputs(k);
        let o = m.outputs(&u).map_err(err)?;
        out.i_re.push(o.i_re);
        out.i_im.push(o.i_im);
        out.p.push(o.p);
        out.q.push(o.q);
        if k + 1 < n {
            m.do_step(case.time_s[k], case.time_s[k + 1] - case.time_s[k], &u)
                .map_err(err)?;
        }
    }
    Ok(out)
}

/// Active and reactive current (pu) in the frame of the present terminal voltage:
/// i_p = Re(i·e^{−jθ_v}) = P/|v|, i_q = −Im(i·e^{−jθ_v}) = Q/|v| (generator convention);
/// the last defined angle is kept while |v| < 1e-3 pu.
pub fn active_reactive(
    v_re: &[f64],
    v_im: &[f64],
    i_re: &[f64],
    i_im: &[f64],
) -> (Vec<f64>, Vec<f64>) {
    let mut theta = 0.0;
    let mut ip = Vec::with_capacity(v_re.len());
    let mut iq = Vec::with_capacity(v_re.len());
    for (((vr, vi), ir), ii) in v_re.iter().zip(v_im).zip(i_re).zip(i_im) {
        if vr.hypot(*vi) > 1e-3 {
            theta = vi.atan2(*vr);
        }
        let (s, c) = f64::sin_cos(theta);
        ip.push(ir * c + ii * s);
        iq.push(-(-ir * s + ii * c));
    }
    (ip, iq)
}

/// The validation of one held-out case: per signal, the reduced model and the hybrid.
#[derive(Debug, Clone)]
pub struct CaseValidation {
    pub name: String,
    pub reduced: Vec<SignalComparison>,
    pub hybrid: Vec<SignalComparison>,
    pub reduced_outputs: OutputSeries<f64>,
    pub hybrid_outputs: OutputSeries<f64>,
}

/// Signals compared, in order.
pub const SIGNALS: [&str; 4] = ["p", "q", "i_p", "i_q"];

/// The validation's comparison of model outputs `o` with the recorded `case`: per signal of
/// [`SIGNALS`], window errors and NRMSE.
pub fn comparisons(
    case: &Case,
    o: &OutputSeries<f64>,
    windows: &WindowConfig,
) -> Result<Vec<SignalComparison>, HybridError> {
    let d = &case.data;
    let (ip_ref, iq_ref) = active_reactive(&d.v_re, &d.v_im, &d.i_re, &d.i_im);
    let (ip, iq) = active_reactive(&d.v_re, &d.v_im, &o.i_re, &o.i_im);
    let pairs: [(&[f64], &[f64]); 4] = [(&d.p, &o.p), (&d.q, &o.q), (&ip_ref, &ip), (&iq_ref, &iq)];
    SIGNALS
        .iter()
        .zip(pairs)
        .map(|(s, (r, m))| Ok(compare_signal(s, &case.time_s, r, m, case.fault, windows)?))
        .collect()
}

/// What the DCT step did to the residual set.
#[derive(Debug, Clone)]
pub struct CompressionSummary {
    pub keep_fraction: f64,
    /// ‖x − x̂‖/‖x‖ over the whole training residual set.
    pub relative_error: f64,
    /// Kept coefficient magnitudes of the first training trace's Δi_d (for the report).
    pub example_kept: Vec<f64>,
}

/// Everything the fit produced.
#[derive(Debug, Clone)]
pub struct HybridOutcome {
    pub model: ModelFile,
    pub reduced_model: ModelFile,
    pub training: Vec<String>,
    pub validation: Vec<CaseValidation>,
    pub held_out_cases: Vec<Case>,
    pub compression: CompressionSummary,
    /// Order of the correction in the model file (the minimal modal realisation).
    pub order: usize,
    /// Order of the per-input realisation its output map was fitted on (N_INPUTS × modes).
    pub fitted_order: usize,
    pub rank: usize,
    pub delays: usize,
    pub discrete_eigenvalues: Vec<Complex64>,
    pub stability: StabilityReport,
    /// Real eigenvalues ≤ 0 moved to their modulus so that the continuous form exists.
    pub moved_to_real_axis: Vec<MovedEigenvalue>,
    /// Residuals (Δi_d) of every training case, for the heat map.
    pub residual_rows: Vec<(String, Vec<f64>)>,
    pub residual_time_s: Vec<f64>,
    pub windows: WindowConfig,
    /// The leave-one-trace-out cross-validation that chose the ridge and the output shrink
    /// (`None` when it was switched off).
    pub cross_validation: Option<CrossValidation>,
}

/// What the cross-validation chooses for the correction's output map.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct CorrectionChoice {
    pub ridge: f64,
    /// Factors of the (Δi_d, Δi_q) rows of the output map, from [`SHRINK_CANDIDATES`].
    pub shrink: [f64; 2],
    pub structure: Structure,
}

/// The form of the correction's output map the cross-validation chooses from.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Structure {
    /// Whether the physics' current is an input ([`PHYSICS_INPUTS`]); without it the
    /// correction is driven by the terminal voltage and frequency alone.
    pub physics_inputs: bool,
    /// Whether the correction has a dip map (C_dip, D_dip: a second output map added while the
    /// terminal voltage is in a dip), or one output map for all voltages.
    pub dip_map: bool,
}

impl Structure {
    /// Every structure, simplest first.
    pub const ALL: [Structure; 4] = [
        Structure {
            physics_inputs: false,
            dip_map: false,
        },
        Structure {
            physics_inputs: true,
            dip_map: false,
        },
        Structure {
            physics_inputs: false,
            dip_map: true,
        },
        Structure {
            physics_inputs: true,
            dip_map: true,
        },
    ];

    fn words(&self) -> String {
        format!(
            "{} the physics' current, {} the dip map",
            if self.physics_inputs {
                "with"
            } else {
                "without"
            },
            if self.dip_map { "with" } else { "without" }
        )
    }
}

/// One candidate of the cross-validation (a structure and a ridge): mean NRMSE
/// (% of rating) over the left-out traces and the four signals, for the correction as fitted
/// and with its best output shrink.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct CvRow {
    pub ridge: f64,
    pub structure: Structure,
    pub fitted_percent: f64,
    /// Best shrink factors of (Δi_d, Δi_q) for this ridge, from [`SHRINK_CANDIDATES`].
    pub shrink: [f64; 2],
    pub shrunk_percent: f64,
}

/// Leave-one-trace-out cross-validation of the correction on the training traces: per fold the
/// poles (DMD with control) and the output map are refitted without the left-out trace, which
/// is then run open loop, as the surrogate runs, and scored with the validation's metric (NRMSE
/// of P, Q, i_p, i_q). The physics is the one fitted on all training traces (refitting it per
/// fold would cost a template fit each), so the figures lean slightly optimistic for the
/// physics, not for the correction.
#[derive(Debug, Clone, PartialEq)]
pub struct CrossValidation {
    pub folds: usize,
    /// The physics alone on the left-out traces (%).
    pub reduced_percent: f64,
    pub rows: Vec<CvRow>,
    /// The choice and its cross-validated NRMSE (%).
    pub choice: CorrectionChoice,
    pub hybrid_percent: f64,
}

impl CvRow {
    /// This row as the summary words it.
    pub fn describe(&self) -> String {
        format!(
            "ridge {:e} {}: {:.3} % as fitted, {:.3} % with (Δi_d, Δi_q) shrunk by ({}, {})",
            self.ridge,
            self.structure.words(),
            self.fitted_percent,
            self.shrunk_percent,
            self.shrink[0],
            self.shrink[1]
        )
    }
}

impl CrossValidation {
    /// One sentence for the report and the CLI.
    pub fn summary(&self) -> String {
        let rows: Vec<String> = self.rows.iter().map(CvRow::describe).collect();
        let c = &self.choice;
        format!(
            "leave-one-trace-out cross-validation over {} training traces (mean NRMSE of P, Q, \
             i_p, i_q, % of rating): physics alone {:.3} %; {}; chosen ridge {:e} {} with the \
             output map shrunk by {} (Δi_d) and {} (Δi_q): {:.3} %{}",
            self.folds,
            self.reduced_percent,
            rows.join("; "),
            c.ridge,
            c.structure.words(),
            c.shrink[0],
            c.shrink[1],
            self.hybrid_percent,
            if c.shrink.iter().all(|&s| s == 0.0) {
                " — the data do not support a correction: none exported"
            } else {
                ""
            }
        )
    }
}

impl HybridOutcome {
    /// Median over held-out cases of the NRMSE (% of rating) of `signal` for the reduced model
    /// and the hybrid.
    pub fn median_nrmse(&self, signal: &str) -> (f64, f64) {
        let pick = |v: &[SignalComparison]| {
            v.iter()
                .find(|c| c.signal == signal)
                .map_or(f64::NAN, |c| c.nrmse_percent)
        };
        let r: Vec<f64> = self.validation.iter().map(|c| pick(&c.reduced)).collect();
        let h: Vec<f64> = self.validation.iter().map(|c| pick(&c.hybrid)).collect();
        (
            median(&r).unwrap_or(f64::NAN),
            median(&h).unwrap_or(f64::NAN),
        )
    }

    /// Mean over held-out cases and the four signals of the NRMSE (%): reduced, hybrid.
    pub fn mean_nrmse(&self) -> (f64, f64) {
        let mean = |f: &dyn Fn(&CaseValidation) -> &Vec<SignalComparison>| {
            let all: Vec<f64> = self
                .validation
                .iter()
                .flat_map(|c| f(c).iter().map(|s| s.nrmse_percent))
                .collect();
            all.iter().sum::<f64>() / all.len().max(1) as f64
        };
        (mean(&|c| &c.reduced), mean(&|c| &c.hybrid))
    }

    /// Whether every held-out case and signal of the hybrid is within tolerance.
    pub fn passes(&self) -> bool {
        self.validation
            .iter()
            .all(|c| c.hybrid.iter().all(|s| s.within_tolerance))
    }
}

/// A model file of the physics with the given correction.
fn model_file(
    name: &str,
    template: &Template,
    step_s: f64,
    correction: Correction,
    bases: Bases,
    cases: &[&Case],
) -> ModelFile {
    let fold = |f: &dyn Fn(&Case) -> Vec<f64>| {
        cases
            .iter()
            .flat_map(|c| f(c))
            .fold((f64::INFINITY, f64::NEG_INFINITY), |(lo, hi), v| {
                (lo.min(v), hi.max(v))
            })
    };
    let (u_min, u_max) = fold(&|c| {
        c.data
            .v_re
            .iter()
            .zip(&c.data.v_im)
            .map(|(a, b)| a.hypot(*b))
            .collect()
    });
    let (f_min, f_max) = fold(&|c| c.data.f_grid.clone().unwrap_or_else(|| vec![1.0]));
    let (p_min, p_max) = fold(&|c| vec![c.data.p[0]]);
    let (q_min, q_max) = fold(&|c| vec![c.data.q[0]]);
    let first = cases[0];
    ModelFile {
        format: HYBRID_MODEL_FORMAT.into(),
        name: name.into(),
        description: format!(
            "Hybrid surrogate: reduced physics `{}` + linear correction of order {}",
            template.name,
            correction.order()
        ),
        model: ModelKind::Hybrid {
            template: template.clone(),
            internal_step_s: step_s,
            correction,
            operating_range: OperatingRange {
                p_min,
                p_max,
                q_min,
                q_max,
            },
        },
        bases,
        envelope: Envelope {
            u_min,
            u_max: u_max.max(u_min + 1e-6),
            // a frequency range of zero width (no frequency recorded) is widened slightly
            f_min: f_min.min(1.0 - 1e-3),
            f_max: f_max.max(1.0 + 1e-3),
        },
        start: StartValues {
            inputs: first.inputs(0),
            setpoints: Setpoints {
                p_ref: first.data.p[0],
                q_ref: first.data.q[0],
            },
        },
        communication_step_s: step_s,
    }
}

/// Fit the hybrid surrogate on `traces` (name-sorted here) and validate it on the held-out
/// ones. `progress` receives a line per stage.
pub fn fit_hybrid(
    traces: &[(String, Trace)],
    physics: &Physics,
    config: &HybridConfig,
    mut progress: impl FnMut(&str),
) -> Result<HybridOutcome, HybridError> {
    let mut sorted: Vec<&(String, Trace)> = traces.iter().collect();
    sorted.sort_by(|a, b| a.0.cmp(&b.0));
    let cases: Vec<Case> = sorted
        .iter()
        .map(|(n, t)| Case::from_trace(t, n))
        .collect::<Result<_, _>>()?;
    let split = held_out_split(cases.len(), config.held_out_fraction)?;
    let step_s = cases[0].data.step_s;
    for c in &cases {
        if (c.data.step_s - step_s).abs() > 1e-9 * step_s {
            return Err(HybridError::BadTrace {
                trace: c.name.clone(),
                message: format!(
                    "sample step {} s differs from the first trace's {step_s} s",
                    c.data.step_s
                ),
            });
        }
    }
    let training: Vec<&Case> = split.training.iter().map(|&i| &cases[i]).collect();
    let held_out: Vec<Case> = split.held_out.iter().map(|&i| cases[i].clone()).collect();
    let meta = &sorted[0].1.meta;
    let bases = Bases {
        s_base_mva: meta.s_base_mva,
        v_base_kv: meta.v_base_kv,
    };

    progress(&format!(
        "physics: {} training, {} held-out traces",
        training.len(),
        held_out.len()
    ));
    let training_data: Vec<FitTrace> = training.iter().map(|c| c.data.clone()).collect();
    let template = physics_template(physics, &training_data, config)?;
    let reduced_model = model_file(
        "reduced",
        &template,
        step_s,
        Correction::none(),
        bases,
        &training,
    );

    progress("residuals: detailed − physics on the training traces");
    let (residuals, physics_outputs): (Vec<[Vec<f64>; 2]>, Vec<OutputSeries<f64>>) = training
        .par_iter()
        .map(|c| {
            let o = evaluate(&reduced_model, c)?;
            let pf = c.pre_fault().frame();
            let mut rd = Vec::with_capacity(c.data.len());
            let mut rq = Vec::with_capacity(c.data.len());
            for k in 0..c.data.len() {
                let (d, q) =
                    pf.from_network(c.data.i_re[k] - o.i_re[k], c.data.i_im[k] - o.i_im[k]);
                rd.push(d);
                rq.push(q);
            }
            for (signal, r) in [("delta_i_d", &rd), ("delta_i_q", &rq)] {
                if let Some(index) = r.iter().position(|v| !v.is_finite()) {
                    return Err(HybridError::NonFiniteResidual {
                        trace: c.name.clone(),
                        signal,
                        index,
                    });
                }
            }
            Ok(([rd, rq], o))
        })
        .collect::<Result<Vec<_>, HybridError>>()?
        .into_iter()
        .unzip();

    progress(&format!(
        "compressed sensing: DCT keeping {:.1} % of coefficients",
        100.0 * config.keep_fraction
    ));
    let mut err2 = 0.0;
    let mut norm2 = 0.0;
    let mut example_kept = Vec::new();
    for (ci, r) in residuals.iter().enumerate() {
        for (ch, signal) in r.iter().enumerate() {
            let c = compress(signal, config.keep_fraction)?;
            err2 += signal
                .iter()
                .zip(&c.reconstruction)
                .map(|(a, b)| (a - b) * (a - b))
                .sum::<f64>();
            norm2 += signal.iter().map(|a| a * a).sum::<f64>();
            if ci == 0 && ch == 0 {
                example_kept = c.kept_values.iter().map(|v| v.abs()).collect();
            }
        }
    }
    let compression = CompressionSummary {
        keep_fraction: config.keep_fraction,
        relative_error: if norm2 > 0.0 {
            (err2 / norm2).sqrt()
        } else {
            0.0
        },
        example_kept,
    };

    progress(&format!(
        "DMD with control: {} delays, rank {:?}",
        config.delays, config.rank
    ));
    let residual_refs: Vec<&[Vec<f64>; 2]> = residuals.iter().collect();
    let physics_refs: Vec<&OutputSeries<f64>> = physics_outputs.iter().collect();
    let pole_fit = correction_poles(&training, &residual_refs, &physics_refs, config, step_s)?;
    let (choice, cross_validation) = if config.cross_validate {
        progress(&format!(
            "cross-validation: leave one of {} training traces out",
            training.len()
        ));
        let ridges: Vec<f64> = config.ridge.map_or(RIDGE_CANDIDATES.to_vec(), |r| vec![r]);
        let cv = cross_validate(
            &training,
            &residuals,
            &physics_outputs,
            config,
            step_s,
            &ridges,
        )?;
        progress(&format!("cross-validation: {}", cv.summary()));
        (cv.choice, Some(cv))
    } else {
        // without the cross-validation: the correction as fitted, with the dip map
        let choice = CorrectionChoice {
            ridge: config.ridge.unwrap_or(RIDGE_CANDIDATES[0]),
            shrink: [1.0; 2],
            structure: Structure {
                physics_inputs: true,
                dip_map: true,
            },
        };
        (choice, None)
    };
    let poles = &pole_fit.poles;
    let per_input = free_run_correction(poles, &training, &residual_refs, &physics_refs, choice)?;
    let fitted_order = per_input.order();
    // the same transfer function with one state per output (of each map) and pole: what the FMU
    // steps; a correction the cross-validation dropped entirely is exported as none at all
    let correction = if choice.shrink.iter().all(|&s| s == 0.0) {
        Correction::none()
    } else {
        minimal_modal(poles, &per_input)
    };
    let order = correction.order();
    let model = model_file("hybrid", &template, step_s, correction, bases, &training);
    model.validate().map_err(|source| HybridError::Runtime {
        trace: "(model file)".into(),
        source,
    })?;

    progress(&format!(
        "validation: {} held-out traces through the runtime",
        held_out.len()
    ));
    let validation: Vec<CaseValidation> = held_out
        .par_iter()
        .map(|c| {
            let reduced_outputs = evaluate(&reduced_model, c)?;
            let hybrid_outputs = evaluate(&model, c)?;
            Ok(CaseValidation {
                name: c.name.clone(),
                reduced: comparisons(c, &reduced_outputs, &config.windows)?,
                hybrid: comparisons(c, &hybrid_outputs, &config.windows)?,
                reduced_outputs,
                hybrid_outputs,
            })
        })
        .collect::<Result<_, HybridError>>()?;

    let residual_rows = training
        .iter()
        .zip(&residuals)
        .map(|(c, r)| (c.name.clone(), r[0].clone()))
        .collect();
    Ok(HybridOutcome {
        model,
        reduced_model,
        training: training.iter().map(|c| c.name.clone()).collect(),
        validation,
        held_out_cases: held_out,
        compression,
        order,
        fitted_order,
        rank: pole_fit.fit.rank,
        delays: config.delays,
        discrete_eigenvalues: pole_fit.discrete.eigenvalues()?,
        moved_to_real_axis: pole_fit.moved_to_real_axis,
        stability: pole_fit.fit.stability,
        cross_validation,
        residual_rows,
        residual_time_s: training[0].time_s.clone(),
        windows: config.windows,
    })
}

/// One continuous-time pole per mode of the discrete correction (s = ln λ / Δt), one of each
/// conjugate pair (the one with positive imaginary part).
fn continuous_poles(discrete: &[Complex64], dt_s: f64) -> Vec<Complex64> {
    let radius = discrete.iter().map(|v| v.norm()).fold(0.0, f64::max);
    discrete
        .iter()
        .filter(|v| v.im >= -1e-12 * radius.max(1.0))
        .map(|v| {
            let s = v.ln() / dt_s;
            if v.im.abs() <= 1e-12 * radius.max(1.0) {
                Complex64::new(s.re, 0.0)
            } else {
                s
            }
        })
        .collect()
}

/// (A, B) of the per-input modal realisation of `poles`: per input j one block of modal states
/// (a real pole s: dz/dt = s z + u_j; a pair σ ± jω: [[σ, ω], [−ω, σ]] driven through (1, 0)),
/// of order N_INPUTS × (states per input).
fn per_input_realisation(poles: &[Complex64]) -> (DMatrix<f64>, DMatrix<f64>) {
    let block: usize = poles.iter().map(|p| if p.im == 0.0 { 1 } else { 2 }).sum();
    let n = block * N_INPUTS;
    let mut a = DMatrix::zeros(n, n);
    let mut b = DMatrix::zeros(n, N_INPUTS);
    for j in 0..N_INPUTS {
        let mut at = j * block;
        for p in poles {
            a[(at, at)] = p.re;
            b[(at, j)] = 1.0;
            if p.im == 0.0 {
                at += 1;
            } else {
                a[(at + 1, at + 1)] = p.re;
                a[(at, at + 1)] = p.im;
                a[(at + 1, at)] = -p.im;
                at += 2;
            }
        }
    }
    (a, b)
}

/// The correction fitted for free run, as the surrogate runs it (open loop, from the inputs).
///
/// DMD with control fits one-step prediction with the residual itself as state; run open loop,
/// its errors add up. Here DMD only supplies the dynamics (its poles). The correction is the
/// realisation, per input j, of the modal blocks of those poles (a real pole s: dz/dt = s z + u_j;
/// a pair σ ± jω: [[σ, ω], [−ω, σ]] driven through (1, 0), controllable for ω ≠ 0), so that
/// C (sI − A)⁻¹ B + D spans every transfer function with these poles. The states are
/// simulated from the training inputs alone by the runtime's own stepper (exact ZOH, the code
/// the FMU runs), and C and D are the ridge-regularised linear least squares of the residual on
/// [z, u] over all training traces: the exact minimiser of the free-run training error for
/// the given poles (ridge regression, Hoerl & Kennard, Technometrics 12(1), 1970; features
/// scaled to unit RMS first).
fn free_run_correction(
    poles: &[Complex64],
    training: &[&Case],
    residuals: &[&[Vec<f64>; 2]],
    physics: &[&OutputSeries<f64>],
    choice: CorrectionChoice,
) -> Result<Correction, HybridError> {
    let CorrectionChoice {
        ridge,
        shrink,
        structure,
    } = choice;
    let (a, b) = per_input_realisation(poles);
    let n = a.nrows();
    let range = input_range(training, physics);
    let per_trace: Vec<Features> = free_run_features(poles, training, residuals, physics, &range)?
        .into_iter()
        .map(|f| masked(f, structure))
        .collect();
    let all: Vec<&Features> = per_trace.iter().collect();
    // θ: features × outputs, rows [z, u], then [z, u] again for the dip map when it is there
    // (see `free_run_features` and `masked`)
    let theta = output_map(&all, ridge)?;
    let outputs = CORRECTION_OUTPUTS.len();
    let part = |at: usize, cols: usize| {
        rows_of(&DMatrix::from_fn(outputs, cols, |k, i| {
            shrink[k] * theta[(at + i, k)]
        }))
    };
    let w = n + N_INPUTS;
    let (c_dip, d_dip) = if structure.dip_map {
        (part(w, n), part(w + n, N_INPUTS))
    } else {
        (Vec::new(), Vec::new())
    };
    Ok(Correction {
        a: rows_of(&a),
        b: rows_of(&b),
        c: part(0, n),
        d: part(n, N_INPUTS),
        c_dip,
        d_dip,
        input_range: range,
    })
}

/// The poles of the correction and what their fit reports.
struct PoleFit {
    fit: crate::residual::dmd::DmdFit,
    discrete: crate::residual::dmd::LinearModel,
    moved_to_real_axis: Vec<MovedEigenvalue>,
    poles: Vec<Complex64>,
}

/// DMD with control on the delay-embedded residuals of `cases`, driven by the correction's
/// inputs; stability enforced; its poles in continuous time.
fn correction_poles(
    cases: &[&Case],
    residuals: &[&[Vec<f64>; 2]],
    physics: &[&OutputSeries<f64>],
    config: &HybridConfig,
    step_s: f64,
) -> Result<PoleFit, HybridError> {
    // one snapshot matrix of all training traces, side by side; the one spurious transition
    // between two traces joins a settled end (residual and input near 0) to a steady start
    // (exactly 0), so it carries almost nothing
    let mut states: Vec<DMatrix<f64>> = Vec::new();
    let mut inputs: Vec<DMatrix<f64>> = Vec::new();
    // the raw residuals, not their DCT compression: kept at 5 %, the compression loses more than
    // half of the residual's energy (see the report), which the correction needs
    for ((c, r), o) in cases.iter().zip(residuals).zip(physics) {
        let n = c.data.len();
        let series = DMatrix::from_fn(2, n, |ch, k| r[ch][k]);
        let pf = c.pre_fault().frame();
        let u = DMatrix::from_fn(N_INPUTS, n, |row, k| c.correction_input(&pf, o, k)[row]);
        let e = delay_embed(&series, &u, config.delays, 1)?;
        states.push(e.states);
        inputs.push(e.inputs);
    }
    let concat = |ms: &[DMatrix<f64>]| {
        let rows = ms[0].nrows();
        let cols: usize = ms.iter().map(|m| m.ncols()).sum();
        let mut out = DMatrix::zeros(rows, cols);
        let mut at = 0;
        for m in ms {
            out.columns_mut(at, m.ncols()).copy_from(m);
            at += m.ncols();
        }
        out
    };
    let snapshots = concat(&states);
    let input_matrix = concat(&inputs);
    let dmd_config = DmdConfig::default()
        .with_rank(config.rank)?
        .with_stability_margin(config.stability_margin)?
        .with_enforce_stability(config.enforce_stability);
    let fit = fit_dmdc(&snapshots, &input_matrix, step_s, &dmd_config)?;
    if !config.enforce_stability && fit.stability.spectral_radius > 1.0 {
        return Err(HybridError::Unstable {
            radius: fit.stability.spectral_radius,
        });
    }
    // a real eigenvalue ≤ 0 has no continuous-time counterpart at this sample step: it is
    // moved to its modulus (same decay, no sign flip every sample) and reported
    let (discrete, moved_to_real_axis) = fit.model.without_negative_real(1e-3)?;
    let poles = continuous_poles(&discrete.eigenvalues()?, step_s);
    Ok(PoleFit {
        fit,
        discrete,
        moved_to_real_axis,
        poles,
    })
}

/// Per correction input, its [min, max] over every sample of `cases`.
fn input_range(cases: &[&Case], physics: &[&OutputSeries<f64>]) -> Vec<[f64; 2]> {
    let mut range = vec![[f64::INFINITY, f64::NEG_INFINITY]; N_INPUTS];
    for (c, o) in cases.iter().zip(physics) {
        let pf = c.pre_fault().frame();
        for k in 0..c.data.len() {
            for (r, x) in range.iter_mut().zip(c.correction_input(&pf, o, k)) {
                *r = [r[0].min(x), r[1].max(x)];
            }
        }
    }
    range
}

/// `features` (see [`free_run_features`]) of the given structure: without the physics'
/// inputs their columns (their states and their inputs, in both halves) are zero, without the
/// dip map its half is cut off. A zero column gets a zero row in the output map
/// ([`output_map`]), so the correction is the one fitted without those features.
fn masked(features: Features, structure: Structure) -> Features {
    let (mut phi, y) = features;
    let w = phi.ncols() / 2;
    if !structure.physics_inputs {
        let n = w - N_INPUTS;
        let block = n / N_INPUTS;
        for half in [0, w] {
            for j in PHYSICS_INPUTS {
                phi.columns_mut(half + j * block, block).fill(0.0);
                phi.column_mut(half + n + j).fill(0.0);
            }
        }
    }
    if structure.dip_map {
        (phi, y)
    } else {
        (phi.columns(0, w).into_owned(), y)
    }
}

/// Features [z_k, u_k, g_k·z_k, g_k·u_k] (samples × 2·(order + inputs)), g_k = 1 while the
/// terminal voltage is in a dip ([`in_dip`]) and 0 otherwise, and targets (samples × outputs)
/// of one trace.
type Features = (DMatrix<f64>, DMatrix<f64>);

/// The states of the per-input realisation of `poles` simulated from each trace's inputs alone
/// by the runtime's own stepper, as the runtime produces them (output at sample k from z_k and
/// u_k, then a step over the sample step with u_k held), beside the residual to fit.
fn free_run_features(
    poles: &[Complex64],
    cases: &[&Case],
    residuals: &[&[Vec<f64>; 2]],
    physics: &[&OutputSeries<f64>],
    range: &[[f64; 2]],
) -> Result<Vec<Features>, HybridError> {
    let (a, b) = per_input_realisation(poles);
    let n = a.nrows();
    let outputs = CORRECTION_OUTPUTS.len();
    let unfitted = Correction {
        a: rows_of(&a),
        b: rows_of(&b),
        c: rows_of(&DMatrix::zeros(outputs, n)),
        d: Vec::new(),
        c_dip: Vec::new(),
        d_dip: Vec::new(),
        input_range: range.to_vec(),
    };
    let stepper = CorrectionStepper::new(&unfitted).map_err(|e| HybridError::Runtime {
        trace: "(correction)".into(),
        source: CoSimError::ModelFile(e.to_string()),
    })?;
    Ok(cases
        .par_iter()
        .zip(residuals)
        .zip(physics)
        .map(|((c, r), o)| {
            let mut stepper = stepper.clone();
            let pf = c.pre_fault().frame();
            let len = c.data.len();
            let w = n + N_INPUTS;
            let mut phi = DMatrix::zeros(len, 2 * w);
            let mut z = vec![0.0; n];
            for k in 0..len {
                let u = stepper.bounded(c.correction_input(&pf, o, k));
                let dip = in_dip(c.data.v_re[k], c.data.v_im[k]);
                for (col, v) in z.iter().chain(u.iter()).enumerate() {
                    phi[(k, col)] = *v;
                    if dip {
                        phi[(k, w + col)] = *v;
                    }
                }
                if k + 1 < len {
                    stepper.step(&mut z, &u, c.time_s[k + 1] - c.time_s[k]);
                }
            }
            let y = DMatrix::from_fn(len, outputs, |k, ch| r[ch][k]);
            (phi, y)
        })
        .collect())
}

/// The output map [C D]ᵀ (features × outputs): ridge-regularised linear least squares of the
/// residual on the features over all given traces (ridge regression, Hoerl & Kennard,
/// Technometrics 12(1), 1970; features scaled to unit RMS first, the ridge relative to the
/// mean diagonal of the scaled normal matrix).
fn output_map(per_trace: &[&Features], ridge: f64) -> Result<DMatrix<f64>, HybridError> {
    let p = per_trace[0].0.ncols();
    let outputs = per_trace[0].1.ncols();
    let mut gram = DMatrix::<f64>::zeros(p, p);
    let mut rhs = DMatrix::<f64>::zeros(p, outputs);
    for (phi, y) in per_trace {
        gram += phi.transpose() * phi;
        rhs += phi.transpose() * y;
    }
    // scale every feature to unit RMS (an unexcited feature keeps scale 1 and gets weight 0
    // from the ridge)
    let scale: Vec<f64> = (0..p)
        .map(|i| {
            let s = gram[(i, i)].sqrt();
            if s > 0.0 {
                1.0 / s
            } else {
                1.0
            }
        })
        .collect();
    let s = DMatrix::from_diagonal(&nalgebra::DVector::from_vec(scale));
    let mut g = &s * &gram * &s;
    // over the features present (a zero column, see `masked`, adds nothing to the scale)
    let present = (0..p).filter(|&i| gram[(i, i)] > 0.0).count().max(1);
    let mean_diag = g.trace() / present as f64;
    for i in 0..p {
        g[(i, i)] += ridge.max(1e-12) * mean_diag;
    }
    let theta_scaled = g
        .cholesky()
        .ok_or(HybridError::OutputMap { features: p, ridge })?
        .solve(&(&s * &rhs));
    Ok(&s * theta_scaled)
}

/// Mean over P, Q, i_p, i_q of the NRMSE (% of rating) of the physics' outputs on `case` plus a
/// current correction (Δi_d, Δi_q) in the pre-fault frame, combined as the runtime combines
/// them ([`Outputs::plus_current`]), against the recorded trace: the validation's own
/// comparison ([`comparisons`]).
fn corrected_nrmse(
    case: &Case,
    physics: &OutputSeries<f64>,
    di_d: &dyn Fn(usize) -> f64,
    di_q: &dyn Fn(usize) -> f64,
    windows: &WindowConfig,
) -> Result<f64, HybridError> {
    let d = &case.data;
    let n = d.len();
    let pf = case.pre_fault().frame();
    let mut corrected = OutputSeries {
        i_re: Vec::with_capacity(n),
        i_im: Vec::with_capacity(n),
        p: Vec::with_capacity(n),
        q: Vec::with_capacity(n),
    };
    for k in 0..n {
        let (dr, di) = pf.to_network(di_d(k), di_q(k));
        let o = Outputs {
            i_re: physics.i_re[k],
            i_im: physics.i_im[k],
            p: physics.p[k],
            q: physics.q[k],
        }
        .plus_current(d.v_re[k], d.v_im[k], dr, di);
        corrected.i_re.push(o.i_re);
        corrected.i_im.push(o.i_im);
        corrected.p.push(o.p);
        corrected.q.push(o.q);
    }
    let signals = comparisons(case, &corrected, windows)?;
    Ok(signals.iter().map(|c| c.nrmse_percent).sum::<f64>() / signals.len() as f64)
}

/// Leave-one-trace-out cross-validation of the correction (see [`CrossValidation`]) over the
/// structures of the output map ([`Structure::ALL`]), the ridge candidates `ridges` and the
/// output shrink factors [`SHRINK_CANDIDATES`]; the choice is the smallest mean NRMSE over the
/// left-out traces (on a tie the smaller shrink, then the simpler structure and the larger ridge: the
/// more cautious correction).
fn cross_validate(
    training: &[&Case],
    residuals: &[[Vec<f64>; 2]],
    physics: &[OutputSeries<f64>],
    config: &HybridConfig,
    step_s: f64,
    ridges: &[f64],
) -> Result<CrossValidation, HybridError> {
    let m = training.len();
    let shrinks = SHRINK_CANDIDATES.len();
    // the candidates in order: the simplest structure first, each over the ridges
    let candidates: Vec<(Structure, f64)> = Structure::ALL
        .iter()
        .flat_map(|&st| ridges.iter().map(move |&r| (st, r)))
        .collect();
    // per fold: the physics' NRMSE and, per candidate, per (shrink d, shrink q), the hybrid's
    type Fold = (f64, Vec<Vec<f64>>);
    let folds: Vec<Fold> = (0..m)
        .into_par_iter()
        .map(|out| {
            let keep: Vec<usize> = (0..m).filter(|&i| i != out).collect();
            let cases: Vec<&Case> = keep.iter().map(|&i| training[i]).collect();
            let res: Vec<&[Vec<f64>; 2]> = keep.iter().map(|&i| &residuals[i]).collect();
            let phys: Vec<&OutputSeries<f64>> = keep.iter().map(|&i| &physics[i]).collect();
            let poles = correction_poles(&cases, &res, &phys, config, step_s)?.poles;
            let left = training[out];
            // the left-out trace's inputs are held inside the range of the fold's own traces
            let range = input_range(&cases, &phys);
            let mut features = free_run_features(
                &poles,
                &[left],
                &[&residuals[out]],
                &[&physics[out]],
                &range,
            )?;
            let left_features = features.pop().expect("one trace in, one out");
            let train = free_run_features(&poles, &cases, &res, &phys, &range)?;
            let zero = |_: usize| 0.0;
            let reduced = corrected_nrmse(left, &physics[out], &zero, &zero, &config.windows)?;
            let mut per_candidate = Vec::with_capacity(candidates.len());
            for structure in Structure::ALL {
                let train: Vec<Features> =
                    train.iter().map(|f| masked(f.clone(), structure)).collect();
                let train_refs: Vec<&Features> = train.iter().collect();
                let (phi_left, _) = masked(left_features.clone(), structure);
                for &ridge in ridges {
                    let prediction = &phi_left * output_map(&train_refs, ridge)?;
                    let mut scores = Vec::with_capacity(shrinks * shrinks);
                    for sd in SHRINK_CANDIDATES {
                        for sq in SHRINK_CANDIDATES {
                            scores.push(corrected_nrmse(
                                left,
                                &physics[out],
                                &|k| sd * prediction[(k, 0)],
                                &|k| sq * prediction[(k, 1)],
                                &config.windows,
                            )?);
                        }
                    }
                    per_candidate.push(scores);
                }
            }
            Ok((reduced, per_candidate))
        })
        .collect::<Result<_, HybridError>>()?;
    let mean = |f: &dyn Fn(&Fold) -> f64| folds.iter().map(f).sum::<f64>() / m as f64;
    let reduced_percent = mean(&|f| f.0);
    let full = (shrinks - 1) * shrinks + (shrinks - 1);
    let shrink_of = |si: usize| {
        [
            SHRINK_CANDIDATES[si / shrinks],
            SHRINK_CANDIDATES[si % shrinks],
        ]
    };
    let mut rows = Vec::with_capacity(candidates.len());
    // (score, total shrink, candidate index, shrink index)
    let mut best: Option<(f64, f64, usize, usize)> = None;
    for (ci, &(structure, ridge)) in candidates.iter().enumerate() {
        let scores: Vec<f64> = (0..shrinks * shrinks)
            .map(|si| mean(&|f| f.1[ci][si]))
            .collect();
        // shrink pairs in order of total shrink factor, so a tie keeps the smaller
        let total = |i: usize| shrink_of(i).iter().sum::<f64>();
        let mut order: Vec<usize> = (0..shrinks * shrinks).collect();
        order.sort_by(|&a, &b| total(a).total_cmp(&total(b)));
        let si = order
            .into_iter()
            .min_by(|&a, &b| scores[a].total_cmp(&scores[b]))
            .expect("shrink candidates");
        rows.push(CvRow {
            ridge,
            structure,
            fitted_percent: scores[full],
            shrink: shrink_of(si),
            shrunk_percent: scores[si],
        });
        // better score wins; on a tie the smaller shrink, then (candidates run from the
        // simplest structure and the smallest ridge) the later ridge of the same structure
        let better = match best {
            None => true,
            Some((s, t, bci, _)) => match scores[si].total_cmp(&s).then(total(si).total_cmp(&t)) {
                std::cmp::Ordering::Less => true,
                std::cmp::Ordering::Equal => candidates[bci].0 == structure,
                std::cmp::Ordering::Greater => false,
            },
        };
        if better {
            best = Some((scores[si], total(si), ci, si));
        }
    }
    let (hybrid_percent, _, ci, si) = best.expect("at least one candidate");
    Ok(CrossValidation {
        folds: m,
        reduced_percent,
        rows,
        choice: CorrectionChoice {
            ridge: candidates[ci].1,
            shrink: shrink_of(si),
            structure: candidates[ci].0,
        },
        hybrid_percent,
    })
}

/// The correction of [`free_run_correction`] (per input j, one modal block per pole, output map
/// C fitted) realised with one state per output and pole: the same transfer function
/// C (sI − A)⁻¹ B + D and, from z = 0, the same output for every input (exact, not a
/// truncation), of order 2·(modes) instead of N_INPUTS·(modes). With a dip map C_dip, its two
/// outputs are realised the same way beside C's (order 4·(modes)), C reading the first
/// states of each pole and C_dip the others.
///
/// Why it is exact: per pole, y gets Σ_j c_j x_j with x_j driven by u_j alone through the same
/// pole; ξ = Σ_j c_j x_j obeys the pole's own dynamics driven by Σ_j c_j u_j (residue form of a
/// partial-fraction expansion, e.g. Kailath, Linear Systems, 1980, §6.1). For a real pole s:
/// dξ/dt = s ξ + R u, y = ξ, R = [c_1 … c_6] (2 × 6). For a pair σ ± jω with the per-input
/// block [[σ, ω], [−ω, σ]] driven through (1, 0): ζ_j = x_j1 − j·x_j2 obeys
/// dζ_j/dt = (σ + jω) ζ_j + u_j and c_j·x_j = Re(w_j ζ_j) with w_j = c_j1 + j·c_j2, so per
/// output k the complex state ξ_k = Σ_j w_kj ζ_j = a_k + j·b_k gives
/// da_k/dt = σ a_k − ω b_k + Re(w_k)·u, db_k/dt = ω a_k + σ b_k + Im(w_k)·u, y_k = a_k.
/// The result is block diagonal with 1×1 and 2×2 blocks, which the runtime steps in O(order).
pub fn minimal_modal(poles: &[Complex64], per_input: &Correction) -> Correction {
    let (_, _, c_plain, d) = per_input
        .matrices()
        .expect("free_run_correction builds consistent matrices");
    let (c_dip_full, d_dip) = per_input
        .dip_matrices()
        .expect("free_run_correction builds consistent matrices");
    let outputs = CORRECTION_OUTPUTS.len();
    let gated = !per_input.c_dip.is_empty();
    // the channels realised: the outputs of C, then (when there is one) those of C_dip, each
    // with its own states; C and C_dip each read their own channels
    let c_full = if gated {
        let mut both = DMatrix::zeros(2 * outputs, c_plain.ncols());
        both.rows_mut(0, outputs).copy_from(&c_plain);
        both.rows_mut(outputs, outputs).copy_from(&c_dip_full);
        both
    } else {
        c_plain
    };
    let channels = c_full.nrows();
    let block: usize = poles.iter().map(|p| if p.im == 0.0 { 1 } else { 2 }).sum();
    assert_eq!(
        c_full.ncols(),
        block * N_INPUTS,
        "per-input realisation order"
    );
    let n = block * channels;
    let mut a = DMatrix::zeros(n, n);
    let mut b = DMatrix::zeros(n, N_INPUTS);
    let mut c = DMatrix::zeros(channels, n);
    // `at`: first state of this pole in each input's block; `to`: first new state of it
    let (mut at, mut to) = (0, 0);
    for p in poles {
        if p.im == 0.0 {
            for k in 0..channels {
                a[(to + k, to + k)] = p.re;
                c[(k, to + k)] = 1.0;
                for j in 0..N_INPUTS {
                    b[(to + k, j)] = c_full[(k, j * block + at)];
                }
            }
            at += 1;
            to += channels;
        } else {
            for k in 0..channels {
                let (re, im) = (to + 2 * k, to + 2 * k + 1);
                a[(re, re)] = p.re;
                a[(im, im)] = p.re;
                a[(re, im)] = -p.im;
                a[(im, re)] = p.im;
                c[(k, re)] = 1.0;
                for j in 0..N_INPUTS {
                    b[(re, j)] = c_full[(k, j * block + at)];
                    b[(im, j)] = c_full[(k, j * block + at + 1)];
                }
            }
            at += 2;
            to += 2 * channels;
        }
    }
    let (c_dip, d_dip) = if gated {
        (
            rows_of(&c.rows(outputs, outputs).into_owned()),
            rows_of(&d_dip),
        )
    } else {
        (Vec::new(), Vec::new())
    };
    Correction {
        a: rows_of(&a),
        b: rows_of(&b),
        c: rows_of(&c.rows(0, outputs).into_owned()),
        d: rows_of(&d),
        c_dip,
        d_dip,
        input_range: per_input.input_range.clone(),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn minimal_modal_realisation_gives_the_same_output_as_the_per_input_one() {
        // two real poles and two pairs, a per-input realisation (order 6 × 8 = 48) with an
        // arbitrary output map, driven by the same piecewise-constant inputs from z = 0 through
        // the runtime's stepper: the outputs agree to rounding (1e-12 of their scale), the
        // order falls to 4 × 6 = 24 (two outputs of C, two of C_dip)
        let poles = [
            Complex64::new(-5.0, 0.0),
            Complex64::new(-40.0, 0.0),
            Complex64::new(-3.0, 25.0),
            Complex64::new(-12.0, 140.0),
        ];
        let (a, b) = per_input_realisation(&poles);
        let n = a.nrows();
        assert_eq!(n, 6 * N_INPUTS);
        let c = DMatrix::from_fn(2, n, |i, j| ((3 * i + 7 * j) as f64 * 0.37).sin());
        let d = DMatrix::from_fn(2, N_INPUTS, |i, j| 0.1 * (i + j) as f64);
        let c_dip = DMatrix::from_fn(2, n, |i, j| ((5 * i + 3 * j) as f64 * 0.21).cos());
        let d_dip = DMatrix::from_fn(2, N_INPUTS, |i, j| 0.05 * (i * j) as f64);
        let full = Correction {
            a: rows_of(&a),
            b: rows_of(&b),
            c: rows_of(&c),
            d: rows_of(&d),
            c_dip: rows_of(&c_dip),
            d_dip: rows_of(&d_dip),
            input_range: Vec::new(),
        };
        let small = minimal_modal(&poles, &full);
        // two outputs of C and two of C_dip per state of a pole
        assert_eq!(small.order(), 24);
        let mut s_full = CorrectionStepper::new(&full).unwrap();
        let mut s_small = CorrectionStepper::new(&small).unwrap();
        let (mut z_full, mut z_small) = (vec![0.0; n], vec![0.0; 24]);
        let (mut worst, mut scale) = (0.0f64, 0.0f64);
        for k in 0..400 {
            let u: [f64; N_INPUTS] =
                std::array::from_fn(|j| ((k / 37 + j) as f64 * 1.3).sin() * (j + 1) as f64);
            // in and out of a dip every 50 samples
            let dip = (k / 50) % 2 == 1;
            let (yf, ys) = (
                s_full.output(&z_full, &u, dip),
                s_small.output(&z_small, &u, dip),
            );
            worst = worst.max((yf.0 - ys.0).abs()).max((yf.1 - ys.1).abs());
            scale = scale.max(yf.0.abs()).max(yf.1.abs());
            s_full.step(&mut z_full, &u, 1e-3);
            s_small.step(&mut z_small, &u, 1e-3);
        }
        assert!(scale > 0.1, "the test excites the outputs: {scale}");
        assert!(worst <= 1e-12 * scale, "{worst:e} of {scale}");
        // block diagonal with 1×1 and 2×2 blocks: the stepper keeps 1 + 1 + 4 + 4 = 10
        // entries of Φ per channel (four: two of C, two of C_dip), not 24² = 576
        assert_eq!(s_small.phi_entries(), Some(4 * (1 + 1 + 4 + 4)));
    }
}

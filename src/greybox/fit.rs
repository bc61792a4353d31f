//! A template fitted to many traces at once: residuals on i_re, i_im, p, q, exact Jacobian
//! from dual numbers, parallel over traces.

use super::GreyboxError;
use crate::fit::{LeastSquaresModel, ModelError};
use crate::signal::trace::Trace;
use nalgebra::{DMatrix, DVector};
use rayon::prelude::*;
use understudy_runtime::block::{
    BlockModel, Dual, EvalConfig, InitialOutputs, InputSeries, OutputSeries, Scalar, Template,
};

/// Number of Jacobian columns one dual-number simulation carries.
const CHUNK: usize = 8;

/// The recorded channels a fit uses (per unit, network frame, generator convention).
#[derive(Debug, Clone, PartialEq)]
pub struct FitTrace {
    pub name: String,
    pub step_s: f64,
    pub v_re: Vec<f64>,
    pub v_im: Vec<f64>,
    pub f_grid: Option<Vec<f64>>,
    pub i_re: Vec<f64>,
    pub i_im: Vec<f64>,
    pub p: Vec<f64>,
    pub q: Vec<f64>,
}

impl FitTrace {
    /// Take the standard channels of a trace; `name` labels errors.
    pub fn from_trace(trace: &Trace, name: &str) -> Result<Self, GreyboxError> {
        let bad = |message: String| GreyboxError::BadTrace {
            trace: name.into(),
            message,
        };
        let step_s = trace
            .uniform_step_s()
            .ok_or_else(|| bad("needs at least two uniformly spaced samples".into()))?;
        let get = |ch: &str| -> Result<Vec<f64>, GreyboxError> {
            let c = trace
                .channel(ch)
                .ok_or_else(|| bad(format!("has no channel `{ch}`")))?;
            if let Some(k) = c.iter().position(|v| !v.is_finite()) {
                return Err(bad(format!("channel `{ch}` is not finite at sample {k}")));
            }
            Ok(c.to_vec())
        };
        Ok(Self {
            name: name.into(),
            step_s,
            v_re: get("v_re")?,
            v_im: get("v_im")?,
            f_grid: trace.channel("f_grid").map(<[f64]>::to_vec),
            i_re: get("i_re")?,
            i_im: get("i_im")?,
            p: get("p")?,
            q: get("q")?,
        })
    }

    pub fn len(&self) -> usize {
        self.v_re.len()
    }

    pub fn is_empty(&self) -> bool {
        self.v_re.is_empty()
    }

    fn input(&self) -> InputSeries<'_> {
        InputSeries {
            step_s: self.step_s,
            v_re: &self.v_re,
            v_im: &self.v_im,
            f_grid: self.f_grid.as_deref(),
            initial: InitialOutputs {
                p: self.p[0],
                q: self.q[0],
                i_re: self.i_re[0],
                i_im: self.i_im[0],
            },
        }
    }

    fn data(&self, signal: usize) -> &[f64] {
        match signal {
            0 => &self.i_re,
            1 => &self.i_im,
            2 => &self.p,
            _ => &self.q,
        }
    }
}

/// Weight of each output's residuals (divide by the noise scale of that signal).
#[derive(Debug, Clone, Copy, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct SignalWeights {
    pub i_re: f64,
    pub i_im: f64,
    pub p: f64,
    pub q: f64,
}

impl Default for SignalWeights {
    fn default() -> Self {
        Self {
            i_re: 1.0,
            i_im: 1.0,
            p: 1.0,
            q: 1.0,
        }
    }
}

impl SignalWeights {
    fn get(&self, signal: usize) -> f64 {
        [self.i_re, self.i_im, self.p, self.q][signal]
    }
}

fn series<S>(o: &OutputSeries<S>, signal: usize) -> &[S] {
    match signal {
        0 => &o.i_re,
        1 => &o.i_im,
        2 => &o.p,
        _ => &o.q,
    }
}

/// A template and the traces it is fitted to: a [`LeastSquaresModel`] in the logarithms of the
/// template's free parameters. Residuals are ordered trace by trace, within a trace signal by
/// signal (i_re, i_im, p, q), within a signal sample by sample: r = weight·(model − data).
#[derive(Debug, Clone)]
pub struct TemplateFit {
    model: BlockModel,
    traces: Vec<FitTrace>,
    weights: SignalWeights,
    eval: EvalConfig,
    /// first residual of each trace
    offsets: Vec<usize>,
    count: usize,
}

impl TemplateFit {
    pub fn new(
        template: &Template,
        traces: Vec<FitTrace>,
        weights: SignalWeights,
        eval: EvalConfig,
    ) -> Result<Self, GreyboxError> {
        if traces.is_empty() {
            return Err(GreyboxError::NoTraces);
        }
        let model = BlockModel::compile(template).map_err(|source| GreyboxError::Invalid {
            origin: template.name.clone(),
            source: Box::new(source),
        })?;
        let mut offsets = Vec::with_capacity(traces.len());
        let mut count = 0;
        for t in &traces {
            if t.len() < 2 {
                return Err(GreyboxError::BadTrace {
                    trace: t.name.clone(),
                    message: "needs at least two samples".into(),
                });
            }
            offsets.push(count);
            count += 4 * t.len();
        }
        Ok(Self {
            model,
            traces,
            weights,
            eval,
            offsets,
            count,
        })
    }

    pub fn model(&self) -> &BlockModel {
        &self.model
    }

    pub fn traces(&self) -> &[FitTrace] {
        &self.traces
    }

    pub fn weights(&self) -> SignalWeights {
        self.weights
    }

    pub fn eval_config(&self) -> EvalConfig {
        self.eval
    }

    /// ln of the template's declared values of its free parameters (the usual fit start).
    pub fn start_log_params(&self) -> Vec<f64> {
        self.model
            .free_parameter_values()
            .iter()
            .map(|v| v.ln())
            .collect()
    }

    /// The template with its free parameters set to exp(`log_params`) (clamped to the bounds).
    pub fn template_at(&self, log_params: &[f64]) -> Template {
        let mut t = self.model.template().clone();
        for (name, (lp, (lo, hi))) in self
            .model
            .free_parameter_names()
            .iter()
            .zip(log_params.iter().zip(self.model.free_parameter_bounds()))
        {
            if let Some(p) = t.parameter_mut(name) {
                p.value = lp.exp().clamp(lo, hi);
            }
        }
        t
    }

    /// Model outputs on every trace at `log_params`.
    pub fn predict(&self, log_params: &[f64]) -> Vec<OutputSeries<f64>> {
        let params: Vec<f64> = log_params.iter().map(|x| x.exp()).collect();
        self.traces
            .par_iter()
            .map(|t| self.model.simulate(&params, &t.input(), &self.eval))
            .collect()
    }

    /// Normalised RMS error of (i_re, i_im, p, q) pooled over all traces: RMS of (model − data)
    /// divided by the range (max − min) of the data.
    pub fn nrmse(&self, log_params: &[f64]) -> [f64; 4] {
        let predictions = self.predict(log_params);
        let mut out = [0.0; 4];
        for (signal, o) in out.iter_mut().enumerate() {
            let (mut sum, mut n) = (0.0, 0usize);
            let (mut lo, mut hi) = (f64::INFINITY, f64::NEG_INFINITY);
            for (t, pred) in self.traces.iter().zip(&predictions) {
                for (m, d) in series(pred, signal).iter().zip(t.data(signal)) {
                    sum += (m - d) * (m - d);
                    lo = lo.min(*d);
                    hi = hi.max(*d);
                }
                n += t.len();
            }
            *o = (sum / n as f64).sqrt() / (hi - lo).max(f64::MIN_POSITIVE);
        }
        out
    }

    fn write_residuals<S: Scalar>(&self, trace: usize, o: &OutputSeries<S>, out: &mut [S]) {
        let t = &self.traces[trace];
        let n = t.len();
        for signal in 0..4 {
            let w = self.weights.get(signal);
            for (k, (m, d)) in series(o, signal).iter().zip(t.data(signal)).enumerate() {
                out[signal * n + k] = (*m - S::cst(*d)).scale(w);
            }
        }
    }

    /// J·v: the derivative of the residuals along the log-parameter direction v, from one
    /// single-direction dual simulation per trace.
    pub fn jacobian_times(&self, log_params: &[f64], direction: &[f64]) -> DVector<f64> {
        let params: Vec<Dual<1>> = log_params
            .iter()
            .zip(direction)
            .map(|(lp, v)| {
                let p = lp.exp();
                // ∂p/∂θ = p
                Dual::seeded(p, 0, p * v)
            })
            .collect();
        let parts: Vec<Vec<Dual<1>>> = (0..self.traces.len())
            .into_par_iter()
            .map(|ti| {
                let o = self
                    .model
                    .simulate(&params, &self.traces[ti].input(), &self.eval);
                let mut r = vec![Dual::cst(0.0); 4 * self.traces[ti].len()];
                self.write_residuals(ti, &o, &mut r);
                r
            })
            .collect();
        DVector::from_iterator(self.count, parts.into_iter().flatten().map(|d| d.d[0]))
    }
}

impl LeastSquaresModel for TemplateFit {
    fn parameter_names(&self) -> Vec<String> {
        self.model.free_parameter_names()
    }

    fn residual_count(&self) -> usize {
        self.count
    }

    fn residuals(&self, log_params: &[f64], out: &mut [f64]) -> Result<(), ModelError> {
        let params: Vec<f64> = log_params.iter().map(|x| x.exp()).collect();
        let parts: Vec<(usize, Vec<f64>)> = (0..self.traces.len())
            .into_par_iter()
            .map(|ti| {
                let o = self
                    .model
                    .simulate(&params, &self.traces[ti].input(), &self.eval);
                let mut r = vec![0.0; 4 * self.traces[ti].len()];
                self.write_residuals(ti, &o, &mut r);
                (ti, r)
            })
            .collect();
        for (ti, r) in parts {
            out[self.offsets[ti]..self.offsets[ti] + r.len()].copy_from_slice(&r);
        }
        Ok(())
    }

    /// Exact derivatives of the discrete simulation: dual numbers carrying 8 directions at a
    /// time, parallel over (trace, group of 8 parameters).
    fn jacobian(&self, log_params: &[f64]) -> Option<Result<DMatrix<f64>, ModelError>> {
        let n = log_params.len();
        let values: Vec<f64> = log_params.iter().map(|x| x.exp()).collect();
        let chunks = n.div_ceil(CHUNK);
        let jobs: Vec<(usize, usize)> = (0..self.traces.len())
            .flat_map(|t| (0..chunks).map(move |c| (t, c)))
            .collect();
        let parts: Vec<(usize, usize, Vec<Dual<CHUNK>>)> = jobs
            .into_par_iter()
            .map(|(ti, c)| {
                let params: Vec<Dual<CHUNK>> = values
                    .iter()
                    .enumerate()
                    .map(|(k, &p)| {
                        if k / CHUNK == c {
                            Dual::seeded(p, k % CHUNK, p)
                        } else {
                            Dual::cst(p)
                        }
                    })
                    .collect();
                let o = self
                    .model
                    .simulate(&params, &self.traces[ti].input(), &self.eval);
                let mut r = vec![Dual::cst(0.0); 4 * self.traces[ti].len()];
                self.write_residuals(ti, &o, &mut r);
                (ti, c, r)
            })
            .collect();
        let mut jac = DMatrix::zeros(self.count, n);
        for (ti, c, r) in parts {
            let row0 = self.offsets[ti];
            for (k, d) in r.iter().enumerate() {
                for j in 0..CHUNK {
                    let col = c * CHUNK + j;
                    if col < n {
                        jac[(row0 + k, col)] = d.d[j];
                    }
                }
            }
        }
        Some(Ok(jac))
    }

    /// A_vv by a central difference of the exact J·v: (J(θ+εv)v − J(θ−εv)v)/(2ε), with
    /// ε = ε_mach^(1/3)·max(1, ‖θ‖∞)/‖v‖ (Nocedal & Wright, 2nd ed., eq. 8.10 reasoning).
    fn second_directional(
        &self,
        log_params: &[f64],
        direction: &[f64],
    ) -> Option<Result<DVector<f64>, ModelError>> {
        let v_norm = direction.iter().map(|x| x * x).sum::<f64>().sqrt();
        if v_norm == 0.0 {
            return Some(Ok(DVector::zeros(self.count)));
        }
        let scale = log_params.iter().fold(1.0_f64, |a, x| a.max(x.abs()));
        let eps = f64::EPSILON.cbrt() * scale / v_norm;
        let shifted = |sign: f64| -> Vec<f64> {
            log_params
                .iter()
                .zip(direction)
                .map(|(t, v)| t + sign * eps * v)
                .collect()
        };
        let (plus, minus) = rayon::join(
            || self.jacobian_times(&shifted(1.0), direction),
            || self.jacobian_times(&shifted(-1.0), direction),
        );
        Some(Ok((plus - minus) / (2.0 * eps)))
    }

    fn log_bounds(&self) -> Option<Vec<(f64, f64)>> {
        Some(
            self.model
                .free_parameter_bounds()
                .into_iter()
                .map(|(lo, hi)| (lo.ln(), hi.ln()))
                .collect(),
        )
    }
}

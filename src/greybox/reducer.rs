//! MBAM's model-level hook for templates: a boundary limit read from a geodesic becomes
//! `apply_limit` on the template, and the reduced template a new [`TemplateFit`].

use super::fit::{FitTrace, SignalWeights, TemplateFit};
use crate::fit::ModelError;
use crate::reduce::{BoundaryLimit, BoundaryReading, LimitDirection, ReducedModel, Reducer};
use understudy_runtime::block::{apply_limit, EvalConfig, Limit, Reduction, Template};

/// Reduces a template the way a boundary reading says.
#[derive(Debug, Clone)]
pub struct TemplateReducer {
    /// the template being reduced (its free parameters in the reading's order)
    pub template: Template,
    pub traces: Vec<FitTrace>,
    pub weights: SignalWeights,
    pub eval: EvalConfig,
}

impl TemplateReducer {
    /// The limit of the template that a reading names, or `Unsupported`.
    pub fn limit_of(&self, reading: &BoundaryReading) -> Result<(String, Limit), ModelError> {
        let names = &reading.parameter_names;
        match &reading.limit {
            BoundaryLimit::Single { index, direction } => Ok((
                names[*index].clone(),
                match direction {
                    LimitDirection::ToZero => Limit::ToZero,
                    LimitDirection::ToInfinity => Limit::ToInfinity,
                },
            )),
            BoundaryLimit::Fold { first, second } => Ok((
                names[*first].clone(),
                Limit::MergeWith(names[*second].clone()),
            )),
            BoundaryLimit::Coupled { .. } => Err(ModelError::Unsupported {
                what: format!("the coupled limit `{}`", reading.sentence),
            }),
        }
    }

    /// Apply the reading's limit: the reduction record and the reduced fit problem.
    pub fn reduce_template(
        &self,
        reading: &BoundaryReading,
    ) -> Result<(Reduction, TemplateFit, Vec<f64>), ModelError> {
        let (parameter, limit) = self.limit_of(reading)?;
        // the template at the geodesic's end point (clamped into the declared bounds)
        let mut at_end = self.template.clone();
        for (name, lp) in reading.parameter_names.iter().zip(&reading.end_log_params) {
            if let Some(p) = at_end.parameter_mut(name) {
                p.value = lp.exp().clamp(p.bounds[0], p.bounds[1]);
            }
        }
        let reduction =
            apply_limit(&at_end, &parameter, &limit).map_err(|e| ModelError::Unsupported {
                what: e.to_string(),
            })?;
        let fit = TemplateFit::new(
            &reduction.template,
            self.traces.clone(),
            self.weights,
            self.eval,
        )
        .map_err(|e| ModelError::Evaluation {
            log_params: reading.end_log_params.clone(),
            reason: e.to_string(),
        })?;
        let start = fit.start_log_params();
        Ok((reduction, fit, start))
    }
}

impl Reducer for TemplateReducer {
    fn reduce(&self, reading: &BoundaryReading) -> Result<ReducedModel, ModelError> {
        let (reduction, fit, start) = self.reduce_template(reading)?;
        Ok(ReducedModel {
            model: Box::new(fit),
            start_log_params: start,
            description: reduction.sentence,
        })
    }
}

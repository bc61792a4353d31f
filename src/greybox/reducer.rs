//! MBAM's model-level hook for templates: a boundary limit read from a geodesic becomes
//! `apply_limit` on the template, and the reduced template a new [`TemplateFit`].

use super::fit::{FitTrace, SignalWeights, TemplateFit};
use crate::fit::ModelError;
use crate::reduce::{BoundaryLimit, BoundaryReading, LimitDirection, ReducedModel, Reducer};
use understudy_runtime::block::{apply_limit, EvalConfig, Limit, LimitKind, Reduction, Template};

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
            BoundaryLimit::Single { index, direction } => {
                let name = &names[*index];
                let limit = match direction {
                    LimitDirection::ToZero => Limit::ToZero,
                    // a PI's proportional gain → ∞ alone (ki/kp → 0) is the same high-gain limit
                    // as both gains at a fixed ratio: the loop tracks its reference exactly
                    LimitDirection::ToInfinity
                        if !self.declares(name, LimitKind::ToInfinity)
                            && self.declares(name, LimitKind::IdealTracking)
                            && self.pi_gains(name).is_some_and(|(kp, _)| kp == *name) =>
                    {
                        Limit::IdealTracking
                    }
                    LimitDirection::ToInfinity => Limit::ToInfinity,
                };
                Ok((name.clone(), limit))
            }
            BoundaryLimit::Fold { first, second } => Ok((
                names[*first].clone(),
                Limit::MergeWith(names[*second].clone()),
            )),
            BoundaryLimit::Coupled { components } => {
                // several parameters → ∞ together with finite ratios: ideal tracking when they
                // are both gains of one PI that declares it
                let rising: Vec<&str> = components
                    .iter()
                    .filter(|c| c.1 > 0.0)
                    .map(|c| names[c.0].as_str())
                    .collect();
                let tracking = rising.iter().find_map(|name| {
                    let (kp, ki) = self.pi_gains(name)?;
                    (rising.contains(&kp.as_str())
                        && rising.contains(&ki.as_str())
                        && self.declares(&kp, LimitKind::IdealTracking))
                    .then_some(kp)
                });
                match tracking {
                    Some(kp) => Ok((kp, Limit::IdealTracking)),
                    None => Err(ModelError::Unsupported {
                        what: format!(
                            "the coupled limit `{}` (no declared limit moves these parameters \
                             together)",
                            reading.sentence
                        ),
                    }),
                }
            }
        }
    }

    fn declares(&self, parameter: &str, kind: LimitKind) -> bool {
        self.template
            .parameter(parameter)
            .is_some_and(|p| p.limits.contains(&kind))
    }

    /// The (kp, ki) parameter names of the PI block that uses `parameter` as a gain.
    fn pi_gains(&self, parameter: &str) -> Option<(String, String)> {
        self.template.blocks.iter().find_map(|b| {
            if b.kind != "pi" {
                return None;
            }
            let gain = |setting: &str| {
                b.params
                    .get(setting)
                    .and_then(|r| r.parameter())
                    .filter(|(_, negate)| !negate)
                    .map(|(n, _)| n.to_string())
            };
            let (kp, ki) = (gain("kp")?, gain("ki")?);
            (kp == parameter || ki == parameter).then_some((kp, ki))
        })
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

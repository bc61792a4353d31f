//! Reduction of a template at a parameter limit: the reduced model is a template again.

use super::model::{BlockModel, TemplateError};
use super::template::{BlockSpec, LimitKind, ParamRef, Template};
use thiserror::Error;

/// Where a parameter is taken.
#[derive(Debug, Clone, PartialEq)]
pub enum Limit {
    ToZero,
    ToInfinity,
    /// the parameter and the named one take one common value (a fold of the model manifold)
    MergeWith(String),
    /// a PI's gains → ∞ at a fixed ratio (ideal tracking)
    IdealTracking,
}

impl Limit {
    fn kind(&self) -> LimitKind {
        match self {
            Limit::ToZero => LimitKind::ToZero,
            Limit::ToInfinity => LimitKind::ToInfinity,
            Limit::MergeWith(_) => LimitKind::Merge,
            Limit::IdealTracking => LimitKind::IdealTracking,
        }
    }
    fn symbol(&self) -> String {
        match self {
            Limit::ToZero => "→ 0".into(),
            Limit::ToInfinity => "→ ∞".into(),
            Limit::MergeWith(other) => format!("merged with `{other}`"),
            Limit::IdealTracking => "→ ∞ at a fixed ratio (ideal tracking)".into(),
        }
    }
}

#[derive(Debug, Clone, PartialEq, Error)]
pub enum LimitError {
    #[error("no parameter named `{parameter}`")]
    UnknownParameter { parameter: String },
    #[error("parameter `{parameter}` does not declare the limit {limit} (declared: {declared:?})")]
    NotDeclared {
        parameter: String,
        limit: String,
        declared: Vec<LimitKind>,
    },
    #[error("parameter `{parameter}` {limit}: block `{block}` (setting `{setting}`) has no such limit: {reason}")]
    Unsupported {
        parameter: String,
        limit: String,
        block: String,
        setting: String,
        reason: String,
    },
    #[error("parameter `{parameter}` {limit}: not implemented yet ({reason})")]
    NotImplemented {
        parameter: String,
        limit: String,
        reason: String,
    },
    #[error("parameter `{parameter}` {limit}: the reduced template is not valid: {source}")]
    Invalid {
        parameter: String,
        limit: String,
        #[source]
        source: Box<TemplateError>,
    },
}

/// A reduced template with what was done, for the reduction log.
#[derive(Debug, Clone, PartialEq)]
pub struct Reduction {
    pub template: Template,
    /// one physical sentence, e.g. "voltage measurement filter time constant (t_u_filter) → 0:
    /// lag `u_meas` becomes a one-step delay (filter removed); 7 → 6 states"
    pub sentence: String,
    pub states_before: usize,
    pub states_after: usize,
    /// parameters no longer in the template
    pub removed_parameters: Vec<String>,
    /// parameters whose value changed (a merge), with the new value
    pub changed_parameters: Vec<(String, f64)>,
}

enum Action {
    /// remove the block; its output(s) become these signals
    Alias(Vec<(String, String)>),
    /// as `Alias`, with new blocks put in the removed block's place
    AliasWith(Vec<(String, String)>, Vec<BlockSpec>),
    /// replace the block by these blocks (the first keeps the name)
    Replace(Vec<BlockSpec>),
    /// drop a setting of the block
    DropSetting(String),
}

fn lit(v: f64) -> ParamRef {
    ParamRef::Value(v)
}

fn constant(name: &str, v: f64) -> BlockSpec {
    BlockSpec::new(name, "constant").param("value", lit(v))
}

/// Take `parameter` of `template` to `limit` and rewrite the description. The limit must be
/// declared by the parameter, and every block using the parameter must have that limit;
/// the rewritten template is compiled (checked) before it is returned.
pub fn apply_limit(
    template: &Template,
    parameter: &str,
    limit: &Limit,
) -> Result<Reduction, LimitError> {
    let spec = template
        .parameter(parameter)
        .ok_or_else(|| LimitError::UnknownParameter {
            parameter: parameter.into(),
        })?
        .clone();
    if !spec.limits.contains(&limit.kind()) {
        return Err(LimitError::NotDeclared {
            parameter: parameter.into(),
            limit: limit.symbol(),
            declared: spec.limits.clone(),
        });
    }
    let states_before = template.state_count();
    let mut reduced = template.clone();
    let mut effects = Vec::new();
    let mut changed = Vec::new();
    match limit {
        Limit::IdealTracking => {
            let (rewritten, effect) = super::tracking::ideal_tracking(template, parameter)
                .map_err(|r| LimitError::Unsupported {
                    parameter: parameter.into(),
                    limit: limit.symbol(),
                    block: r.block,
                    setting: r.setting,
                    reason: r.reason,
                })?;
            reduced = rewritten;
            effects.push(effect);
        }
        Limit::MergeWith(other) => {
            let other_spec = template
                .parameter(other)
                .ok_or_else(|| LimitError::UnknownParameter {
                    parameter: other.clone(),
                })?
                .clone();
            if !other_spec.limits.contains(&LimitKind::Merge) {
                return Err(LimitError::NotDeclared {
                    parameter: other.clone(),
                    limit: format!("merged with `{parameter}`"),
                    declared: other_spec.limits.clone(),
                });
            }
            for b in &mut reduced.blocks {
                for r in b.params.values_mut() {
                    if let Some((name, negate)) = r.parameter() {
                        if name == other {
                            *r = ParamRef::Name(if negate {
                                format!("-{parameter}")
                            } else {
                                parameter.to_string()
                            });
                        }
                    }
                }
            }
            let merged = (spec.value * other_spec.value).sqrt();
            let p = reduced.parameter_mut(parameter).expect("present");
            p.value = merged;
            p.bounds = [
                spec.bounds[0].min(other_spec.bounds[0]),
                spec.bounds[1].max(other_spec.bounds[1]),
            ];
            p.meaning = format!("{} = {}", spec.meaning, other_spec.meaning);
            changed.push((parameter.to_string(), merged));
            effects.push(format!(
                "`{other}` ({}) takes the same value, geometric mean {merged:.4e} {}",
                other_spec.meaning, spec.unit
            ));
        }
        Limit::ToZero | Limit::ToInfinity => {
            let zero = matches!(limit, Limit::ToZero);
            let mut actions: Vec<(usize, Action)> = Vec::new();
            for (bi, b) in template.blocks.iter().enumerate() {
                let uses: Vec<(String, bool)> = b
                    .params
                    .iter()
                    .filter_map(|(setting, r)| {
                        r.parameter()
                            .filter(|(n, _)| *n == parameter)
                            .map(|(_, neg)| (setting.clone(), neg))
                    })
                    .collect();
                if uses.is_empty() {
                    continue;
                }
                let refuse = |setting: &str, reason: &str| LimitError::Unsupported {
                    parameter: parameter.into(),
                    limit: limit.symbol(),
                    block: format!("{} ({})", b.name, b.kind),
                    setting: setting.into(),
                    reason: reason.into(),
                };
                let input = |port: &str| b.inputs.get(port).cloned().unwrap_or_default();
                let setting = uses[0].0.clone();
                let name = b.name.as_str();
                let (action, effect) = match (b.kind.as_str(), setting.as_str(), zero) {
                    ("lag", "t", true) => (
                        Action::Replace(
                            vec![BlockSpec::new(name, "delay").input("u", &input("u"))],
                        ),
                        format!("lag `{name}` becomes a one-step delay (filter removed)"),
                    ),
                    ("lag", "t", false) => (
                        Action::Replace(vec![BlockSpec::new(name, "hold").input("u", &input("u"))]),
                        format!("lag `{name}` freezes at its initial value (state removed)"),
                    ),
                    ("lead-lag", "t_lead", true) => (
                        Action::Replace(vec![BlockSpec::new(name, "lag")
                            .input("u", &input("u"))
                            .param("t", b.params["t_lag"].clone())]),
                        format!("lead-lag `{name}` becomes a lag (lead removed)"),
                    ),
                    ("lead-lag", "t_lag", false) => (
                        Action::Replace(vec![BlockSpec::new(name, "hold").input("u", &input("u"))]),
                        format!("lead-lag `{name}` freezes at its initial value (state removed)"),
                    ),
                    ("washout", "t", true) => (
                        Action::Replace(vec![constant(name, 0.0)]),
                        format!("washout `{name}` blocks everything (path removed)"),
                    ),
                    ("washout", "t", false) => (
                        Action::Alias(vec![(name.into(), input("u"))]),
                        format!("washout `{name}` passes its input through (state removed)"),
                    ),
                    ("gain", "k", true) => (
                        Action::Replace(vec![constant(name, 0.0)]),
                        format!("gain `{name}` → 0 (path removed)"),
                    ),
                    ("constant", "value", true) => (
                        Action::Replace(vec![constant(name, 0.0)]),
                        format!("constant `{name}` → 0"),
                    ),
                    ("pi", "kp", true) => {
                        let mut i = BlockSpec::new(name, "integrator")
                            .input("u", &input("u"))
                            .param("k", b.params["ki"].clone());
                        for port in ["init", "freeze"] {
                            if let Some(s) = b.inputs.get(port) {
                                i = i.input(port, s);
                            }
                        }
                        (
                            Action::Replace(vec![i]),
                            format!(
                                "PI `{name}` becomes a pure integrator (proportional path removed)"
                            ),
                        )
                    }
                    ("pi", "ki", true) => {
                        let mut prop = BlockSpec::new(name, "proportional")
                            .input("u", &input("u"))
                            .param("kp", b.params["kp"].clone());
                        if let Some(s) = b.inputs.get("init") {
                            prop = prop.input("init", s);
                        }
                        (
                            Action::Replace(vec![prop]),
                            format!(
                                "PI `{name}` becomes proportional around its initial output (integral state removed)"
                            ),
                        )
                    }
                    ("integrator", "k", true) => (
                        Action::Replace(vec![match b.inputs.get("init") {
                            Some(s) => BlockSpec::new(name, "hold").input("u", s),
                            None => constant(name, 0.0),
                        }]),
                        format!("integrator `{name}` holds its initial value (state removed)"),
                    ),
                    ("dead-band", "width", true) => (
                        Action::Alias(vec![(name.into(), input("u"))]),
                        format!("dead band `{name}` removed (passes its input)"),
                    ),
                    ("dead-band", "width", false) => (
                        Action::Replace(vec![constant(name, 0.0)]),
                        format!("dead band `{name}` blocks everything (path removed)"),
                    ),
                    ("rate-limiter", s @ ("rise" | "fall"), false) => {
                        let other = if s == "rise" { "fall" } else { "rise" };
                        if b.params.contains_key(other) && uses.len() == 1 {
                            (
                                Action::DropSetting(s.into()),
                                format!("rate limiter `{name}` no longer limits its {s}"),
                            )
                        } else {
                            (
                                Action::Alias(vec![(name.into(), input("u"))]),
                                format!("rate limiter `{name}` removed"),
                            )
                        }
                    }
                    ("limiter", _, false) => {
                        let both = b
                            .params
                            .iter()
                            .all(|(_, r)| r.parameter().is_some_and(|(n, _)| n == parameter));
                        if both {
                            (
                                Action::Alias(vec![(name.into(), input("u"))]),
                                format!("limiter `{name}` removed (never binds)"),
                            )
                        } else {
                            return Err(refuse(
                                &setting,
                                "only a limiter whose both bounds use this parameter can be removed",
                            ));
                        }
                    }
                    ("current-limit", "i_max", false) => (
                        Action::AliasWith(
                            vec![
                                (format!("{name}.p"), input("p")),
                                (format!("{name}.q"), input("q")),
                                (
                                    format!("{name}.p_limited"),
                                    format!("{name}__never_limited"),
                                ),
                            ],
                            vec![constant(&format!("{name}__never_limited"), 0.0)],
                        ),
                        format!("current limit `{name}` removed (never binds)"),
                    ),
                    (_, _, _) => {
                        return Err(refuse(
                            &setting,
                            "this block keeps no meaning at that limit",
                        ))
                    }
                };
                actions.push((bi, action));
                effects.push(effect);
            }
            if actions.is_empty() {
                return Err(LimitError::NotImplemented {
                    parameter: parameter.into(),
                    limit: limit.symbol(),
                    reason: "no block uses the parameter".into(),
                });
            }
            // apply from the last block so indices stay valid
            let mut aliases: Vec<(String, String)> = Vec::new();
            for (bi, action) in actions.into_iter().rev() {
                match action {
                    Action::Alias(pairs) => {
                        reduced.blocks.remove(bi);
                        aliases.extend(pairs);
                    }
                    Action::AliasWith(pairs, new_blocks) => {
                        reduced.blocks.splice(bi..=bi, new_blocks);
                        aliases.extend(pairs);
                    }
                    Action::Replace(new_blocks) => {
                        reduced.blocks.splice(bi..=bi, new_blocks);
                    }
                    Action::DropSetting(s) => {
                        reduced.blocks[bi].params.remove(&s);
                    }
                }
            }
            // resolve chains of aliases (an alias to a removed block's output)
            for _ in 0..aliases.len() {
                let snapshot = aliases.clone();
                for (_, to) in aliases.iter_mut() {
                    if let Some((_, further)) = snapshot.iter().find(|(from, _)| from == to) {
                        *to = further.clone();
                    }
                }
            }
            for (from, to) in &aliases {
                rename_signal(&mut reduced, from, to);
            }
        }
    }
    // drop parameters nothing refers to any more
    let mut removed = Vec::new();
    let used = |t: &Template, n: &str| {
        t.blocks.iter().any(|b| {
            b.params
                .values()
                .any(|r| r.parameter().is_some_and(|(m, _)| m == n))
        })
    };
    let names: Vec<String> = reduced.parameters.iter().map(|p| p.name.clone()).collect();
    for n in names {
        if !used(&reduced, &n) && used(template, &n) {
            removed.push(n.clone());
        }
    }
    reduced.parameters.retain(|p| !removed.contains(&p.name));
    reduced.description = format!(
        "{}\n[reduced] {} {}",
        reduced.description.trim_end(),
        parameter,
        limit.symbol()
    );
    BlockModel::compile(&reduced).map_err(|source| LimitError::Invalid {
        parameter: parameter.into(),
        limit: limit.symbol(),
        source: Box::new(source),
    })?;
    let states_after = reduced.state_count();
    let sentence = format!(
        "{} ({parameter}) {}: {}; {states_before} → {states_after} states",
        spec.meaning,
        limit.symbol(),
        effects.join("; "),
    );
    Ok(Reduction {
        template: reduced,
        sentence,
        states_before,
        states_after,
        removed_parameters: removed,
        changed_parameters: changed,
    })
}

/// Every reference to signal `from` (inputs, terms, outputs) now reads `to`.
pub(super) fn rename_signal(t: &mut Template, from: &str, to: &str) {
    for b in &mut t.blocks {
        for s in b.inputs.values_mut() {
            if s == from {
                *s = to.to_string();
            }
        }
        for term in &mut b.terms {
            let (mark, name) = match term.chars().next() {
                Some(c @ ('+' | '-' | '/' | '*')) => (c.to_string(), &term[1..]),
                _ => (String::new(), term.as_str()),
            };
            if name == from {
                *term = format!("{mark}{to}");
            }
        }
    }
    let o = &mut t.outputs;
    for s in [&mut o.i_re, &mut o.i_im, &mut o.p, &mut o.q] {
        if s == from {
            *s = to.to_string();
        }
    }
}

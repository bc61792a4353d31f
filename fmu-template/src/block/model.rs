//! Checking a template and turning it into an evaluable [`BlockModel`], and running it.
//!
//! Discretisation (fixed internal step h; the input is held over each step, zero-order hold):
//! - lag 1/(1+sT): exact, x⁺ = x + (1 − e^{−h/T})(u − x), output y = x (the output at a sample
//!   is the state, so a lag breaks algebraic loops). As T → 0 the lag becomes a one-step delay,
//!   as T → ∞ it freezes; both limits are reached smoothly.
//! - lead-lag (1+sT₁)/(1+sT₂) = T₁/T₂ + (1 − T₁/T₂)/(1+sT₂) and washout sT/(1+sT) = 1 − 1/(1+sT)
//!   reuse the exact lag on their inner state;
//! - integrators, PI integral parts and the PLL: forward Euler (exact for the integrator under a
//!   held input);
//! - switches, limiters and rate limiters act on the sampled signals.
//!
//! Every step: (A) outputs of blocks whose output is their state, (B) the other blocks in
//! topological order, (C) every state update from the signals of that step.

use super::kinds::{known_kinds, lookup, KindInfo};
use super::scalar::Scalar;
use super::template::{ParamRef, Template};
use std::collections::HashMap;
use std::f64::consts::PI;
use thiserror::Error;

/// What is wrong with a template.
#[derive(Debug, Clone, PartialEq, Error)]
pub enum TemplateError {
    #[error("block `{block}`: unknown kind `{kind}` (known kinds: {known})")]
    UnknownKind {
        block: String,
        kind: String,
        known: String,
    },
    #[error("block `{block}` ({kind}): unknown input port `{port}` (expected one of: {expected})")]
    UnknownPort {
        block: String,
        kind: String,
        port: String,
        expected: String,
    },
    #[error("block `{block}` ({kind}): input port `{port}` is not connected")]
    MissingPort {
        block: String,
        kind: String,
        port: String,
    },
    #[error("block `{block}`, port `{port}`: no signal named `{signal}`")]
    UnknownSignal {
        block: String,
        port: String,
        signal: String,
    },
    #[error("block `{block}` ({kind}): unknown setting `{setting}` (expected one of: {expected})")]
    UnknownSetting {
        block: String,
        kind: String,
        setting: String,
        expected: String,
    },
    #[error("block `{block}` ({kind}): setting `{setting}` is missing")]
    MissingSetting {
        block: String,
        kind: String,
        setting: String,
    },
    #[error("block `{block}`, setting `{setting}`: no parameter named `{parameter}`")]
    UnknownParameter {
        block: String,
        setting: String,
        parameter: String,
    },
    #[error("block `{block}`, option `{option}` = `{value}`: expected {expected}")]
    BadOption {
        block: String,
        option: String,
        value: String,
        expected: String,
    },
    #[error("block `{block}`: bad term `{term}` ({expected})")]
    BadTerm {
        block: String,
        term: String,
        expected: String,
    },
    #[error("the name `{name}` is used twice (blocks, parameters and the inputs v_re, v_im, f_grid need distinct names)")]
    DuplicateName { name: String },
    #[error("parameter `{parameter}` = {value} lies outside its bounds [{lower}, {upper}]")]
    ParameterOutOfBounds {
        parameter: String,
        value: f64,
        lower: f64,
        upper: f64,
    },
    #[error("parameter `{parameter}`: bounds [{lower}, {upper}] must satisfy 0 < lower ≤ upper (parameters are fitted in logarithms)")]
    BadBounds {
        parameter: String,
        lower: f64,
        upper: f64,
    },
    #[error("output `{output}`: no signal named `{signal}`")]
    UnknownOutput { output: String, signal: String },
    #[error("algebraic loop through blocks {blocks:?}: no block with a state output (lag, integrator, PLL, delay, hold) breaks it")]
    AlgebraicLoop { blocks: Vec<String> },
    #[error("initialisation loop through blocks {blocks:?}: give a PI or integrator on the loop an `init` signal that does not depend on the loop")]
    InitialisationLoop { blocks: Vec<String> },
    #[error("setting `{setting}` = {value}: expected {expected}")]
    BadSetting {
        setting: &'static str,
        value: String,
        expected: &'static str,
    },
    #[error("`f_nom_hz` = {0}: expected a nominal frequency > 0 Hz")]
    BadFrequency(f64),
}

/// A number in a compiled block: a constant or an entry of the parameter vector.
#[derive(Debug, Clone, Copy, PartialEq)]
pub(crate) enum Num {
    Const(f64),
    Param { index: usize, negate: bool },
}

/// Which first-sample quantity a setpoint takes.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum InitialQuantity {
    P,
    Q,
    U,
    IRe,
    IIm,
    VRe,
    VIm,
}

#[derive(Debug, Clone)]
enum Op {
    Constant(Num),
    Setpoint(InitialQuantity),
    Gain {
        u: usize,
        k: Num,
    },
    Sum(Vec<(usize, f64)>),
    /// (signal, divide)
    Product(Vec<(usize, bool)>),
    Lag {
        u: usize,
        t: Num,
    },
    LeadLag {
        u: usize,
        t_lead: Num,
        t_lag: Num,
    },
    Washout {
        u: usize,
        t: Num,
    },
    Integrator {
        u: usize,
        k: Num,
        init: Option<usize>,
        freeze: Option<usize>,
    },
    Pi {
        u: usize,
        kp: Num,
        ki: Num,
        init: Option<usize>,
        freeze: Option<usize>,
    },
    Limiter {
        u: usize,
        min: Num,
        max: Num,
    },
    VariableLimiter {
        u: usize,
        min: usize,
        max: usize,
    },
    RateLimiter {
        u: usize,
        rise: Option<Num>,
        fall: Option<Num>,
    },
    DeadBand {
        u: usize,
        width: Num,
    },
    Detector {
        u: usize,
        threshold: Num,
        hysteresis: Num,
        below: bool,
    },
    Select {
        condition: usize,
        when_true: usize,
        when_false: usize,
    },
    Pll {
        re: usize,
        im: usize,
        freeze: Option<usize>,
        kp: Num,
        ki: Num,
    },
    ToDq {
        re: usize,
        im: usize,
        angle: usize,
    },
    FromDq {
        d: usize,
        q: usize,
        angle: usize,
    },
    Magnitude {
        re: usize,
        im: usize,
    },
    Power {
        v_re: usize,
        v_im: usize,
        i_re: usize,
        i_im: usize,
    },
    CurrentLimit {
        p: usize,
        q: usize,
        i_max: Num,
        reactive_first: bool,
        flag: Option<usize>,
    },
    Delay {
        u: usize,
    },
    Hold {
        u: usize,
    },
}

#[derive(Debug, Clone)]
struct Compiled {
    name: String,
    op: Op,
    /// first output signal
    out: usize,
    /// first state slot (continuous states, then memories)
    state: usize,
    state_output: bool,
}

/// Input signal slots.
pub const INPUT_SIGNALS: [&str; 3] = ["v_re", "v_im", "f_grid"];

/// A checked template, ready to run. Cheap to share between threads.
#[derive(Debug, Clone)]
pub struct BlockModel {
    template: Template,
    signal_names: Vec<String>,
    blocks: Vec<Compiled>,
    /// feedthrough blocks in evaluation order without the blocks whose output is fixed for a run (constants, setpoints and
    /// gains, sums and products of only those): what each step evaluates
    run_varying: Vec<usize>,
    /// blocks whose output is a state, in declaration order
    state_outputs: Vec<usize>,
    /// blocks with a state slot (continuous states or memories), in declaration order: what
    /// each update visits
    stateful: Vec<usize>,
    /// all blocks in initialisation order
    init_order: Vec<usize>,
    state_len: usize,
    /// declared values of all parameters (declaration order)
    values: Vec<f64>,
    /// positions of the free parameters among all parameters
    free: Vec<usize>,
    outputs: [usize; 4],
    omega_b: f64,
}

fn check_name_unique(seen: &mut HashMap<String, ()>, name: &str) -> Result<(), TemplateError> {
    if seen.insert(name.to_string(), ()).is_some() {
        return Err(TemplateError::DuplicateName { name: name.into() });
    }
    Ok(())
}

/// Topological order of `nodes` under `deps[node]` (indices of nodes it needs first); on a
/// cycle, the blocks of one cycle.
fn topological(
    nodes: &[usize],
    deps: &HashMap<usize, Vec<usize>>,
) -> Result<Vec<usize>, Vec<usize>> {
    // depth-first with colours: 0 new, 1 on the stack, 2 done
    let mut colour: HashMap<usize, u8> = nodes.iter().map(|&n| (n, 0)).collect();
    let mut order = Vec::with_capacity(nodes.len());
    for &start in nodes {
        if colour[&start] != 0 {
            continue;
        }
        let mut stack: Vec<(usize, usize)> = vec![(start, 0)];
        colour.insert(start, 1);
        while let Some(&mut (node, ref mut next)) = stack.last_mut() {
            let d = deps.get(&node).map(Vec::as_slice).unwrap_or(&[]);
            if *next < d.len() {
                let child = d[*next];
                *next += 1;
                match colour.get(&child).copied() {
                    Some(0) => {
                        colour.insert(child, 1);
                        stack.push((child, 0));
                    }
                    Some(1) => {
                        // the cycle is the stack from `child` on
                        let at = stack.iter().position(|(n, _)| *n == child).unwrap_or(0);
                        return Err(stack[at..].iter().map(|(n, _)| *n).collect());
                    }
                    _ => {}
                }
            } else {
                colour.insert(node, 2);
                order.push(node);
                stack.pop();
            }
        }
    }
    Ok(order)
}

impl BlockModel {
    /// Check `template` and compile it. Errors name the block, port, setting or parameter.
    pub fn compile(template: &Template) -> Result<Self, TemplateError> {
        if !(template.f_nom_hz.is_finite() && template.f_nom_hz > 0.0) {
            return Err(TemplateError::BadFrequency(template.f_nom_hz));
        }
        let mut seen = HashMap::new();
        for n in INPUT_SIGNALS {
            check_name_unique(&mut seen, n)?;
        }
        let mut param_index = HashMap::new();
        for (k, p) in template.parameters.iter().enumerate() {
            check_name_unique(&mut seen, &p.name)?;
            let [lo, hi] = p.bounds;
            if !(lo > 0.0 && lo <= hi && hi.is_finite()) {
                return Err(TemplateError::BadBounds {
                    parameter: p.name.clone(),
                    lower: lo,
                    upper: hi,
                });
            }
            if !(p.value >= lo && p.value <= hi) {
                return Err(TemplateError::ParameterOutOfBounds {
                    parameter: p.name.clone(),
                    value: p.value,
                    lower: lo,
                    upper: hi,
                });
            }
            param_index.insert(p.name.clone(), k);
        }

        // signal table: inputs, then each block's outputs
        let mut signal_names: Vec<String> = INPUT_SIGNALS.iter().map(|s| s.to_string()).collect();
        let mut infos: Vec<&'static KindInfo> = Vec::new();
        let mut first_out = Vec::new();
        for b in &template.blocks {
            check_name_unique(&mut seen, &b.name)?;
            let info = lookup(&b.kind).ok_or_else(|| TemplateError::UnknownKind {
                block: b.name.clone(),
                kind: b.kind.clone(),
                known: known_kinds(),
            })?;
            first_out.push(signal_names.len());
            if info.outputs.is_empty() {
                signal_names.push(b.name.clone());
            } else {
                for port in info.outputs {
                    signal_names.push(format!("{}.{}", b.name, port));
                }
            }
            infos.push(info);
        }
        let signal_index: HashMap<&str, usize> = signal_names
            .iter()
            .enumerate()
            .map(|(k, s)| (s.as_str(), k))
            .collect();
        // which block produces each signal (None: a model input)
        let mut producer = vec![None; signal_names.len()];
        for (bi, info) in infos.iter().enumerate() {
            for k in 0..info.outputs.len().max(1) {
                producer[first_out[bi] + k] = Some(bi);
            }
        }

        let mut blocks = Vec::new();
        let mut state_len = 0;
        // blocks with a state slot (continuous states or memories), in declaration order
        let mut stateful = Vec::new();
        // dependencies for the running order and for initialisation
        let mut run_deps: HashMap<usize, Vec<usize>> = HashMap::new();
        let mut init_deps: HashMap<usize, Vec<usize>> = HashMap::new();
        for (bi, (b, info)) in template.blocks.iter().zip(&infos).enumerate() {
            let expected_ports = || {
                info.inputs
                    .iter()
                    .map(|(p, _)| *p)
                    .collect::<Vec<_>>()
                    .join(", ")
            };
            for port in b.inputs.keys() {
                if !info.inputs.iter().any(|(p, _)| p == port) {
                    return Err(TemplateError::UnknownPort {
                        block: b.name.clone(),
                        kind: b.kind.clone(),
                        port: port.clone(),
                        expected: if info.uses_terms {
                            "none: this kind takes `terms`".into()
                        } else {
                            expected_ports()
                        },
                    });
                }
            }
            for setting in b.params.keys() {
                if !info.params.iter().any(|(p, _)| p == setting) {
                    return Err(TemplateError::UnknownSetting {
                        block: b.name.clone(),
                        kind: b.kind.clone(),
                        setting: setting.clone(),
                        expected: info
                            .params
                            .iter()
                            .map(|(p, _)| *p)
                            .collect::<Vec<_>>()
                            .join(", "),
                    });
                }
            }
            for option in b.options.keys() {
                if !info.options.contains(&option.as_str()) {
                    return Err(TemplateError::BadOption {
                        block: b.name.clone(),
                        option: option.clone(),
                        value: b.options[option].clone(),
                        expected: format!("one of the options {:?}", info.options),
                    });
                }
            }
            if !info.uses_terms && !b.terms.is_empty() {
                return Err(TemplateError::BadTerm {
                    block: b.name.clone(),
                    term: b.terms[0].clone(),
                    expected: format!("a `{}` block takes no terms", b.kind),
                });
            }
            let resolve = |port: &str, signal: &str| -> Result<usize, TemplateError> {
                signal_index
                    .get(signal)
                    .copied()
                    .ok_or_else(|| TemplateError::UnknownSignal {
                        block: b.name.clone(),
                        port: port.into(),
                        signal: signal.into(),
                    })
            };
            let mut ports: HashMap<&str, usize> = HashMap::new();
            for (port, usage) in info.inputs {
                match b.inputs.get(*port) {
                    Some(signal) => {
                        let s = resolve(port, signal)?;
                        ports.insert(port, s);
                        if let Some(p) = producer[s] {
                            if usage.now {
                                run_deps.entry(bi).or_default().push(p);
                            }
                            if usage.init {
                                init_deps.entry(bi).or_default().push(p);
                            }
                        }
                    }
                    None if usage.required => {
                        return Err(TemplateError::MissingPort {
                            block: b.name.clone(),
                            kind: b.kind.clone(),
                            port: (*port).into(),
                        })
                    }
                    None => {}
                }
            }
            let num = |setting: &str| -> Result<Option<Num>, TemplateError> {
                let Some(r) = b.params.get(setting) else {
                    let required = info.params.iter().any(|(p, req)| *p == setting && *req);
                    if required {
                        return Err(TemplateError::MissingSetting {
                            block: b.name.clone(),
                            kind: b.kind.clone(),
                            setting: setting.into(),
                        });
                    }
                    return Ok(None);
                };
                Ok(Some(match r {
                    ParamRef::Value(v) => Num::Const(*v),
                    ParamRef::Name(_) => {
                        let (name, negate) = r.parameter().expect("a named reference");
                        let index = *param_index.get(name).ok_or_else(|| {
                            TemplateError::UnknownParameter {
                                block: b.name.clone(),
                                setting: setting.into(),
                                parameter: name.into(),
                            }
                        })?;
                        Num::Param { index, negate }
                    }
                }))
            };
            let req = |s: &str| num(s).map(|n| n.expect("required settings are present"));
            let mut terms = Vec::new();
            if info.uses_terms {
                if b.terms.is_empty() {
                    return Err(TemplateError::BadTerm {
                        block: b.name.clone(),
                        term: String::new(),
                        expected: "at least one term".into(),
                    });
                }
                for t in &b.terms {
                    let (mark, name) = match t.chars().next() {
                        Some(c @ ('+' | '-' | '/' | '*')) => (Some(c), &t[1..]),
                        _ => (None, t.as_str()),
                    };
                    let ok = matches!(
                        (b.kind.as_str(), mark),
                        ("sum", Some('+' | '-') | None) | ("product", Some('*' | '/') | None)
                    );
                    if !ok {
                        return Err(TemplateError::BadTerm {
                            block: b.name.clone(),
                            term: t.clone(),
                            expected: if b.kind == "sum" {
                                "a signal name with an optional leading + or -".into()
                            } else {
                                "a signal name with an optional leading * or /".into()
                            },
                        });
                    }
                    let s = resolve("terms", name)?;
                    if let Some(p) = producer[s] {
                        run_deps.entry(bi).or_default().push(p);
                        init_deps.entry(bi).or_default().push(p);
                    }
                    terms.push((s, mark));
                }
            }
            let port = |p: &str| ports[p];
            let opt_port = |p: &str| ports.get(p).copied();
            let op = match b.kind.as_str() {
                "constant" => Op::Constant(req("value")?),
                "setpoint" => {
                    let value = b.options.get("initial").cloned().unwrap_or_default();
                    Op::Setpoint(match value.as_str() {
                        "p" => InitialQuantity::P,
                        "q" => InitialQuantity::Q,
                        "u" => InitialQuantity::U,
                        "i_re" => InitialQuantity::IRe,
                        "i_im" => InitialQuantity::IIm,
                        "v_re" => InitialQuantity::VRe,
                        "v_im" => InitialQuantity::VIm,
                        _ => {
                            return Err(TemplateError::BadOption {
                                block: b.name.clone(),
                                option: "initial".into(),
                                value,
                                expected: "one of p, q, u, i_re, i_im, v_re, v_im (first sample)"
                                    .into(),
                            })
                        }
                    })
                }
                "gain" => Op::Gain {
                    u: port("u"),
                    k: req("k")?,
                },
                "sum" => Op::Sum(
                    terms
                        .iter()
                        .map(|&(s, m)| (s, if m == Some('-') { -1.0 } else { 1.0 }))
                        .collect(),
                ),
                "product" => Op::Product(terms.iter().map(|&(s, m)| (s, m == Some('/'))).collect()),
                "lag" => Op::Lag {
                    u: port("u"),
                    t: req("t")?,
                },
                "lead-lag" => Op::LeadLag {
                    u: port("u"),
                    t_lead: req("t_lead")?,
                    t_lag: req("t_lag")?,
                },
                "washout" => Op::Washout {
                    u: port("u"),
                    t: req("t")?,
                },
                "integrator" => Op::Integrator {
                    u: port("u"),
                    k: req("k")?,
                    init: opt_port("init"),
                    freeze: opt_port("freeze"),
                },
                "pi" => Op::Pi {
                    u: port("u"),
                    kp: req("kp")?,
                    ki: req("ki")?,
                    init: opt_port("init"),
                    freeze: opt_port("freeze"),
                },
                // a PI without integral action: its offset is held from initialisation
                "proportional" => Op::Pi {
                    u: port("u"),
                    kp: req("kp")?,
                    ki: Num::Const(0.0),
                    init: opt_port("init"),
                    freeze: None,
                },
                "limiter" => Op::Limiter {
                    u: port("u"),
                    min: req("min")?,
                    max: req("max")?,
                },
                "variable-limiter" => Op::VariableLimiter {
                    u: port("u"),
                    min: port("min"),
                    max: port("max"),
                },
                "rate-limiter" => {
                    let (rise, fall) = (num("rise")?, num("fall")?);
                    if rise.is_none() && fall.is_none() {
                        return Err(TemplateError::MissingSetting {
                            block: b.name.clone(),
                            kind: b.kind.clone(),
                            setting: "rise or fall".into(),
                        });
                    }
                    Op::RateLimiter {
                        u: port("u"),
                        rise,
                        fall,
                    }
                }
                "dead-band" => Op::DeadBand {
                    u: port("u"),
                    width: req("width")?,
                },
                "detector" => {
                    let value = b
                        .options
                        .get("active")
                        .cloned()
                        .unwrap_or_else(|| "below".into());
                    let below = match value.as_str() {
                        "below" => true,
                        "above" => false,
                        _ => {
                            return Err(TemplateError::BadOption {
                                block: b.name.clone(),
                                option: "active".into(),
                                value,
                                expected: "`below` (on under the threshold) or `above`".into(),
                            })
                        }
                    };
                    Op::Detector {
                        u: port("u"),
                        threshold: req("threshold")?,
                        hysteresis: req("hysteresis")?,
                        below,
                    }
                }
                "select" => Op::Select {
                    condition: port("condition"),
                    when_true: port("when_true"),
                    when_false: port("when_false"),
                },
                "pll" => Op::Pll {
                    re: port("re"),
                    im: port("im"),
                    freeze: opt_port("freeze"),
                    kp: req("kp")?,
                    ki: req("ki")?,
                },
                "to-dq" => Op::ToDq {
                    re: port("re"),
                    im: port("im"),
                    angle: port("angle"),
                },
                "from-dq" => Op::FromDq {
                    d: port("d"),
                    q: port("q"),
                    angle: port("angle"),
                },
                "magnitude" => Op::Magnitude {
                    re: port("re"),
                    im: port("im"),
                },
                "power" => Op::Power {
                    v_re: port("v_re"),
                    v_im: port("v_im"),
                    i_re: port("i_re"),
                    i_im: port("i_im"),
                },
                "current-limit" => {
                    let value = b
                        .options
                        .get("priority")
                        .cloned()
                        .unwrap_or_else(|| "active".into());
                    let reactive_first = match value.as_str() {
                        "active" => false,
                        "reactive" => true,
                        _ => {
                            return Err(TemplateError::BadOption {
                                block: b.name.clone(),
                                option: "priority".into(),
                                value,
                                expected: "`active` or `reactive` (which current is served first)"
                                    .into(),
                            })
                        }
                    };
                    Op::CurrentLimit {
                        p: port("p"),
                        q: port("q"),
                        i_max: req("i_max")?,
                        reactive_first,
                        flag: opt_port("reactive_priority"),
                    }
                }
                "delay" => Op::Delay { u: port("u") },
                "hold" => Op::Hold { u: port("u") },
                other => unreachable!("kind `{other}` is in the catalogue but not compiled"),
            };
            if info.states + info.memories > 0 {
                stateful.push(blocks.len());
            }
            blocks.push(Compiled {
                name: b.name.clone(),
                op,
                out: first_out[bi],
                state: state_len,
                state_output: info.state_output,
            });
            state_len += info.states + info.memories;
        }

        let outputs = {
            let o = &template.outputs;
            let mut r = [0; 4];
            for (k, (output, signal)) in [
                ("i_re", &o.i_re),
                ("i_im", &o.i_im),
                ("p", &o.p),
                ("q", &o.q),
            ]
            .into_iter()
            .enumerate()
            {
                r[k] = *signal_index.get(signal.as_str()).ok_or_else(|| {
                    TemplateError::UnknownOutput {
                        output: output.into(),
                        signal: signal.clone(),
                    }
                })?;
            }
            r
        };

        let names = |ids: Vec<usize>| ids.into_iter().map(|i| blocks[i].name.clone()).collect();
        let feedthrough: Vec<usize> = (0..blocks.len())
            .filter(|&i| !blocks[i].state_output)
            .collect();
        // state-output blocks are sources of the running graph
        for (node, deps) in run_deps.iter_mut() {
            let _ = node;
            deps.retain(|d| !blocks[*d].state_output);
        }
        let run_order =
            topological(&feedthrough, &run_deps).map_err(|cycle| TemplateError::AlgebraicLoop {
                blocks: names(cycle),
            })?;
        let all: Vec<usize> = (0..blocks.len()).collect();
        let init_order =
            topological(&all, &init_deps).map_err(|cycle| TemplateError::InitialisationLoop {
                blocks: names(cycle),
            })?;

        // signals fixed for a run: a setpoint or constant, and gains, sums and products of
        // only such signals (evaluated once, at initialisation)
        let mut fixed_signal = vec![false; signal_names.len()];
        let mut run_varying = Vec::with_capacity(run_order.len());
        for &bi in &run_order {
            let b: &Compiled = &blocks[bi];
            let fixed = match &b.op {
                Op::Constant(_) | Op::Setpoint(_) => true,
                Op::Gain { u, .. } => fixed_signal[*u],
                Op::Sum(terms) => terms.iter().all(|(s, _)| fixed_signal[*s]),
                Op::Product(factors) => factors.iter().all(|(s, _)| fixed_signal[*s]),
                _ => false,
            };
            if fixed {
                fixed_signal[b.out] = true;
            } else {
                run_varying.push(bi);
            }
        }
        let state_outputs = (0..blocks.len())
            .filter(|&bi| blocks[bi].state_output)
            .collect();
        let values = template.parameters.iter().map(|p| p.value).collect();
        let free = template
            .parameters
            .iter()
            .enumerate()
            .filter(|(_, p)| !p.fixed)
            .map(|(k, _)| k)
            .collect();
        Ok(Self {
            template: template.clone(),
            signal_names,
            blocks,
            run_varying,
            state_outputs,
            stateful,
            init_order,
            state_len,
            values,
            free,
            outputs,
            omega_b: 2.0 * PI * template.f_nom_hz,
        })
    }

    pub fn template(&self) -> &Template {
        &self.template
    }

    /// Names of all signals (inputs first, then block outputs).
    pub fn signal_names(&self) -> &[String] {
        &self.signal_names
    }

    /// Names of the fitted parameters, in the order `simulate` takes their values.
    pub fn free_parameter_names(&self) -> Vec<String> {
        self.free
            .iter()
            .map(|&k| self.template.parameters[k].name.clone())
            .collect()
    }

    /// Declared values of the fitted parameters.
    pub fn free_parameter_values(&self) -> Vec<f64> {
        self.free.iter().map(|&k| self.values[k]).collect()
    }

    /// (lower, upper) bounds of the fitted parameters.
    pub fn free_parameter_bounds(&self) -> Vec<(f64, f64)> {
        self.free
            .iter()
            .map(|&k| {
                let [lo, hi] = self.template.parameters[k].bounds;
                (lo, hi)
            })
            .collect()
    }

    /// Continuous states (see [`Template::state_count`]).
    pub fn state_count(&self) -> usize {
        self.template.state_count()
    }

    fn all_params<S: Scalar>(&self, free: &[S]) -> Vec<S> {
        assert_eq!(free.len(), self.free.len(), "free parameter count");
        let mut all: Vec<S> = self.values.iter().map(|&v| S::cst(v)).collect();
        for (slot, value) in self.free.iter().zip(free) {
            all[*slot] = *value;
        }
        all
    }

    /// Simulate over a whole input series with the fitted parameters `free` (physical values,
    /// in [`free_parameter_names`](Self::free_parameter_names) order).
    pub fn simulate<S: Scalar>(
        &self,
        free: &[S],
        input: &InputSeries<'_>,
        config: &EvalConfig,
    ) -> OutputSeries<S> {
        let n = input.v_re.len();
        assert_eq!(input.v_im.len(), n, "v_im length");
        if let Some(f) = input.f_grid {
            assert_eq!(f.len(), n, "f_grid length");
        }
        let mut out = OutputSeries {
            i_re: Vec::with_capacity(n),
            i_im: Vec::with_capacity(n),
            p: Vec::with_capacity(n),
            q: Vec::with_capacity(n),
        };
        if n == 0 {
            return out;
        }
        let sample = |k: usize| Sample {
            v_re: input.v_re[k],
            v_im: input.v_im[k],
            f_grid: input.f_grid.map_or(1.0, |f| f[k]),
        };
        let mut sim = Simulator::new(
            self,
            free,
            sample(0),
            &input.initial,
            input.step_s,
            config.substeps,
        );
        for k in 0..n {
            let y = sim.step(sample(k));
            out.i_re.push(y[0]);
            out.i_im.push(y[1]);
            out.p.push(y[2]);
            out.q.push(y[3]);
        }
        out
    }
}

/// Settings of an evaluation.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct EvalConfig {
    substeps: usize,
}

impl Default for EvalConfig {
    fn default() -> Self {
        Self { substeps: 1 }
    }
}

impl EvalConfig {
    /// Internal steps per input sample (h = sample step / substeps; the input is held over
    /// them). Must be ≥ 1; the default 1 runs at the sample step.
    pub fn with_substeps(mut self, substeps: usize) -> Result<Self, TemplateError> {
        if substeps == 0 {
            return Err(TemplateError::BadSetting {
                setting: "substeps",
                value: "0".into(),
                expected: "at least 1 internal step per sample",
            });
        }
        self.substeps = substeps;
        Ok(self)
    }

    pub fn substeps(&self) -> usize {
        self.substeps
    }
}

/// One input sample.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Sample {
    pub v_re: f64,
    pub v_im: f64,
    /// grid frequency (pu); 1 when not recorded
    pub f_grid: f64,
}

/// The first recorded output sample: setpoints start from it.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct InitialOutputs {
    pub p: f64,
    pub q: f64,
    pub i_re: f64,
    pub i_im: f64,
}

impl InitialOutputs {
    /// From the first voltage and power samples (i = conj(S/v)).
    pub fn from_power(v_re: f64, v_im: f64, p: f64, q: f64) -> Self {
        let u2 = v_re * v_re + v_im * v_im;
        // S = v·conj(i) ⇒ i = conj(S)/conj(v) = (p − jq)(v_re + j·v_im)/|v|²
        let (i_re, i_im) = if u2 > 0.0 {
            ((p * v_re + q * v_im) / u2, (p * v_im - q * v_re) / u2)
        } else {
            (0.0, 0.0)
        };
        Self { p, q, i_re, i_im }
    }
}

/// A uniformly sampled input series.
#[derive(Debug, Clone, Copy)]
pub struct InputSeries<'a> {
    pub step_s: f64,
    pub v_re: &'a [f64],
    pub v_im: &'a [f64],
    pub f_grid: Option<&'a [f64]>,
    pub initial: InitialOutputs,
}

/// Outputs at the input sample times.
#[derive(Debug, Clone, PartialEq)]
pub struct OutputSeries<S> {
    pub i_re: Vec<S>,
    pub i_im: Vec<S>,
    pub p: Vec<S>,
    pub q: Vec<S>,
}

/// A running block model: states and signals between steps (also what an FMU will hold).
#[derive(Debug, Clone)]
pub struct Simulator<'m, S: Scalar> {
    model: &'m BlockModel,
    run: BlockRun<S>,
}

/// Everything of a running block model except the model itself: parameters, per-step
/// coefficients, signals and states. An FMU instance owns one next to its [`BlockModel`] and
/// steps it without allocating ([`BlockRun::step`]); [`Simulator`] pairs one with a borrowed
/// model for the tool's side.
#[derive(Debug, Clone)]
pub struct BlockRun<S: Scalar> {
    params: Vec<S>,
    /// per block: the lag coefficient a = 1 − e^{−h/T} of lags, washouts and lead-lags (0
    /// elsewhere), fixed for a run because h and the parameters are
    lag: Vec<S>,
    signals: Vec<S>,
    state: Vec<S>,
    next_state: Vec<S>,
    initial: InitialOutputs,
    first: Sample,
    h: f64,
    substeps: usize,
}

fn lag_coefficient<S: Scalar>(h: f64, t: S) -> S {
    // a = 1 − e^{−h/T}, exact zero-order-hold discretisation of 1/(1+sT)
    -(-(S::cst(h) / t)).exp_m1()
}

fn num<S: Scalar>(params: &[S], n: Num) -> S {
    match n {
        Num::Const(v) => S::cst(v),
        Num::Param { index, negate } => {
            if negate {
                -params[index]
            } else {
                params[index]
            }
        }
    }
}

fn clamp<S: Scalar>(x: S, lo: S, hi: S) -> S {
    if x.value() > hi.value() {
        hi
    } else if x.value() < lo.value() {
        lo
    } else {
        x
    }
}

fn set_inputs<S: Scalar>(signals: &mut [S], s: Sample) {
    signals[0] = S::cst(s.v_re);
    signals[1] = S::cst(s.v_im);
    signals[2] = S::cst(s.f_grid);
}

impl<'m, S: Scalar> Simulator<'m, S> {
    /// Initialise to the steady state of the first sample: setpoints from `initial`, lags at
    /// their inputs, PI/integrator outputs at their `init` signals, the PLL on the voltage angle.
    ///
    /// # Panics
    /// When `free` has not the model's free-parameter count, or `step_s` is not > 0, or
    /// `substeps` is 0 (caller bugs).
    pub fn new(
        model: &'m BlockModel,
        free: &[S],
        first: Sample,
        initial: &InitialOutputs,
        step_s: f64,
        substeps: usize,
    ) -> Self {
        Self {
            model,
            run: BlockRun::new(model, free, first, initial, step_s, substeps),
        }
    }

    /// Outputs (i_re, i_im, p, q) at this sample, then advance to the next sample (the input
    /// is held over the `substeps` internal steps).
    pub fn step(&mut self, input: Sample) -> [S; 4] {
        self.run.step(self.model, input)
    }

    /// The outputs (i_re, i_im, p, q) the next `step` would report for `input`, without
    /// advancing (what a co-simulation host reads between steps).
    pub fn peek(&self, input: Sample) -> [S; 4] {
        let mut scratch = Vec::new();
        self.run.peek(self.model, input, &mut scratch)
    }

    /// The value of a signal after the last `step` (for inspection and tests).
    pub fn signal(&self, name: &str) -> Option<S> {
        self.model
            .signal_names
            .iter()
            .position(|n| n == name)
            .map(|k| self.run.signals[k])
    }

    /// The run without the model.
    pub fn into_run(self) -> BlockRun<S> {
        self.run
    }
}

impl<S: Scalar> BlockRun<S> {
    /// As [`Simulator::new`], for a model the caller keeps.
    ///
    /// # Panics
    /// As [`Simulator::new`].
    pub fn new(
        model: &BlockModel,
        free: &[S],
        first: Sample,
        initial: &InitialOutputs,
        step_s: f64,
        substeps: usize,
    ) -> Self {
        assert!(step_s > 0.0 && step_s.is_finite(), "step must be > 0");
        assert!(substeps > 0, "substeps must be ≥ 1");
        let params = model.all_params(free);
        let h = step_s / substeps as f64;
        let mut run = Self {
            lag: lag_coefficients(model, &params, h),
            params,
            signals: vec![S::cst(0.0); model.signal_names.len()],
            state: vec![S::cst(0.0); model.state_len],
            next_state: vec![S::cst(0.0); model.state_len],
            initial: *initial,
            first,
            h,
            substeps,
        };
        set_inputs(&mut run.signals, first);
        run.initialise(model);
        run
    }

    fn initialise(&mut self, model: &BlockModel) {
        let mut sig = std::mem::take(&mut self.signals);
        for &bi in &model.init_order {
            let b = &model.blocks[bi];
            match &b.op {
                Op::Lag { u, .. }
                | Op::LeadLag { u, .. }
                | Op::Delay { u }
                | Op::Hold { u }
                | Op::RateLimiter { u, .. } => sig[b.out] = sig[*u],
                Op::Washout { .. } => sig[b.out] = S::cst(0.0),
                Op::Integrator { init, .. } | Op::Pi { init, .. } => {
                    sig[b.out] = init.map_or(S::cst(0.0), |s| sig[s])
                }
                Op::Pll { re, im, .. } => {
                    sig[b.out] = sig[*im].atan2(sig[*re]);
                    sig[b.out + 1] = S::cst(1.0);
                }
                Op::Detector { .. } => {
                    // starts inactive, then decides on the first sample
                    self.state[b.state] = S::cst(0.0);
                    self.algebraic(model, &mut sig, bi);
                }
                _ => self.algebraic(model, &mut sig, bi),
            }
        }
        // states from the initial signals
        for b in &model.blocks {
            let st = &mut self.state;
            match &b.op {
                Op::Lag { u, .. } | Op::LeadLag { u, .. } | Op::Washout { u, .. } => {
                    st[b.state] = sig[*u]
                }
                Op::Delay { u } | Op::Hold { u } => st[b.state] = sig[*u],
                Op::Integrator { .. } => st[b.state] = sig[b.out],
                Op::Pi { u, kp, .. } => {
                    st[b.state] = sig[b.out] - num(&self.params, *kp) * sig[*u];
                }
                Op::Pll { .. } => {
                    st[b.state] = sig[b.out];
                    st[b.state + 1] = S::cst(0.0);
                }
                Op::Detector { .. } | Op::RateLimiter { .. } => st[b.state] = sig[b.out],
                _ => {}
            }
        }
        self.signals = sig;
    }

    /// Output of a feedthrough block from the signals `sig` and the states of this step.
    #[inline(always)]
    fn algebraic(&self, model: &BlockModel, sig: &mut [S], bi: usize) {
        let b = &model.blocks[bi];
        let out = b.out;
        let y: S = match &b.op {
            Op::Constant(v) => num(&self.params, *v),
            Op::Setpoint(q) => {
                let f = self.first;
                let i = &self.initial;
                S::cst(match q {
                    InitialQuantity::P => i.p,
                    InitialQuantity::Q => i.q,
                    InitialQuantity::U => f.v_re.hypot(f.v_im),
                    InitialQuantity::IRe => i.i_re,
                    InitialQuantity::IIm => i.i_im,
                    InitialQuantity::VRe => f.v_re,
                    InitialQuantity::VIm => f.v_im,
                })
            }
            Op::Gain { u, k } => num(&self.params, *k) * sig[*u],
            Op::Sum(terms) => terms.iter().fold(S::cst(0.0), |a, &(s, sign)| {
                if sign < 0.0 {
                    a - sig[s]
                } else {
                    a + sig[s]
                }
            }),
            Op::Product(factors) => {
                factors.iter().fold(
                    S::cst(1.0),
                    |a, &(s, divide)| {
                        if divide {
                            a / sig[s]
                        } else {
                            a * sig[s]
                        }
                    },
                )
            }
            Op::LeadLag { u, t_lead, t_lag } => {
                let ratio = num(&self.params, *t_lead) / num(&self.params, *t_lag);
                ratio * sig[*u] + (S::cst(1.0) - ratio) * self.state[b.state]
            }
            Op::Washout { u, .. } => sig[*u] - self.state[b.state],
            Op::Pi { u, kp, .. } => num(&self.params, *kp) * sig[*u] + self.state[b.state],
            Op::Limiter { u, min, max } => {
                clamp(sig[*u], num(&self.params, *min), num(&self.params, *max))
            }
            Op::VariableLimiter { u, min, max } => clamp(sig[*u], sig[*min], sig[*max]),
            Op::RateLimiter { u, rise, fall } => {
                let prev = self.state[b.state];
                let step = sig[*u] - prev;
                let h = S::cst(self.h);
                let step = match rise {
                    Some(r) if step.value() > (num(&self.params, *r) * h).value() => {
                        num(&self.params, *r) * h
                    }
                    _ => step,
                };
                let step = match fall {
                    Some(f) if step.value() < -(num(&self.params, *f) * h).value() => {
                        -(num(&self.params, *f) * h)
                    }
                    _ => step,
                };
                prev + step
            }
            Op::DeadBand { u, width } => {
                let (x, w) = (sig[*u], num(&self.params, *width));
                if x.value() > w.value() {
                    x - w
                } else if x.value() < -w.value() {
                    x + w
                } else {
                    S::cst(0.0)
                }
            }
            Op::Detector {
                u,
                threshold,
                hysteresis,
                below,
            } => {
                let on = self.state[b.state].value() > 0.5;
                let x = sig[*u].value();
                let th = num(&self.params, *threshold).value();
                let hy = num(&self.params, *hysteresis).value();
                let now_on = match (*below, on) {
                    (true, false) => x < th,
                    (true, true) => x <= th + hy,
                    (false, false) => x > th,
                    (false, true) => x >= th - hy,
                };
                S::cst(if now_on { 1.0 } else { 0.0 })
            }
            Op::Select {
                condition,
                when_true,
                when_false,
            } => {
                if sig[*condition].value() > 0.5 {
                    sig[*when_true]
                } else {
                    sig[*when_false]
                }
            }
            Op::ToDq { re, im, angle } => {
                let (c, s) = (sig[*angle].cos(), sig[*angle].sin());
                // (re + j·im)·e^{−jθ}
                let d = sig[*re] * c + sig[*im] * s;
                let q = sig[*im] * c - sig[*re] * s;
                sig[out + 1] = q;
                d
            }
            Op::FromDq { d, q, angle } => {
                let (c, s) = (sig[*angle].cos(), sig[*angle].sin());
                // (d + j·q)·e^{jθ}
                let re = sig[*d] * c - sig[*q] * s;
                let im = sig[*d] * s + sig[*q] * c;
                sig[out + 1] = im;
                re
            }
            Op::Magnitude { re, im } => (sig[*re] * sig[*re] + sig[*im] * sig[*im]).sqrt(),
            Op::Power {
                v_re,
                v_im,
                i_re,
                i_im,
            } => {
                // S = v·conj(i)
                let (vr, vi, ir, ii) = (sig[*v_re], sig[*v_im], sig[*i_re], sig[*i_im]);
                let q = vi * ir - vr * ii;
                sig[out + 1] = q;
                vr * ir + vi * ii
            }
            Op::CurrentLimit {
                p,
                q,
                i_max,
                reactive_first,
                flag,
            } => {
                let reactive_first = match flag {
                    Some(f) => sig[*f].value() > 0.5,
                    None => *reactive_first,
                };
                let imax = num(&self.params, *i_max);
                let (first, second) = if reactive_first {
                    (sig[*q], sig[*p])
                } else {
                    (sig[*p], sig[*q])
                };
                let first = clamp(first, -imax, imax);
                let room = imax * imax - first * first;
                let cap = if room.value() > 0.0 {
                    room.sqrt()
                } else {
                    S::cst(0.0)
                };
                let second = clamp(second, -cap, cap);
                let (pl, ql) = if reactive_first {
                    (second, first)
                } else {
                    (first, second)
                };
                // exact comparison: the clamp returns the bound itself when it acts
                #[allow(clippy::float_cmp)]
                let p_limited = pl.value() != sig[*p].value();
                sig[out + 1] = ql;
                sig[out + 2] = S::cst(if p_limited { 1.0 } else { 0.0 });
                pl
            }
            Op::Lag { .. }
            | Op::Integrator { .. }
            | Op::Pll { .. }
            | Op::Delay { .. }
            | Op::Hold { .. } => unreachable!("state-output block evaluated as algebraic"),
        };
        sig[out] = y;
    }

    /// Phases A and B: every signal at the current state and the inputs already in `sig`.
    /// Blocks whose output is fixed for the run (constants, setpoints and what only they feed)
    /// keep the value set at initialisation.
    fn evaluate(&self, model: &BlockModel, sig: &mut [S]) {
        for &bi in &model.state_outputs {
            let b = &model.blocks[bi];
            match &b.op {
                Op::Lag { .. } | Op::Integrator { .. } | Op::Delay { .. } | Op::Hold { .. } => {
                    sig[b.out] = self.state[b.state]
                }
                Op::Pll { .. } => {
                    sig[b.out] = self.state[b.state];
                    sig[b.out + 1] = S::cst(1.0) + self.state[b.state + 1];
                }
                _ => unreachable!("only state-output blocks here"),
            }
        }
        for &bi in &model.run_varying {
            self.algebraic(model, sig, bi);
        }
    }

    /// Phase C: advance every state by h from the signals of this step.
    fn update(&mut self, model: &BlockModel) {
        let h = self.h;
        self.next_state.copy_from_slice(&self.state);
        let params = &self.params;
        let sig = &self.signals;
        let frozen = |f: &Option<usize>| f.is_some_and(|f| sig[f].value() > 0.5);
        let ns = &mut self.next_state;
        for &bi in &model.stateful {
            let b = &model.blocks[bi];
            let x = self.state[b.state];
            match &b.op {
                Op::Lag { u, .. } | Op::Washout { u, .. } | Op::LeadLag { u, .. } => {
                    ns[b.state] = x + self.lag[bi] * (sig[*u] - x);
                }
                Op::Integrator { u, k, freeze, .. } if !frozen(freeze) => {
                    ns[b.state] = x + num(params, *k) * sig[*u] * S::cst(h);
                }
                Op::Pi { u, ki, freeze, .. } if !frozen(freeze) => {
                    ns[b.state] = x + num(params, *ki) * sig[*u] * S::cst(h);
                }
                Op::Pll {
                    re,
                    im,
                    freeze,
                    kp,
                    ki,
                } => {
                    let theta = x;
                    let integral = self.state[b.state + 1];
                    // q-axis voltage in the PLL frame
                    let vq = if frozen(freeze) {
                        S::cst(0.0)
                    } else {
                        sig[*im] * theta.cos() - sig[*re] * theta.sin()
                    };
                    let deviation = num(params, *kp) * vq + integral;
                    ns[b.state] = theta + deviation * S::cst(h * model.omega_b);
                    ns[b.state + 1] = integral + num(params, *ki) * vq * S::cst(h);
                }
                Op::Detector { .. } | Op::RateLimiter { .. } => ns[b.state] = sig[b.out],
                Op::Delay { u } => ns[b.state] = sig[*u],
                _ => {}
            }
        }
        std::mem::swap(&mut self.state, &mut self.next_state);
    }

    /// Outputs (i_re, i_im, p, q) at this sample, then advance to the next sample (the input
    /// is held over the `substeps` internal steps). Allocates nothing.
    pub fn step(&mut self, model: &BlockModel, input: Sample) -> [S; 4] {
        let mut sig = std::mem::take(&mut self.signals);
        set_inputs(&mut sig, input);
        self.evaluate(model, &mut sig);
        self.signals = sig;
        self.finish_step(model)
    }

    /// With the signals of this sample evaluated: its outputs, then the state update and the
    /// remaining substeps (the input held).
    fn finish_step(&mut self, model: &BlockModel) -> [S; 4] {
        let y = outputs_of(model, &self.signals);
        self.update(model);
        for _ in 1..self.substeps {
            let mut sig = std::mem::take(&mut self.signals);
            self.evaluate(model, &mut sig);
            self.signals = sig;
            self.update(model);
        }
        y
    }

    /// As [`BlockRun::step`] for the input of the last [`BlockRun::peek`] into `probe`, when
    /// nothing has stepped since: the probe already holds every signal of this sample, so it
    /// is swapped in instead of evaluated again (same values, bit for bit). `probe` receives
    /// the old signals (scratch for the next peek).
    ///
    /// The caller guarantees that `probe` was filled by `peek` at the present state; a
    /// `probe` of the wrong length is a caller bug (panics).
    pub fn step_from_probe(&mut self, model: &BlockModel, probe: &mut Vec<S>) -> [S; 4] {
        assert_eq!(probe.len(), self.signals.len(), "probe from another model");
        std::mem::swap(&mut self.signals, probe);
        self.finish_step(model)
    }

    /// The outputs (i_re, i_im, p, q) the next `step` would report for `input`, without
    /// advancing; `scratch` holds the signals of the probe (reused between calls, so a caller
    /// that keeps it allocates nothing).
    pub fn peek(&self, model: &BlockModel, input: Sample, scratch: &mut Vec<S>) -> [S; 4] {
        scratch.clear();
        scratch.extend_from_slice(&self.signals);
        set_inputs(scratch, input);
        self.evaluate(model, scratch);
        outputs_of(model, scratch)
    }
}

/// The model's outputs (i_re, i_im, p, q) among evaluated signals.
fn outputs_of<S: Scalar>(model: &BlockModel, sig: &[S]) -> [S; 4] {
    model.outputs.map(|k| sig[k])
}

/// The lag coefficient of every lag, washout and lead-lag block (0 for other blocks).
fn lag_coefficients<S: Scalar>(model: &BlockModel, params: &[S], h: f64) -> Vec<S> {
    model
        .blocks
        .iter()
        .map(|b| match &b.op {
            Op::Lag { t, .. } | Op::Washout { t, .. } | Op::LeadLag { t_lag: t, .. } => {
                lag_coefficient(h, num(params, *t))
            }
            _ => S::cst(0.0),
        })
        .collect()
}

/// Everything of a running `f64` [`Simulator`] that evolves or was fixed at initialisation:
/// what an FMU saves and restores (the model and its parameters are not part of it).
#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct SimulatorSnapshot {
    pub signals: Vec<f64>,
    pub state: Vec<f64>,
    /// first sample (v_re, v_im, f_grid) and initial outputs (p, q, i_re, i_im)
    pub first: [f64; 3],
    pub initial: [f64; 4],
}

impl<'m> Simulator<'m, f64> {
    /// A copy of what evolves.
    pub fn snapshot(&self) -> SimulatorSnapshot {
        self.run.snapshot()
    }

    /// Continue a run from `snapshot`; `None` when its sizes do not fit `model`.
    ///
    /// # Panics
    /// As [`Simulator::new`] for a wrong free-parameter count, step or substeps.
    pub fn resume(
        model: &'m BlockModel,
        free: &[f64],
        snapshot: &SimulatorSnapshot,
        step_s: f64,
        substeps: usize,
    ) -> Option<Self> {
        Some(Self {
            model,
            run: BlockRun::resume(model, free, snapshot, step_s, substeps)?,
        })
    }
}

impl BlockRun<f64> {
    /// A copy of what evolves.
    pub fn snapshot(&self) -> SimulatorSnapshot {
        SimulatorSnapshot {
            signals: self.signals.clone(),
            state: self.state.clone(),
            first: [self.first.v_re, self.first.v_im, self.first.f_grid],
            initial: [
                self.initial.p,
                self.initial.q,
                self.initial.i_re,
                self.initial.i_im,
            ],
        }
    }

    /// Whether `snapshot`'s sizes fit `model`.
    pub fn fits(model: &BlockModel, snapshot: &SimulatorSnapshot) -> bool {
        snapshot.signals.len() == model.signal_names.len()
            && snapshot.state.len() == model.state_len
    }

    /// Continue a run from `snapshot`; `None` when its sizes do not fit `model`.
    ///
    /// # Panics
    /// As [`Simulator::new`] for a wrong free-parameter count, step or substeps.
    pub fn resume(
        model: &BlockModel,
        free: &[f64],
        snapshot: &SimulatorSnapshot,
        step_s: f64,
        substeps: usize,
    ) -> Option<Self> {
        assert!(step_s > 0.0 && step_s.is_finite(), "step must be > 0");
        assert!(substeps > 0, "substeps must be ≥ 1");
        if !Self::fits(model, snapshot) {
            return None;
        }
        let [v_re, v_im, f_grid] = snapshot.first;
        let [p, q, i_re, i_im] = snapshot.initial;
        let params = model.all_params(free);
        let h = step_s / substeps as f64;
        Some(Self {
            lag: lag_coefficients(model, &params, h),
            params,
            signals: snapshot.signals.clone(),
            state: snapshot.state.clone(),
            next_state: vec![0.0; model.state_len],
            initial: InitialOutputs { p, q, i_re, i_im },
            first: Sample { v_re, v_im, f_grid },
            h,
            substeps,
        })
    }
}

//! The declarative description of a block model (serde: JSON or TOML a user can write).

use serde::{Deserialize, Serialize};
use std::collections::BTreeMap;

/// A grey-box template: named physical parameters and a block diagram between the terminal
/// voltage (inputs `v_re`, `v_im`, optionally `f_grid`) and the injected current and power.
///
/// Units: per unit on the unit's rating, time in seconds, phasors in the network frame (rotating
/// at nominal frequency), generator convention S = v·conj(i).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Template {
    pub name: String,
    #[serde(default)]
    pub description: String,
    /// Nominal frequency (Hz): the PLL's angle speed per pu of frequency is 2π·f_nom.
    #[serde(default = "default_f_nom")]
    pub f_nom_hz: f64,
    pub outputs: OutputMap,
    pub parameters: Vec<ParameterSpec>,
    pub blocks: Vec<BlockSpec>,
}

fn default_f_nom() -> f64 {
    50.0
}

/// Which signals are the model's outputs.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct OutputMap {
    pub i_re: String,
    pub i_im: String,
    pub p: String,
    pub q: String,
}

/// A limit a parameter may be taken to when the model is reduced.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, Serialize, Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum LimitKind {
    /// p → 0 (a time constant vanishes, a gain removes its path...)
    ToZero,
    /// p → ∞ (a time constant freezes its output, a limit stops binding...)
    ToInfinity,
    /// p merges with another parameter that also declares `merge` (both take one value)
    Merge,
    /// a PI's gains grow without bound at a fixed ratio (ideal tracking)
    IdealTracking,
}

/// One physical parameter. Fitting works in ln(value), so values and bounds are positive;
/// a block that needs a negative number refers to `-name`.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct ParameterSpec {
    pub name: String,
    /// unit or per-unit base, e.g. "s", "pu", "pu/s", "pu current / pu power"
    pub unit: String,
    /// one line of physical meaning, used in reduction sentences
    pub meaning: String,
    pub value: f64,
    /// [lower, upper], both > 0
    pub bounds: [f64; 2],
    /// held at `value` during fitting (thresholds whose effect is a switch time)
    #[serde(default)]
    pub fixed: bool,
    /// the limits a reduction may take this parameter to
    #[serde(default)]
    pub limits: Vec<LimitKind>,
}

/// A number in a block setting: a literal, the name of a parameter, or `-name`.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(untagged)]
pub enum ParamRef {
    Value(f64),
    Name(String),
}

impl ParamRef {
    /// The parameter named (without a leading `-`) and whether it is negated.
    pub fn parameter(&self) -> Option<(&str, bool)> {
        match self {
            ParamRef::Value(_) => None,
            ParamRef::Name(n) => Some(match n.strip_prefix('-') {
                Some(rest) => (rest, true),
                None => (n.as_str(), false),
            }),
        }
    }
}

/// One block. Its output signal is called `name` (single output) or `name.port` (several).
///
/// `inputs` maps input ports to signal names; `params` maps settings to numbers or parameter
/// names; `terms` lists the signed terms of `sum` (`"+a"`, `"-b"`) and the factors of `product`
/// (`"a"`, `"/b"`); `options` holds the few word-valued settings.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct BlockSpec {
    pub name: String,
    pub kind: String,
    #[serde(default, skip_serializing_if = "BTreeMap::is_empty")]
    pub inputs: BTreeMap<String, String>,
    #[serde(default, skip_serializing_if = "BTreeMap::is_empty")]
    pub params: BTreeMap<String, ParamRef>,
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub terms: Vec<String>,
    #[serde(default, skip_serializing_if = "BTreeMap::is_empty")]
    pub options: BTreeMap<String, String>,
    /// a comment for the reader; ignored by the engine
    #[serde(default, skip_serializing_if = "String::is_empty")]
    pub note: String,
}

impl BlockSpec {
    pub fn new(name: &str, kind: &str) -> Self {
        Self {
            name: name.into(),
            kind: kind.into(),
            inputs: BTreeMap::new(),
            params: BTreeMap::new(),
            terms: Vec::new(),
            options: BTreeMap::new(),
            note: String::new(),
        }
    }
    pub fn input(mut self, port: &str, signal: &str) -> Self {
        self.inputs.insert(port.into(), signal.into());
        self
    }
    pub fn param(mut self, setting: &str, value: ParamRef) -> Self {
        self.params.insert(setting.into(), value);
        self
    }
    pub fn option(mut self, key: &str, value: &str) -> Self {
        self.options.insert(key.into(), value.into());
        self
    }
    pub fn terms(mut self, terms: &[&str]) -> Self {
        self.terms = terms.iter().map(|s| s.to_string()).collect();
        self
    }
}

impl Template {
    pub fn parameter(&self, name: &str) -> Option<&ParameterSpec> {
        self.parameters.iter().find(|p| p.name == name)
    }
    pub fn parameter_mut(&mut self, name: &str) -> Option<&mut ParameterSpec> {
        self.parameters.iter_mut().find(|p| p.name == name)
    }
    /// Names of the parameters that are fitted (not `fixed`), in declaration order.
    pub fn free_parameter_names(&self) -> Vec<String> {
        self.parameters
            .iter()
            .filter(|p| !p.fixed)
            .map(|p| p.name.clone())
            .collect()
    }
    /// Number of continuous states (lag, lead-lag, washout, integrator, PI: one each; PLL: two).
    /// One-sample memories (delay, hold, rate limiter, switch) are not counted.
    pub fn state_count(&self) -> usize {
        self.blocks
            .iter()
            .map(|b| super::kinds::continuous_states(&b.kind))
            .sum()
    }
    /// Set a parameter's value (checked later by `BlockModel::compile`).
    pub fn with_value(mut self, name: &str, value: f64) -> Self {
        if let Some(p) = self.parameter_mut(name) {
            p.value = value;
        }
        self
    }
}

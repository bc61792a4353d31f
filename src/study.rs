//! The study file (TOML): which unit, which scenario design, how to simulate.

use crate::scenario::ScenarioDesign;
use crate::simulate::SimulationSettings;
use crate::Error;
use serde::{Deserialize, Serialize};
use std::path::Path;
use understudy_runtime::cosim::{Bases, ModelFile};
use understudy_runtime::unit::full_converter::FullConverterParams;

/// Kinds of built-in detailed models.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum UnitKind {
    FullConverter,
    DoublyFed,
}

impl std::str::FromStr for UnitKind {
    type Err = Error;
    fn from_str(s: &str) -> Result<Self, Error> {
        match s {
            "full-converter" => Ok(UnitKind::FullConverter),
            "doubly-fed" => Ok(UnitKind::DoublyFed),
            other => Err(Error::bad_input(
                "--unit",
                other,
                "`full-converter`, `doubly-fed` or `fmu:PATH`",
            )),
        }
    }
}

/// The unit under study: its kind, rating and model parameters.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct UnitSpec {
    pub kind: UnitKind,
    /// Rated apparent power: the per-unit power base (MVA).
    pub rating_mva: f64,
    /// Nominal line-to-line voltage at the terminal: the per-unit voltage base (kV).
    pub voltage_kv: f64,
    /// Model parameters (per unit on the rating); omitted ones take their defaults.
    #[serde(default)]
    pub params: FullConverterParams,
}

impl UnitSpec {
    pub fn validate(&self) -> Result<(), Error> {
        for (field, v) in [
            ("unit.rating_mva", self.rating_mva),
            ("unit.voltage_kv", self.voltage_kv),
        ] {
            if !(v.is_finite() && v > 0.0) {
                return Err(Error::bad_input(field, v.to_string(), "a value > 0"));
            }
        }
        if self.kind == UnitKind::DoublyFed {
            return Err(Error::bad_input(
                "unit.kind",
                "doubly-fed",
                "`full-converter`: the doubly-fed detailed model is not available in this version",
            ));
        }
        self.params.validate()?;
        Ok(())
    }
}

/// A study: a named unit, a scenario design and simulation settings.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Study {
    pub name: String,
    pub unit: UnitSpec,
    #[serde(default)]
    pub design: ScenarioDesign,
    #[serde(default)]
    pub simulation: SimulationSettings,
}

impl Study {
    /// Parse a study from TOML text; errors name `origin`, the line and the offending key.
    pub fn from_toml(text: &str, origin: &Path) -> Result<Self, Error> {
        let study: Study = toml::from_str(text).map_err(|e| {
            let line = e
                .span()
                .map(|s| text[..s.start.min(text.len())].matches('\n').count() + 1);
            Error::BadFile {
                path: origin.to_path_buf(),
                message: match line {
                    Some(l) => format!("line {l}: {}", e.message()),
                    None => e.message().to_string(),
                },
            }
        })?;
        study.validate()?;
        Ok(study)
    }

    pub fn load(path: &Path) -> Result<Self, Error> {
        let text = std::fs::read_to_string(path).map_err(|e| Error::io(path, e))?;
        Self::from_toml(&text, path)
    }

    /// The study's detailed unit as a model file (what `export` packages into an FMU).
    pub fn detailed_model_file(&self) -> ModelFile {
        ModelFile::full_converter(
            &self.name,
            self.unit.params.clone(),
            Bases {
                s_base_mva: self.unit.rating_mva,
                v_base_kv: self.unit.voltage_kv,
            },
        )
    }

    pub fn validate(&self) -> Result<(), Error> {
        self.unit.validate()?;
        self.design.validate()?;
        self.simulation.validate()?;
        Ok(())
    }
}

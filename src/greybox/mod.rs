//! Grey-box templates in the tool: the built-in generic converter template, reading template
//! files, and the fitting adapter [`TemplateFit`] that shows a block-model template to the
//! model-agnostic fitter and MBAM (`crate::fit`, `crate::reduce`) as a [`LeastSquaresModel`].
//!
//! The engine itself (templates as data, checking, simulation, exact sensitivities, limits)
//! lives in `understudy_runtime::block`, so the FMU runs the very same code.

#![deny(clippy::float_cmp)]

mod fit;
mod reducer;

pub use fit::{FitTrace, SignalWeights, TemplateFit};
pub use reducer::TemplateReducer;

use std::path::{Path, PathBuf};
use thiserror::Error;
use understudy_runtime::block::{Template, TemplateError};

/// The built-in generic full-converter template (TOML text).
pub const GENERIC_CONVERTER_TOML: &str =
    include_str!("../../demo-models/templates/generic-converter.toml");

#[derive(Debug, Error)]
pub enum GreyboxError {
    #[error("template {origin}: {message}")]
    Parse { origin: String, message: String },
    #[error("template {origin}: {source}")]
    Invalid {
        origin: String,
        #[source]
        source: Box<TemplateError>,
    },
    #[error("{path}: {source}")]
    Io {
        path: PathBuf,
        source: std::io::Error,
    },
    #[error("trace {trace}: {message}")]
    BadTrace { trace: String, message: String },
    #[error("no traces to fit")]
    NoTraces,
}

/// Parse a template from TOML or JSON text (`json` chooses) and check it.
pub fn parse_template(text: &str, json: bool, origin: &str) -> Result<Template, GreyboxError> {
    let template: Template = if json {
        serde_json::from_str(text).map_err(|e| GreyboxError::Parse {
            origin: origin.into(),
            message: e.to_string(),
        })?
    } else {
        toml::from_str(text).map_err(|e| GreyboxError::Parse {
            origin: origin.into(),
            message: e.to_string(),
        })?
    };
    understudy_runtime::block::BlockModel::compile(&template).map_err(|source| {
        GreyboxError::Invalid {
            origin: origin.into(),
            source: Box::new(source),
        }
    })?;
    Ok(template)
}

/// Read a template file (`.json` as JSON, anything else as TOML).
pub fn read_template(path: &Path) -> Result<Template, GreyboxError> {
    let text = std::fs::read_to_string(path).map_err(|source| GreyboxError::Io {
        path: path.to_path_buf(),
        source,
    })?;
    let json = path.extension().is_some_and(|e| e == "json");
    parse_template(&text, json, &path.display().to_string())
}

/// The built-in generic full-converter template.
pub fn generic_converter() -> Template {
    parse_template(
        GENERIC_CONVERTER_TOML,
        false,
        "generic-converter (built in)",
    )
    .expect("the built-in template is valid (checked by the test suite)")
}

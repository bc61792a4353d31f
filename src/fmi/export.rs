//! Write a model file as an FMI 2.0 or FMI 3.0 Co-Simulation FMU (a zip archive):
//!
//! ```text
//! modelDescription.xml
//! binaries/linux64/<modelIdentifier>.so     the understudy-runtime cdylib (FMI 2.0;
//! binaries/x86_64-linux/<modelIdentifier>.so  FMI 3.0: the same library serves both)
//! resources/model.json                      the model file (its bytes fix the GUID)
//! documentation/index.html                  what the FMU is and how far to trust it
//! ```
//!
//! The description's variables, capability flags and log categories come from the same tables
//! the runtime serves (`understudy_runtime::variables`, `understudy_runtime::fmi2`), so the two
//! cannot disagree. The archive is built in memory and written atomically (temp name + rename).
//!
//! Finding the runtime library: `cargo build` of the `understudy` package also builds the
//! runtime's cdylib, as `target/<profile>/deps/libunderstudy_runtime.so` (and
//! `target/<profile>/libunderstudy_runtime.so` when the runtime package is built on its own).
//! [`find_runtime_library`] looks there relative to the running executable (the CLI lives in
//! `target/<profile>/`, test binaries in `target/<profile>/deps/`), whatever the working folder,
//! and takes the most recently built candidate; `UNDERSTUDY_RUNTIME_LIB` overrides the search
//! (for an installed binary with the library elsewhere). A candidate must carry the FMI entry
//! points and understand this tool's model-file format, or it is refused.

use crate::atomic::write_atomic;
use quick_xml::events::{BytesDecl, BytesEnd, BytesStart, Event};
use quick_xml::Writer;
use std::io::{Cursor, Write};
use std::path::{Path, PathBuf};
use thiserror::Error;
use understudy_runtime::cosim::{CoSimError, ModelFile, MODEL_FORMAT};
use understudy_runtime::fmi2::{CAPABILITIES, LOG_CATEGORIES};
use understudy_runtime::fmi3::CAPABILITIES as CAPABILITIES_3;
use understudy_runtime::variables::{Causality, VarType, Variable, VARIABLES};

/// FMI version of an export.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum FmiVersion {
    V2,
    V3,
}

/// What an export wrote.
#[derive(Debug, Clone, PartialEq)]
pub struct ExportReport {
    pub path: PathBuf,
    pub guid: String,
    pub model_identifier: String,
    /// The runtime library copied into the FMU.
    pub runtime_library: PathBuf,
    pub bytes: usize,
}

#[derive(Debug, Error)]
pub enum ExportError {
    #[error("model file is invalid: {0}")]
    Model(#[from] CoSimError),
    #[error(
        "the understudy runtime library was not found; looked at: {}. {hint}",
        looked.iter().map(|p| p.display().to_string()).collect::<Vec<_>>().join(", ")
    )]
    RuntimeNotFound { looked: Vec<PathBuf>, hint: String },
    #[error("{path}: not a usable understudy runtime library: {message}")]
    BadRuntime { path: PathBuf, message: String },
    #[error("{path}: {source}")]
    Io {
        path: PathBuf,
        source: std::io::Error,
    },
    #[error("building the FMU archive: {0}")]
    Archive(String),
    #[error("FMUs can be built on linux64 only for now (this is {0})")]
    Platform(&'static str),
}

/// File name of the runtime's shared library on this platform.
pub const RUNTIME_LIBRARY_NAME: &str = "libunderstudy_runtime.so";

/// Write `model` as an FMU at `out` (atomically).
pub fn export_fmu(
    model: &ModelFile,
    out: &Path,
    fmi_version: FmiVersion,
) -> Result<ExportReport, ExportError> {
    if !(cfg!(target_os = "linux") && cfg!(target_pointer_width = "64")) {
        return Err(ExportError::Platform(std::env::consts::OS));
    }
    model.validate()?;
    let runtime = find_runtime_library()?;
    check_runtime_serves(&runtime, fmi_version)?;
    let library = std::fs::read(&runtime).map_err(|source| ExportError::Io {
        path: runtime.clone(),
        source,
    })?;
    let model_json = model.to_json();
    let guid = ModelFile::guid_of(model_json.as_bytes());
    let model_identifier = model_identifier(&model.name);
    let (description, platform) = match fmi_version {
        FmiVersion::V2 => (
            model_description(model, &guid, &model_identifier),
            "linux64",
        ),
        FmiVersion::V3 => (
            model_description_v3(model, &guid, &model_identifier),
            "x86_64-linux",
        ),
    };
    let documentation = documentation(model, &guid, fmi_version);

    let mut zip = zip::ZipWriter::new(Cursor::new(Vec::new()));
    let deflated = zip::write::SimpleFileOptions::default()
        .compression_method(zip::CompressionMethod::Deflated)
        .unix_permissions(0o644);
    let entries: [(String, &[u8], u32); 4] = [
        ("modelDescription.xml".into(), description.as_bytes(), 0o644),
        (
            format!("binaries/{platform}/{model_identifier}.so"),
            &library,
            0o755,
        ),
        ("resources/model.json".into(), model_json.as_bytes(), 0o644),
        (
            "documentation/index.html".into(),
            documentation.as_bytes(),
            0o644,
        ),
    ];
    for (name, bytes, mode) in entries {
        zip.start_file(name.as_str(), deflated.unix_permissions(mode))
            .map_err(|e| ExportError::Archive(format!("{name}: {e}")))?;
        zip.write_all(bytes)
            .map_err(|e| ExportError::Archive(format!("{name}: {e}")))?;
    }
    let archive = zip
        .finish()
        .map_err(|e| ExportError::Archive(e.to_string()))?
        .into_inner();
    write_atomic(out, &archive).map_err(|source| ExportError::Io {
        path: out.to_path_buf(),
        source,
    })?;
    Ok(ExportReport {
        path: out.to_path_buf(),
        guid,
        model_identifier,
        runtime_library: runtime,
        bytes: archive.len(),
    })
}

/// A C identifier made from the model's name (letters, digits, `_`; never a leading digit).
pub fn model_identifier(name: &str) -> String {
    let mut id: String = name
        .chars()
        .map(|c| if c.is_ascii_alphanumeric() { c } else { '_' })
        .collect();
    if id.is_empty() || id.starts_with(|c: char| c.is_ascii_digit()) {
        id.insert_str(0, "understudy_");
    }
    id
}

/// Where the runtime library is looked for (see the module documentation), in that order.
pub fn runtime_library_candidates() -> Vec<PathBuf> {
    let mut out = Vec::new();
    if let Ok(exe) = std::env::current_exe() {
        let exe = exe.canonicalize().unwrap_or(exe);
        if let Some(dir) = exe.parent() {
            out.push(dir.join(RUNTIME_LIBRARY_NAME));
            out.push(dir.join("deps").join(RUNTIME_LIBRARY_NAME));
            if dir.file_name().is_some_and(|n| n == "deps") {
                if let Some(profile) = dir.parent() {
                    out.push(profile.join(RUNTIME_LIBRARY_NAME));
                }
            }
        }
    }
    out
}

/// The runtime library to put into an FMU: `UNDERSTUDY_RUNTIME_LIB` if set, otherwise the most
/// recently built of [`runtime_library_candidates`].
pub fn find_runtime_library() -> Result<PathBuf, ExportError> {
    if let Some(p) = std::env::var_os("UNDERSTUDY_RUNTIME_LIB") {
        let p = PathBuf::from(p);
        check_runtime(&p)?;
        return Ok(p);
    }
    let candidates = runtime_library_candidates();
    let newest = candidates
        .iter()
        .filter_map(|p| {
            let modified = std::fs::metadata(p).and_then(|m| m.modified()).ok()?;
            Some((modified, p))
        })
        .max_by_key(|(modified, _)| *modified)
        .map(|(_, p)| p.clone());
    match newest {
        Some(p) => {
            check_runtime(&p)?;
            Ok(p)
        }
        None => Err(ExportError::RuntimeNotFound {
            looked: candidates,
            hint: "Build it with `cargo build --release` (it is built with the understudy binary) \
                   or point UNDERSTUDY_RUNTIME_LIB at libunderstudy_runtime.so"
                .into(),
        }),
    }
}

/// A runtime library must carry the entry points of the FMI version asked for.
fn check_runtime_serves(path: &Path, version: FmiVersion) -> Result<(), ExportError> {
    let (symbol, name) = match version {
        FmiVersion::V2 => (&b"fmi2DoStep"[..], "2.0"),
        FmiVersion::V3 => (&b"fmi3DoStep"[..], "3.0"),
    };
    let bytes = std::fs::read(path).map_err(|source| ExportError::Io {
        path: path.to_path_buf(),
        source,
    })?;
    if !bytes.windows(symbol.len()).any(|w| w == symbol) {
        return Err(ExportError::BadRuntime {
            path: path.to_path_buf(),
            message: format!("it exports no FMI {name} functions (built from an older version?)"),
        });
    }
    Ok(())
}

fn check_runtime(path: &Path) -> Result<(), ExportError> {
    let bytes = std::fs::read(path).map_err(|source| ExportError::Io {
        path: path.to_path_buf(),
        source,
    })?;
    let bad = |message: String| ExportError::BadRuntime {
        path: path.to_path_buf(),
        message,
    };
    if !bytes.starts_with(b"\x7fELF") {
        return Err(bad("not an ELF shared library".into()));
    }
    let contains = |needle: &[u8]| bytes.windows(needle.len()).any(|w| w == needle);
    if !contains(b"fmi2DoStep") {
        return Err(bad("it exports no FMI 2.0 functions".into()));
    }
    if !contains(MODEL_FORMAT.as_bytes()) {
        return Err(bad(format!(
            "it does not read model files of format `{MODEL_FORMAT}` (built from another version?)"
        )));
    }
    Ok(())
}

/// Attribute values of a variable as written in `ModelVariables`.
fn variability(v: &Variable) -> &'static str {
    match (v.causality, v.ty) {
        (Causality::Parameter, _) => "fixed",
        (_, VarType::Boolean) => "discrete",
        _ => "continuous",
    }
}

fn initial(v: &Variable) -> Option<&'static str> {
    match v.causality {
        Causality::Parameter => Some("exact"),
        Causality::Output => Some("calculated"),
        // inputs carry a start value and no `initial` (FMI 2.0, §2.2.7 table of combinations)
        Causality::Input => None,
    }
}

fn causality(v: &Variable) -> &'static str {
    match v.causality {
        Causality::Input => "input",
        Causality::Output => "output",
        Causality::Parameter => "parameter",
    }
}

fn start_value(model: &ModelFile, v: &Variable) -> Option<f64> {
    use understudy_runtime::variables::vr;
    let s = &model.start;
    Some(match v.vr {
        vr::V_RE => s.inputs.v_re,
        vr::V_IM => s.inputs.v_im,
        vr::F_GRID => s.inputs.f_grid,
        vr::P_REF => s.setpoints.p_ref,
        vr::Q_REF => s.setpoints.q_ref,
        vr::S_BASE_MVA => model.bases.s_base_mva,
        vr::V_BASE_KV => model.bases.v_base_kv,
        _ => return None,
    })
}

/// `UnitDefinitions` and `LogCategories`, alike in FMI 2.0 and 3.0.
fn write_units_and_categories(put: &mut impl FnMut(Event)) {
    put(Event::Start(BytesStart::new("UnitDefinitions")));
    put(Event::Empty(
        BytesStart::new("Unit").with_attributes([("name", "pu")]),
    ));
    // SI base-unit exponents: VA = kg·m²·s⁻³, V = kg·m²·s⁻³·A⁻¹
    for (name, ampere, factor) in [("MVA", None, "1000000"), ("kV", Some("-1"), "1000")] {
        put(Event::Start(
            BytesStart::new("Unit").with_attributes([("name", name)]),
        ));
        let mut base = BytesStart::new("BaseUnit");
        base.push_attribute(("kg", "1"));
        base.push_attribute(("m", "2"));
        base.push_attribute(("s", "-3"));
        if let Some(a) = ampere {
            base.push_attribute(("A", a));
        }
        base.push_attribute(("factor", factor));
        put(Event::Empty(base));
        put(Event::End(BytesEnd::new("Unit")));
    }
    put(Event::End(BytesEnd::new("UnitDefinitions")));

    put(Event::Start(BytesStart::new("LogCategories")));
    for (name, description) in LOG_CATEGORIES {
        put(Event::Empty(BytesStart::new("Category").with_attributes([
            ("name", name),
            ("description", description),
        ])));
    }
    put(Event::End(BytesEnd::new("LogCategories")));
}

/// `modelDescription.xml` of `model` (FMI 2.0 Co-Simulation).
pub fn model_description(model: &ModelFile, guid: &str, model_identifier: &str) -> String {
    let mut w = Writer::new_with_indent(Vec::new(), b' ', 2);
    // writing into a Vec cannot fail
    let mut put = |e: Event| w.write_event(e).expect("writing XML into memory");
    put(Event::Decl(BytesDecl::new("1.0", Some("UTF-8"), None)));
    let generation_tool = format!("understudy {}", env!("CARGO_PKG_VERSION"));
    put(Event::Start(
        BytesStart::new("fmiModelDescription").with_attributes([
            ("fmiVersion", "2.0"),
            ("modelName", model.name.as_str()),
            ("guid", guid),
            ("description", model.description.as_str()),
            ("generationTool", generation_tool.as_str()),
            ("variableNamingConvention", "flat"),
            ("numberOfEventIndicators", "0"),
        ]),
    ));
    let mut cs = BytesStart::new("CoSimulation");
    cs.push_attribute(("modelIdentifier", model_identifier));
    for (name, value) in CAPABILITIES {
        cs.push_attribute((name, value));
    }
    put(Event::Empty(cs));
    write_units_and_categories(&mut put);

    let step = model.communication_step_s.to_string();
    put(Event::Empty(
        BytesStart::new("DefaultExperiment")
            .with_attributes([("startTime", "0"), ("stepSize", step.as_str())]),
    ));

    put(Event::Start(BytesStart::new("ModelVariables")));
    for v in &VARIABLES {
        let vr = v.vr.to_string();
        let mut sv = BytesStart::new("ScalarVariable");
        sv.push_attribute(("name", v.name));
        sv.push_attribute(("valueReference", vr.as_str()));
        sv.push_attribute(("description", v.description));
        sv.push_attribute(("causality", causality(v)));
        sv.push_attribute(("variability", variability(v)));
        if let Some(i) = initial(v) {
            sv.push_attribute(("initial", i));
        }
        put(Event::Start(sv));
        let mut ty = BytesStart::new(match v.ty {
            VarType::Real => "Real",
            VarType::Boolean => "Boolean",
        });
        let start = start_value(model, v).map(|s| s.to_string());
        if let Some(s) = &start {
            ty.push_attribute(("start", s.as_str()));
        }
        if let Some(u) = v.unit {
            ty.push_attribute(("unit", u));
        }
        put(Event::Empty(ty));
        put(Event::End(BytesEnd::new("ScalarVariable")));
    }
    put(Event::End(BytesEnd::new("ModelVariables")));

    // outputs by 1-based position in ModelVariables; every output is computed at
    // initialisation, so each is also an initial unknown (dependencies omitted = may depend on
    // every input and parameter, which is true of the steady-state initialisation)
    let outputs: Vec<String> = VARIABLES
        .iter()
        .enumerate()
        .filter(|(_, v)| v.causality == Causality::Output)
        .map(|(k, _)| (k + 1).to_string())
        .collect();
    put(Event::Start(BytesStart::new("ModelStructure")));
    for section in ["Outputs", "InitialUnknowns"] {
        put(Event::Start(BytesStart::new(section)));
        for index in &outputs {
            put(Event::Empty(
                BytesStart::new("Unknown").with_attributes([("index", index.as_str())]),
            ));
        }
        put(Event::End(BytesEnd::new(section)));
    }
    put(Event::End(BytesEnd::new("ModelStructure")));
    put(Event::End(BytesEnd::new("fmiModelDescription")));
    String::from_utf8(w.into_inner()).expect("the XML writer writes UTF-8")
}

fn escape_html(s: &str) -> String {
    s.replace('&', "&amp;")
        .replace('<', "&lt;")
        .replace('>', "&gt;")
        .replace('"', "&quot;")
}

/// `modelDescription.xml` of `model` (FMI 3.0 Co-Simulation): typed variable elements,
/// `ModelStructure` by value reference (FMI 3.0 standard, §2.4.7 and §2.4.8).
pub fn model_description_v3(model: &ModelFile, token: &str, model_identifier: &str) -> String {
    let mut w = Writer::new_with_indent(Vec::new(), b' ', 2);
    // writing into a Vec cannot fail
    let mut put = |e: Event| w.write_event(e).expect("writing XML into memory");
    put(Event::Decl(BytesDecl::new("1.0", Some("UTF-8"), None)));
    let generation_tool = format!("understudy {}", env!("CARGO_PKG_VERSION"));
    put(Event::Start(
        BytesStart::new("fmiModelDescription").with_attributes([
            ("fmiVersion", "3.0"),
            ("modelName", model.name.as_str()),
            ("instantiationToken", token),
            ("description", model.description.as_str()),
            ("generationTool", generation_tool.as_str()),
            ("variableNamingConvention", "flat"),
        ]),
    ));
    let mut cs = BytesStart::new("CoSimulation");
    cs.push_attribute(("modelIdentifier", model_identifier));
    for (name, value) in CAPABILITIES_3 {
        cs.push_attribute((name, value));
    }
    put(Event::Empty(cs));
    write_units_and_categories(&mut put);
    let step = model.communication_step_s.to_string();
    put(Event::Empty(
        BytesStart::new("DefaultExperiment")
            .with_attributes([("startTime", "0"), ("stepSize", step.as_str())]),
    ));

    put(Event::Start(BytesStart::new("ModelVariables")));
    // FMI 3.0 requires exactly one independent variable
    let time_vr = understudy_runtime::fmi3::TIME_VR.to_string();
    put(Event::Empty(BytesStart::new("Float64").with_attributes([
        ("name", "time"),
        ("valueReference", time_vr.as_str()),
        ("description", "Simulation time (s)"),
        ("causality", "independent"),
        ("variability", "continuous"),
    ])));
    for v in &VARIABLES {
        let vr = v.vr.to_string();
        let mut e = BytesStart::new(match v.ty {
            VarType::Real => "Float64",
            VarType::Boolean => "Boolean",
        });
        e.push_attribute(("name", v.name));
        e.push_attribute(("valueReference", vr.as_str()));
        e.push_attribute(("description", v.description));
        e.push_attribute(("causality", causality(v)));
        e.push_attribute(("variability", variability(v)));
        if let Some(i) = initial(v) {
            e.push_attribute(("initial", i));
        }
        let start = start_value(model, v).map(|s| s.to_string());
        if let Some(s) = &start {
            e.push_attribute(("start", s.as_str()));
        }
        if let Some(u) = v.unit {
            e.push_attribute(("unit", u));
        }
        put(Event::Empty(e));
    }
    put(Event::End(BytesEnd::new("ModelVariables")));

    // every output is computed at initialisation, so each is also an initial unknown
    // (dependencies omitted = may depend on every input and parameter)
    put(Event::Start(BytesStart::new("ModelStructure")));
    for section in ["Output", "InitialUnknown"] {
        for v in VARIABLES
            .iter()
            .filter(|v| v.causality == Causality::Output)
        {
            let vr = v.vr.to_string();
            put(Event::Empty(
                BytesStart::new(section).with_attributes([("valueReference", vr.as_str())]),
            ));
        }
    }
    put(Event::End(BytesEnd::new("ModelStructure")));
    put(Event::End(BytesEnd::new("fmiModelDescription")));
    String::from_utf8(w.into_inner()).expect("the XML writer writes UTF-8")
}

/// `documentation/index.html`: what the FMU is, its interface, and how far to trust it.
pub fn documentation(model: &ModelFile, guid: &str, version: FmiVersion) -> String {
    let standard = match version {
        FmiVersion::V2 => "FMI 2.0 Co-Simulation, GUID",
        FmiVersion::V3 => "FMI 3.0 Co-Simulation, instantiation token",
    };
    let kind = match &model.model {
        understudy_runtime::cosim::ModelKind::FullConverter { .. } => {
            "the detailed RMS model of a full-converter generator (grid-side converter with PLL, \
             current control, DC link, reactive power control and fault ride-through)"
        }
        understudy_runtime::cosim::ModelKind::Hybrid { .. } => {
            "a hybrid surrogate: reduced grey-box physics plus a linear correction fitted to the              residuals of a detailed model (DMD with control), validated on held-out faults"
        }
    };
    let rows: String = VARIABLES
        .iter()
        .map(|v| {
            format!(
                "<tr><td><code>{}</code></td><td>{}</td><td>{}</td><td>{}</td></tr>\n",
                v.name,
                causality(v),
                v.unit.unwrap_or("-"),
                escape_html(v.description)
            )
        })
        .collect();
    let e = &model.envelope;
    format!(
        r#"<!DOCTYPE html>
<html lang="en"><head><meta charset="utf-8"><title>{name}</title></head>
<body>
<h1>{name}</h1>
<p>{description}. This FMU ({standard} <code>{guid}</code>) contains {kind},
made with understudy {version}.</p>
<p>Per unit on S<sub>base</sub> = {s} MVA and V<sub>base</sub> = {v} kV (line to line); phasors in
the host's network frame, which rotates at nominal frequency; generator convention (positive P and
I flow into the grid, positive Q is capacitive). The terminal voltage is held constant over each
communication step; the model integrates its own dynamics inside the step. Natural communication
step: {step} s.</p>
<p>Envelope: |v| in [{umin}, {umax}] pu, f in [{fmin}, {fmax}] pu. When the inputs leave it,
<code>out_of_envelope</code> rises and stays up for the rest of the run.</p>
<table border="1" cellpadding="3">
<tr><th>variable</th><th>causality</th><th>unit</th><th>meaning</th></tr>
{rows}</table>
<h2>Caution</h2>
<p>Results obtained with this model support, and do not replace, studies carried out under the
local grid codes and licensed engineering practice. Check that the model's envelope covers the
conditions you study, and validate it against the plant's own models or measurements before
relying on it.</p>
</body></html>
"#,
        name = escape_html(&model.name),
        description = escape_html(&model.description),
        version = env!("CARGO_PKG_VERSION"),
        s = model.bases.s_base_mva,
        v = model.bases.v_base_kv,
        step = model.communication_step_s,
        umin = e.u_min,
        umax = e.u_max,
        fmin = e.f_min,
        fmax = e.f_max,
    )
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn model_identifiers_are_c_identifiers() {
        assert_eq!(model_identifier("demo plant-1"), "demo_plant_1");
        assert_eq!(model_identifier("3MW"), "understudy_3MW");
        assert_eq!(model_identifier(""), "understudy_");
    }
}

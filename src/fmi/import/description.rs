//! Reading `modelDescription.xml` of FMI 2.0 and 3.0 Co-Simulation FMUs, tolerantly.
//!
//! Fatal flaws (not XML, no `fmiModelDescription` root, an FMI version we do not read, no
//! Co-Simulation interface, no model identifier) are errors. Minor flaws that a careful host
//! can work around (a variable without a value reference, an unknown causality, an unreadable
//! boolean or number attribute, duplicate names, a missing GUID) become warnings, and the
//! variable or attribute concerned is skipped or given its FMI default. Elements we do not use
//! (units, type definitions, model structure, annotations) are ignored.

use quick_xml::events::{BytesStart, Event};
use quick_xml::Reader;
use serde::Serialize;

/// The FMI major version of an FMU.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
pub enum FmiMajor {
    #[serde(rename = "2.0")]
    V2,
    #[serde(rename = "3.0")]
    V3,
}

/// The base type of a variable (FMI 3.0 float and integer kinds are kept apart).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "lowercase")]
pub enum BaseType {
    /// FMI 2.0 `Real`, FMI 3.0 `Float64`.
    Real,
    /// FMI 3.0 `Float32`.
    Float32,
    Integer,
    Boolean,
    String,
    Enumeration,
    /// Any other FMI 3.0 type (Int8 … UInt64, Binary, Clock).
    Other,
}

#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "camelCase")]
pub enum Causality {
    Parameter,
    CalculatedParameter,
    Input,
    Output,
    Local,
    Independent,
    StructuralParameter,
}

impl Causality {
    fn parse(s: &str) -> Option<Self> {
        Some(match s {
            "parameter" => Causality::Parameter,
            "calculatedParameter" => Causality::CalculatedParameter,
            "input" => Causality::Input,
            "output" => Causality::Output,
            "local" => Causality::Local,
            "independent" => Causality::Independent,
            "structuralParameter" => Causality::StructuralParameter,
            _ => return None,
        })
    }
}

/// One scalar variable as the FMU declares it.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct VariableInfo {
    pub name: String,
    pub value_reference: u32,
    pub base_type: BaseType,
    pub causality: Causality,
    pub variability: Option<String>,
    pub unit: Option<String>,
    /// The start value as written (numbers and booleans are parsed when used).
    pub start: Option<String>,
    pub description: Option<String>,
}

impl VariableInfo {
    /// The start value as a number, when it is one (`true`/`false` read as 1/0).
    pub fn start_f64(&self) -> Option<f64> {
        let s = self.start.as_deref()?.trim();
        match s {
            "true" => Some(1.0),
            "false" => Some(0.0),
            _ => s.parse().ok(),
        }
    }
}

/// What the Co-Simulation interface offers.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct CoSimulationInfo {
    pub model_identifier: String,
    pub can_handle_variable_communication_step_size: bool,
    pub can_get_and_set_fmu_state: bool,
    pub can_serialize_fmu_state: bool,
    pub needs_execution_tool: bool,
}

#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct DefaultExperiment {
    pub start_time: Option<f64>,
    pub stop_time: Option<f64>,
    pub step_size: Option<f64>,
    pub tolerance: Option<f64>,
}

/// The parts of `modelDescription.xml` a Co-Simulation host needs.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct ModelDescription {
    pub fmi_version: FmiMajor,
    pub model_name: String,
    /// FMI 2.0 `guid` or FMI 3.0 `instantiationToken` (empty when missing, with a warning).
    pub guid: String,
    pub generation_tool: Option<String>,
    pub co_simulation: CoSimulationInfo,
    /// Whether a Model-Exchange interface is declared too.
    pub model_exchange: bool,
    pub default_experiment: Option<DefaultExperiment>,
    pub variables: Vec<VariableInfo>,
}

impl ModelDescription {
    pub fn variable(&self, name: &str) -> Option<&VariableInfo> {
        self.variables.iter().find(|v| v.name == name)
    }
}

/// A fatal flaw of the description (the caller adds the file name).
#[derive(Debug, Clone, PartialEq)]
pub struct DescriptionFlaw(pub String);

fn attrs(e: &BytesStart<'_>, warnings: &mut Vec<String>) -> Vec<(String, String)> {
    let mut out = Vec::new();
    for a in e.attributes().with_checks(false) {
        match a {
            Ok(a) => {
                let key = a.key.as_ref().to_string();
                match a.normalized_value(quick_xml::XmlVersion::Implicit1_0) {
                    Ok(v) => out.push((key, v.into_owned())),
                    Err(err) => warnings.push(format!(
                        "<{}> attribute `{key}` cannot be read ({err}); ignored",
                        e.name().as_ref()
                    )),
                }
            }
            Err(err) => warnings.push(format!(
                "<{}> has a malformed attribute ({err}); ignored",
                e.name().as_ref()
            )),
        }
    }
    out
}

fn get<'a>(a: &'a [(String, String)], key: &str) -> Option<&'a str> {
    a.iter().find(|(k, _)| k == key).map(|(_, v)| v.as_str())
}

fn flag(a: &[(String, String)], key: &str, element: &str, warnings: &mut Vec<String>) -> bool {
    match get(a, key).map(str::trim) {
        None => false,
        Some("true") | Some("1") => true,
        Some("false") | Some("0") => false,
        Some(other) => {
            warnings.push(format!(
                "<{element}> {key}=\"{other}\" is not a boolean; read as false"
            ));
            false
        }
    }
}

fn number(
    a: &[(String, String)],
    key: &str,
    element: &str,
    warnings: &mut Vec<String>,
) -> Option<f64> {
    let s = get(a, key)?;
    match s.trim().parse::<f64>() {
        Ok(v) => Some(v),
        Err(_) => {
            warnings.push(format!(
                "<{element}> {key}=\"{s}\" is not a number; ignored"
            ));
            None
        }
    }
}

fn base_type(name: &str, v3: bool) -> Option<BaseType> {
    Some(match (name, v3) {
        ("Real", false) | ("Float64", true) => BaseType::Real,
        ("Float32", true) => BaseType::Float32,
        ("Integer", false) | ("Int32", true) => BaseType::Integer,
        ("Boolean", _) => BaseType::Boolean,
        ("String", _) => BaseType::String,
        ("Enumeration", _) => BaseType::Enumeration,
        (
            "Int8" | "UInt8" | "Int16" | "UInt16" | "UInt32" | "Int64" | "UInt64" | "Binary"
            | "Clock",
            true,
        ) => BaseType::Other,
        _ => return None,
    })
}

/// A variable being read: its own attributes, completed by its type element (FMI 2.0).
struct Pending {
    attrs: Vec<(String, String)>,
    base_type: Option<BaseType>,
    unit: Option<String>,
    start: Option<String>,
}

/// Parse the text of a `modelDescription.xml`; returns the description and the warnings.
pub fn parse(xml: &str) -> Result<(ModelDescription, Vec<String>), DescriptionFlaw> {
    let mut warnings = Vec::new();
    let mut reader = Reader::from_str(xml);
    reader.config_mut().trim_text(true);
    let mut root: Option<Vec<(String, String)>> = None;
    let mut version = None;
    let mut cs: Option<Vec<(String, String)>> = None;
    let mut model_exchange = false;
    let mut default_experiment = None;
    let mut variables: Vec<VariableInfo> = Vec::new();
    let mut pending: Option<Pending> = None;
    let mut in_variables = false;
    // element names open below the root, to know where we are
    let mut stack: Vec<String> = Vec::new();
    loop {
        let ev = reader.read_event().map_err(|e| {
            DescriptionFlaw(format!(
                "not well-formed XML at byte {}: {e}",
                reader.buffer_position()
            ))
        })?;
        let (e, empty) = match &ev {
            Event::Start(e) => (e.clone(), false),
            Event::Empty(e) => (e.clone(), true),
            Event::End(_) => {
                let name = stack.pop().unwrap_or_default();
                if name == "ModelVariables" {
                    in_variables = false;
                }
                if (name == "ScalarVariable"
                    || (version == Some(FmiMajor::V3)
                        && in_variables
                        && stack.last().is_some_and(|p| p == "ModelVariables")))
                    && pending.is_some()
                {
                    finish(
                        pending.take().expect("checked"),
                        &mut variables,
                        &mut warnings,
                    );
                }
                continue;
            }
            Event::Eof => break,
            _ => continue,
        };
        let name = e.local_name().as_ref().to_string();
        let a = attrs(&e, &mut warnings);
        if root.is_none() {
            if name != "fmiModelDescription" {
                return Err(DescriptionFlaw(format!(
                    "the root element is <{name}>, expected <fmiModelDescription>"
                )));
            }
            let v = get(&a, "fmiVersion").ok_or_else(|| {
                DescriptionFlaw("<fmiModelDescription> has no fmiVersion attribute".into())
            })?;
            version = Some(if v.trim() == "2.0" {
                FmiMajor::V2
            } else if v.trim().starts_with("3.") {
                FmiMajor::V3
            } else {
                return Err(DescriptionFlaw(format!(
                    "fmiVersion=\"{v}\" is not supported: expected 2.0 or 3.x"
                )));
            });
            root = Some(a);
            if !empty {
                stack.push(name);
            }
            continue;
        }
        let v3 = version == Some(FmiMajor::V3);
        let parent = stack.last().map(String::as_str);
        match (name.as_str(), parent) {
            ("CoSimulation", Some("fmiModelDescription")) => cs = Some(a),
            ("ModelExchange", Some("fmiModelDescription")) => model_exchange = true,
            ("DefaultExperiment", Some("fmiModelDescription")) => {
                default_experiment = Some(DefaultExperiment {
                    start_time: number(&a, "startTime", "DefaultExperiment", &mut warnings),
                    stop_time: number(&a, "stopTime", "DefaultExperiment", &mut warnings),
                    step_size: number(&a, "stepSize", "DefaultExperiment", &mut warnings),
                    tolerance: number(&a, "tolerance", "DefaultExperiment", &mut warnings),
                })
            }
            ("ModelVariables", Some("fmiModelDescription")) => in_variables = !empty,
            ("ScalarVariable", Some("ModelVariables")) if !v3 => {
                pending = Some(Pending {
                    attrs: a,
                    base_type: None,
                    unit: None,
                    start: None,
                });
                if empty {
                    finish(pending.take().expect("set"), &mut variables, &mut warnings);
                }
            }
            (t, Some("ScalarVariable")) if !v3 => {
                if let Some(p) = pending.as_mut() {
                    match base_type(t, false) {
                        Some(b) => {
                            p.base_type = Some(b);
                            p.unit = get(&a, "unit").map(str::to_string);
                            p.start = get(&a, "start").map(str::to_string);
                        }
                        None if t == "Annotations" => {}
                        None => warnings.push(format!(
                            "variable `{}`: unknown type element <{t}>; ignored",
                            get(&p.attrs, "name").unwrap_or("?")
                        )),
                    }
                }
            }
            (t, Some("ModelVariables")) if v3 => match base_type(t, true) {
                Some(b) => {
                    let p = Pending {
                        unit: get(&a, "unit").map(str::to_string),
                        start: get(&a, "start").map(str::to_string),
                        attrs: a,
                        base_type: Some(b),
                    };
                    if empty {
                        finish(p, &mut variables, &mut warnings);
                    } else {
                        pending = Some(p);
                    }
                }
                None => warnings.push(format!(
                    "<ModelVariables> holds unknown element <{t}>; ignored"
                )),
            },
            _ => {}
        }
        if !empty {
            stack.push(name);
        }
    }
    let root = root.ok_or_else(|| DescriptionFlaw("the file holds no XML element".into()))?;
    let fmi_version = version.expect("set with root");
    let guid_key = if fmi_version == FmiMajor::V3 {
        "instantiationToken"
    } else {
        "guid"
    };
    let guid = match get(&root, guid_key) {
        Some(g) => g.to_string(),
        None => {
            warnings.push(format!(
                "<fmiModelDescription> has no {guid_key}; an empty one is passed to instantiate"
            ));
            String::new()
        }
    };
    let Some(cs) = cs else {
        return Err(DescriptionFlaw(if model_exchange {
            "the FMU offers Model Exchange only: understudy needs a Co-Simulation FMU (<CoSimulation> element missing)".into()
        } else {
            "no <CoSimulation> element: understudy needs a Co-Simulation FMU".into()
        }));
    };
    let model_identifier = match get(&cs, "modelIdentifier") {
        Some(m) if !m.trim().is_empty() => m.trim().to_string(),
        _ => {
            return Err(DescriptionFlaw(
                "<CoSimulation> has no modelIdentifier: the binary cannot be named".into(),
            ))
        }
    };
    let state_key = if fmi_version == FmiMajor::V3 {
        "canGetAndSetFMUState"
    } else {
        "canGetAndSetFMUstate"
    };
    let serialize_key = if fmi_version == FmiMajor::V3 {
        "canSerializeFMUState"
    } else {
        "canSerializeFMUstate"
    };
    let co_simulation = CoSimulationInfo {
        model_identifier,
        can_handle_variable_communication_step_size: flag(
            &cs,
            "canHandleVariableCommunicationStepSize",
            "CoSimulation",
            &mut warnings,
        ),
        can_get_and_set_fmu_state: flag(&cs, state_key, "CoSimulation", &mut warnings),
        can_serialize_fmu_state: flag(&cs, serialize_key, "CoSimulation", &mut warnings),
        needs_execution_tool: flag(&cs, "needsExecutionTool", "CoSimulation", &mut warnings),
    };
    let mut seen = std::collections::HashSet::new();
    for v in &variables {
        if !seen.insert(v.name.as_str()) {
            warnings.push(format!(
                "variable name `{}` is declared more than once; the first is used",
                v.name
            ));
        }
    }
    Ok((
        ModelDescription {
            fmi_version,
            model_name: get(&root, "modelName").unwrap_or_default().to_string(),
            guid,
            generation_tool: get(&root, "generationTool").map(str::to_string),
            co_simulation,
            model_exchange,
            default_experiment,
            variables,
        },
        warnings,
    ))
}

fn finish(p: Pending, variables: &mut Vec<VariableInfo>, warnings: &mut Vec<String>) {
    let index = variables.len() + 1;
    let Some(name) = get(&p.attrs, "name").map(str::to_string) else {
        warnings.push(format!("variable #{index} has no name; skipped"));
        return;
    };
    let vr = match get(&p.attrs, "valueReference").map(|s| s.trim().parse::<u32>()) {
        Some(Ok(vr)) => vr,
        Some(Err(_)) | None => {
            warnings.push(format!(
                "variable `{name}` has no valid valueReference; skipped"
            ));
            return;
        }
    };
    let Some(base_type) = p.base_type else {
        warnings.push(format!("variable `{name}` has no type element; skipped"));
        return;
    };
    let causality = match get(&p.attrs, "causality") {
        None => Causality::Local,
        Some(c) => Causality::parse(c.trim()).unwrap_or_else(|| {
            warnings.push(format!(
                "variable `{name}`: causality=\"{c}\" is not an FMI causality; read as local"
            ));
            Causality::Local
        }),
    };
    variables.push(VariableInfo {
        name,
        value_reference: vr,
        base_type,
        causality,
        variability: get(&p.attrs, "variability").map(str::to_string),
        unit: p.unit,
        start: p.start,
        description: get(&p.attrs, "description").map(str::to_string),
    });
}

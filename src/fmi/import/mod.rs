//! Loading FMI 2.0 and 3.0 Co-Simulation FMUs: ours and third parties'.
//!
//! We bind the C API with `libloading` directly rather than through an FMI binding crate: the
//! few dozen entry points a Co-Simulation host needs are plain C function pointers, so a thin
//! layer of our own needs no bindgen/libclang at build time, serves FMI 2.0 and 3.0 under one
//! API ([`Instance`]), and lets us control exactly how the shared library is opened (e.g.
//! preloading a library with `RTLD_GLOBAL`, as FMUs made with the pythonfmu package need).
//!
//! An [`Fmu`] is the unpacked archive (a temporary folder removed on drop), its parsed
//! description, the warnings about minor flaws, and the opened binary. [`Fmu::instantiate`] gives
//! an [`Instance`]: it is `Send` (it may move to a worker thread) but not `Sync` (FMI instances
//! are not re-entrant: each is used from one thread at a time); several instances of one FMU may
//! run in parallel threads.
//!
//! Safety boundary: calling into an FMU's binary is trusting it. A crashing FMU takes its
//! process down, which is why `understudy check` runs FMUs in a child process.

pub mod description;
mod fmi2;
mod fmi3;

pub use description::{
    BaseType, Causality, CoSimulationInfo, FmiMajor, ModelDescription, VariableInfo,
};

use std::io::Read;
use std::path::{Path, PathBuf};
use std::sync::{Arc, Mutex};
use thiserror::Error;

/// Failures of loading or running an FMU. Each names the file (or instance) and what is wrong.
#[derive(Debug, Error)]
pub enum ImportError {
    #[error("{path}: {source}")]
    Io {
        path: PathBuf,
        source: std::io::Error,
    },
    #[error("{path}: not an FMU: {message}")]
    NotAnFmu { path: PathBuf, message: String },
    #[error("{path}: modelDescription.xml: {message}")]
    Description { path: PathBuf, message: String },
    #[error("{path}: no binary for this platform ({platform}): expected {expected}; the FMU has binaries for: {available}")]
    Platform {
        path: PathBuf,
        platform: String,
        expected: String,
        available: String,
    },
    #[error("{path}: cannot load the binary {library}: {message}")]
    Library {
        path: PathBuf,
        library: PathBuf,
        message: String,
    },
    #[error("{path}: the binary lacks the function {symbol} ({message})")]
    MissingFunction {
        path: PathBuf,
        symbol: String,
        message: String,
    },
    #[error("cannot preload {library}: {message}")]
    Preload { library: PathBuf, message: String },
    #[error("{model}: no variable named `{name}`")]
    UnknownVariable { model: String, name: String },
    #[error("{model}: variable `{name}` is {found:?}, expected {expected}")]
    VariableType {
        model: String,
        name: String,
        found: BaseType,
        expected: &'static str,
    },
    #[error("{model}: {call} failed: the instantiate function returned NULL{log}")]
    Instantiate {
        model: String,
        call: &'static str,
        log: String,
    },
    #[error("{model}: {call} returned {status}{log}")]
    Status {
        model: String,
        call: &'static str,
        status: Status,
        log: String,
    },
    #[error("{model}: {call} is not offered (capability {capability} is false)")]
    Unsupported {
        model: String,
        call: &'static str,
        capability: &'static str,
    },
    #[error(
        "{model}: doStep from t = {t_s} s over {h_s} s asked to terminate the simulation{log}"
    )]
    Terminated {
        model: String,
        t_s: f64,
        h_s: f64,
        log: String,
    },
}

/// An FMI status (FMI 2.0 and 3.0 share the first five codes; 2.0's Pending is 5).
#[derive(Debug, Clone, Copy, PartialEq, Eq, serde::Serialize)]
pub enum Status {
    Ok,
    Warning,
    Discard,
    Error,
    Fatal,
    Pending,
    Unknown(i32),
}

impl Status {
    pub fn from_code(code: i32) -> Self {
        match code {
            0 => Status::Ok,
            1 => Status::Warning,
            2 => Status::Discard,
            3 => Status::Error,
            4 => Status::Fatal,
            5 => Status::Pending,
            c => Status::Unknown(c),
        }
    }

    /// OK or Warning: the call did what was asked.
    pub fn is_success(&self) -> bool {
        matches!(self, Status::Ok | Status::Warning)
    }
}

impl std::fmt::Display for Status {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        match self {
            Status::Unknown(c) => write!(f, "an unknown status ({c})"),
            s => write!(f, "{s:?}"),
        }
    }
}

/// The platform folder names of this machine in FMI 2.0 and 3.0.
pub fn platform_folders() -> (&'static str, &'static str) {
    match (std::env::consts::OS, std::env::consts::ARCH) {
        ("linux", "x86_64") => ("linux64", "x86_64-linux"),
        ("linux", "aarch64") => ("linux64", "aarch64-linux"),
        ("linux", "x86") => ("linux32", "x86-linux"),
        ("macos", "x86_64") => ("darwin64", "x86_64-darwin"),
        ("macos", "aarch64") => ("darwin64", "aarch64-darwin"),
        ("windows", "x86_64") => ("win64", "x86_64-windows"),
        _ => ("unknown", "unknown"),
    }
}

fn library_suffix() -> &'static str {
    std::env::consts::DLL_SUFFIX
}

/// How to load an FMU.
#[derive(Debug, Clone, Default)]
pub struct LoadOptions {
    /// Shared libraries opened with `RTLD_GLOBAL` before the FMU's binary, so that their symbols
    /// resolve the binary's undefined ones (pythonfmu's binary needs `libpython3.x.so`). The
    /// environment variable `UNDERSTUDY_FMU_PRELOAD` (paths separated by `:`) adds more.
    pub preload: Vec<PathBuf>,
}

impl LoadOptions {
    pub fn with_preload(mut self, library: impl Into<PathBuf>) -> Self {
        self.preload.push(library.into());
        self
    }
}

/// One log line an FMU sent through the logger callback.
#[derive(Debug, Clone, PartialEq, serde::Serialize)]
pub struct LogLine {
    pub status: Status,
    pub category: String,
    /// The message as sent. FMI 2.0 loggers are variadic; ours is not, so printf-style
    /// arguments are not expanded: the format string is recorded as is.
    pub message: String,
}

pub(crate) type LogSink = Mutex<Vec<LogLine>>;

pub(crate) enum Api {
    V2(fmi2::Api),
    V3(fmi3::Api),
}

/// A loaded FMU: the unpacked folder (deleted on drop), its description and the opened binary.
pub struct Fmu {
    path: PathBuf,
    description: ModelDescription,
    warnings: Vec<String>,
    // field order: the library is closed before the folder holding it is removed
    api: Arc<Api>,
    _preloaded: Vec<Arc<libloading::Library>>,
    root: tempfile::TempDir,
}

impl std::fmt::Debug for Fmu {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("Fmu")
            .field("path", &self.path)
            .field(
                "model_identifier",
                &self.description.co_simulation.model_identifier,
            )
            .field("root", &self.root.path())
            .finish()
    }
}

/// Open the archive and read its description without loading any binary (safe to call on
/// untrusted files in-process). Returns the description and the warnings about minor flaws.
pub fn read_description(path: &Path) -> Result<(ModelDescription, Vec<String>), ImportError> {
    let file = std::fs::File::open(path).map_err(|source| ImportError::Io {
        path: path.to_path_buf(),
        source,
    })?;
    let mut archive = zip::ZipArchive::new(file).map_err(|e| ImportError::NotAnFmu {
        path: path.to_path_buf(),
        message: format!("not a zip archive ({e})"),
    })?;
    let mut entry = archive
        .by_name("modelDescription.xml")
        .map_err(|_| ImportError::NotAnFmu {
            path: path.to_path_buf(),
            message: "the archive has no modelDescription.xml at its root".into(),
        })?;
    let mut xml = String::new();
    entry
        .read_to_string(&mut xml)
        .map_err(|e| ImportError::Description {
            path: path.to_path_buf(),
            message: format!("cannot be read as UTF-8 text ({e})"),
        })?;
    description::parse(&xml).map_err(|flaw| ImportError::Description {
        path: path.to_path_buf(),
        message: flaw.0,
    })
}

/// [`read_description`] and also check, without unpacking or loading anything, that the archive
/// holds a binary for this platform.
pub fn inspect(path: &Path) -> Result<(ModelDescription, Vec<String>), ImportError> {
    let (md, warnings) = read_description(path)?;
    let file = std::fs::File::open(path).map_err(|source| ImportError::Io {
        path: path.to_path_buf(),
        source,
    })?;
    let archive = zip::ZipArchive::new(file).map_err(|e| ImportError::NotAnFmu {
        path: path.to_path_buf(),
        message: format!("not a zip archive ({e})"),
    })?;
    let (v2, v3) = platform_folders();
    let platform = if md.fmi_version == FmiMajor::V3 {
        v3
    } else {
        v2
    };
    let expected = format!(
        "binaries/{platform}/{}{}",
        md.co_simulation.model_identifier,
        library_suffix()
    );
    let names: Vec<String> = archive
        .file_names()
        .filter_map(|n| n.ok().map(|n| n.into_owned()))
        .collect();
    if names.iter().any(|n| n == &expected) {
        return Ok((md, warnings));
    }
    let mut available: Vec<String> = names
        .iter()
        .filter_map(|n| n.strip_prefix("binaries/"))
        .filter_map(|n| n.split('/').next())
        .filter(|n| !n.is_empty())
        .map(str::to_string)
        .collect();
    available.sort();
    available.dedup();
    Err(ImportError::Platform {
        path: path.to_path_buf(),
        platform: platform.into(),
        expected,
        available: if available.is_empty() {
            "none (no binaries/ folder)".into()
        } else {
            available.join(", ")
        },
    })
}

/// The binary this platform needs, relative to the unpacked root, and the platform folders the
/// archive offers.
fn binary_of(path: &Path, root: &Path, md: &ModelDescription) -> Result<PathBuf, ImportError> {
    let (v2, v3) = platform_folders();
    let platform = if md.fmi_version == FmiMajor::V3 {
        v3
    } else {
        v2
    };
    let rel = PathBuf::from("binaries").join(platform).join(format!(
        "{}{}",
        md.co_simulation.model_identifier,
        library_suffix()
    ));
    let full = root.join(&rel);
    if full.is_file() {
        return Ok(full);
    }
    let mut available: Vec<String> = std::fs::read_dir(root.join("binaries"))
        .map(|d| {
            d.filter_map(|e| e.ok())
                .filter(|e| e.path().is_dir())
                .map(|e| e.file_name().to_string_lossy().into_owned())
                .collect()
        })
        .unwrap_or_default();
    available.sort();
    Err(ImportError::Platform {
        path: path.to_path_buf(),
        platform: platform.into(),
        expected: rel.display().to_string(),
        available: if available.is_empty() {
            "none (no binaries/ folder)".into()
        } else {
            available.join(", ")
        },
    })
}

impl Fmu {
    /// Load with default options (and any `UNDERSTUDY_FMU_PRELOAD` libraries).
    pub fn load(path: &Path) -> Result<Self, ImportError> {
        Self::load_with(path, &LoadOptions::default())
    }

    pub fn load_with(path: &Path, options: &LoadOptions) -> Result<Self, ImportError> {
        let (description, warnings) = read_description(path)?;
        let root = tempfile::Builder::new()
            .prefix("understudy-fmu-")
            .tempdir()
            .map_err(|source| ImportError::Io {
                path: std::env::temp_dir(),
                source,
            })?;
        let file = std::fs::File::open(path).map_err(|source| ImportError::Io {
            path: path.to_path_buf(),
            source,
        })?;
        let mut archive = zip::ZipArchive::new(file).map_err(|e| ImportError::NotAnFmu {
            path: path.to_path_buf(),
            message: format!("not a zip archive ({e})"),
        })?;
        archive
            .extract(root.path())
            .map_err(|e| ImportError::NotAnFmu {
                path: path.to_path_buf(),
                message: format!("cannot be unpacked ({e})"),
            })?;
        let binary = binary_of(path, root.path(), &description)?;
        let mut preload = options.preload.clone();
        if let Some(extra) = std::env::var_os("UNDERSTUDY_FMU_PRELOAD") {
            preload.extend(std::env::split_paths(&extra).filter(|p| !p.as_os_str().is_empty()));
        }
        let preloaded = preload
            .iter()
            .map(|p| open_global(p).map(Arc::new))
            .collect::<Result<Vec<_>, _>>()?;
        // SAFETY: loading a library runs its initialisers; trusting the FMU's binary is the
        // premise of importing it (see the module doc).
        let library = unsafe { open_local(&binary) }.map_err(|e| ImportError::Library {
            path: path.to_path_buf(),
            library: binary.clone(),
            message: e.to_string(),
        })?;
        let api = match description.fmi_version {
            FmiMajor::V2 => Api::V2(fmi2::Api::load(library, path)?),
            FmiMajor::V3 => Api::V3(fmi3::Api::load(library, path)?),
        };
        Ok(Self {
            path: path.to_path_buf(),
            description,
            warnings,
            api: Arc::new(api),
            _preloaded: preloaded,
            root,
        })
    }

    pub fn path(&self) -> &Path {
        &self.path
    }

    pub fn description(&self) -> &ModelDescription {
        &self.description
    }

    /// Minor flaws found in the description (the FMU loaded anyway).
    pub fn warnings(&self) -> &[String] {
        &self.warnings
    }

    /// The unpacked archive (removed when the `Fmu` is dropped).
    pub fn unpacked_root(&self) -> &Path {
        self.root.path()
    }

    /// The variable named `name`.
    pub fn variable(&self, name: &str) -> Result<&VariableInfo, ImportError> {
        self.description
            .variable(name)
            .ok_or_else(|| ImportError::UnknownVariable {
                model: self.description.co_simulation.model_identifier.clone(),
                name: name.into(),
            })
    }

    /// Create a Co-Simulation instance (logging on; messages are collected, see
    /// [`Instance::log`]).
    pub fn instantiate(&self, instance_name: &str) -> Result<Instance, ImportError> {
        let log: Arc<LogSink> = Arc::new(Mutex::new(Vec::new()));
        let resources = self.root.path().join("resources");
        let model = self.description.co_simulation.model_identifier.clone();
        let raw = match &*self.api {
            Api::V2(api) => RawInstance::V2(api.instantiate(
                instance_name,
                &self.description.guid,
                &resources,
                log.clone(),
                &model,
            )?),
            Api::V3(api) => RawInstance::V3(api.instantiate(
                instance_name,
                &self.description.guid,
                &resources,
                log.clone(),
                &model,
            )?),
        };
        Ok(Instance {
            api: self.api.clone(),
            raw,
            log,
            model,
            description: Arc::new(self.description.clone()),
            _not_sync: std::marker::PhantomData,
        })
    }
}

#[cfg(unix)]
fn open_global(p: &Path) -> Result<libloading::Library, ImportError> {
    use libloading::os::unix::{Library, RTLD_GLOBAL, RTLD_NOW};
    // SAFETY: the caller asked for this library; its initialisers run as with any dlopen.
    unsafe { Library::open(Some(p), RTLD_NOW | RTLD_GLOBAL) }
        .map(Into::into)
        .map_err(|e| ImportError::Preload {
            library: p.to_path_buf(),
            message: e.to_string(),
        })
}

#[cfg(not(unix))]
fn open_global(p: &Path) -> Result<libloading::Library, ImportError> {
    // SAFETY: as above; Windows has no RTLD_GLOBAL, a loaded DLL serves every module.
    unsafe { libloading::Library::new(p) }.map_err(|e| ImportError::Preload {
        library: p.to_path_buf(),
        message: e.to_string(),
    })
}

#[cfg(unix)]
unsafe fn open_local(p: &Path) -> Result<libloading::Library, libloading::Error> {
    use libloading::os::unix::{Library, RTLD_LOCAL, RTLD_NOW};
    // RTLD_NOW: an unresolved symbol is reported here, naming it, not as a crash later
    Library::open(Some(p), RTLD_NOW | RTLD_LOCAL).map(Into::into)
}

#[cfg(not(unix))]
unsafe fn open_local(p: &Path) -> Result<libloading::Library, libloading::Error> {
    libloading::Library::new(p)
}

pub(crate) enum RawInstance {
    V2(fmi2::Instance),
    V3(fmi3::Instance),
}

/// A saved FMU state; free it with [`Instance::free_state`] (or let the instance's drop do it:
/// FMUs free their states with the instance).
#[derive(Debug)]
pub struct FmuState(*mut std::ffi::c_void);

/// What a successful doStep reported.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct StepOutcome {
    pub status: Status,
    /// FMI 3.0: the FMU asks the host to handle an event (always false for FMI 2.0).
    pub event_handling_needed: bool,
    /// FMI 3.0: the step returned early at `last_successful_time_s`.
    pub early_return: bool,
    pub last_successful_time_s: f64,
}

/// One Co-Simulation instance. `Send`, not `Sync`: it lives on one thread at a time.
pub struct Instance {
    // `raw` is freed in Drop before `api` (the library) can be released
    raw: RawInstance,
    api: Arc<Api>,
    log: Arc<LogSink>,
    model: String,
    description: Arc<ModelDescription>,
    _not_sync: std::marker::PhantomData<std::cell::Cell<()>>,
}

// SAFETY: FMI allows an instance to be used from any thread as long as calls do not overlap;
// `Instance` methods take `&mut self` or `&self` without `Sync`, so calls on one instance are
// serialised by Rust's ownership. The library handle is shared through `Arc`.
unsafe impl Send for Instance {}

impl Instance {
    pub fn model_identifier(&self) -> &str {
        &self.model
    }

    /// The log lines collected so far.
    pub fn log(&self) -> Vec<LogLine> {
        self.log.lock().map(|l| l.clone()).unwrap_or_default()
    }

    fn log_suffix(&self) -> String {
        let lines = self.log();
        if lines.is_empty() {
            String::new()
        } else {
            let tail: Vec<String> = lines
                .iter()
                .rev()
                .take(5)
                .rev()
                .map(|l| format!("[{}] {}: {}", l.status, l.category, l.message))
                .collect();
            format!("; FMU log: {}", tail.join(" | "))
        }
    }

    fn status(&self, call: &'static str, code: i32) -> Result<Status, ImportError> {
        let status = Status::from_code(code);
        if status.is_success() {
            Ok(status)
        } else {
            Err(ImportError::Status {
                model: self.model.clone(),
                call,
                status,
                log: self.log_suffix(),
            })
        }
    }

    /// The value reference of the variable `name` of base type `ty`.
    pub fn value_reference(&self, name: &str, ty: BaseType) -> Result<u32, ImportError> {
        let v = self
            .description
            .variable(name)
            .ok_or_else(|| ImportError::UnknownVariable {
                model: self.model.clone(),
                name: name.into(),
            })?;
        if v.base_type != ty {
            return Err(ImportError::VariableType {
                model: self.model.clone(),
                name: name.into(),
                found: v.base_type,
                expected: match ty {
                    BaseType::Real => "Real (Float64)",
                    BaseType::Boolean => "Boolean",
                    _ => "another type",
                },
            });
        }
        Ok(v.value_reference)
    }

    /// FMI 2.0: setupExperiment then enterInitializationMode; FMI 3.0:
    /// enterInitializationMode with the same arguments.
    pub fn enter_initialization(
        &mut self,
        tolerance: Option<f64>,
        start_s: f64,
        stop_s: Option<f64>,
    ) -> Result<(), ImportError> {
        match (&*self.api, &self.raw) {
            (Api::V2(api), RawInstance::V2(i)) => {
                let c = api.setup_experiment(i, tolerance, start_s, stop_s);
                self.status("fmi2SetupExperiment", c)?;
                let c = api.enter_initialization(i);
                self.status("fmi2EnterInitializationMode", c)?;
            }
            (Api::V3(api), RawInstance::V3(i)) => {
                let c = api.enter_initialization(i, tolerance, start_s, stop_s);
                self.status("fmi3EnterInitializationMode", c)?;
            }
            _ => unreachable!("instance and API come from the same FMU"),
        }
        Ok(())
    }

    pub fn exit_initialization(&mut self) -> Result<(), ImportError> {
        let (call, c) = match (&*self.api, &self.raw) {
            (Api::V2(api), RawInstance::V2(i)) => {
                ("fmi2ExitInitializationMode", api.exit_initialization(i))
            }
            (Api::V3(api), RawInstance::V3(i)) => {
                ("fmi3ExitInitializationMode", api.exit_initialization(i))
            }
            _ => unreachable!("instance and API come from the same FMU"),
        };
        self.status(call, c).map(|_| ())
    }

    /// Advance from `t_s` over `h_s`. A Discard, Error or Fatal status is an `Err`.
    pub fn do_step(&mut self, t_s: f64, h_s: f64) -> Result<StepOutcome, ImportError> {
        match (&*self.api, &self.raw) {
            (Api::V2(api), RawInstance::V2(i)) => {
                let c = api.do_step(i, t_s, h_s);
                let status = self.status("fmi2DoStep", c)?;
                Ok(StepOutcome {
                    status,
                    event_handling_needed: false,
                    early_return: false,
                    last_successful_time_s: t_s + h_s,
                })
            }
            (Api::V3(api), RawInstance::V3(i)) => {
                let r = api.do_step(i, t_s, h_s);
                let status = self.status("fmi3DoStep", r.status)?;
                if r.terminate {
                    return Err(ImportError::Terminated {
                        model: self.model.clone(),
                        t_s,
                        h_s,
                        log: self.log_suffix(),
                    });
                }
                Ok(StepOutcome {
                    status,
                    event_handling_needed: r.event_handling_needed,
                    early_return: r.early_return,
                    last_successful_time_s: r.last_successful_time_s,
                })
            }
            _ => unreachable!("instance and API come from the same FMU"),
        }
    }

    /// The raw status of a doStep, without turning failures into errors (for conformance
    /// checks that expect a refusal).
    pub fn do_step_status(&mut self, t_s: f64, h_s: f64) -> Status {
        match (&*self.api, &self.raw) {
            (Api::V2(api), RawInstance::V2(i)) => Status::from_code(api.do_step(i, t_s, h_s)),
            (Api::V3(api), RawInstance::V3(i)) => {
                Status::from_code(api.do_step(i, t_s, h_s).status)
            }
            _ => unreachable!("instance and API come from the same FMU"),
        }
    }

    pub fn get_real(&mut self, vrs: &[u32]) -> Result<Vec<f64>, ImportError> {
        let mut out = vec![0.0; vrs.len()];
        let (call, c) = match (&*self.api, &self.raw) {
            (Api::V2(api), RawInstance::V2(i)) => ("fmi2GetReal", api.get_real(i, vrs, &mut out)),
            (Api::V3(api), RawInstance::V3(i)) => {
                ("fmi3GetFloat64", api.get_float64(i, vrs, &mut out))
            }
            _ => unreachable!("instance and API come from the same FMU"),
        };
        self.status(call, c)?;
        Ok(out)
    }

    pub fn set_real(&mut self, vrs: &[u32], values: &[f64]) -> Result<(), ImportError> {
        assert_eq!(vrs.len(), values.len(), "one value per value reference");
        let (call, c) = match (&*self.api, &self.raw) {
            (Api::V2(api), RawInstance::V2(i)) => ("fmi2SetReal", api.set_real(i, vrs, values)),
            (Api::V3(api), RawInstance::V3(i)) => {
                ("fmi3SetFloat64", api.set_float64(i, vrs, values))
            }
            _ => unreachable!("instance and API come from the same FMU"),
        };
        self.status(call, c).map(|_| ())
    }

    pub fn get_boolean(&mut self, vrs: &[u32]) -> Result<Vec<bool>, ImportError> {
        let (call, r) = match (&*self.api, &self.raw) {
            (Api::V2(api), RawInstance::V2(i)) => ("fmi2GetBoolean", api.get_boolean(i, vrs)),
            (Api::V3(api), RawInstance::V3(i)) => ("fmi3GetBoolean", api.get_boolean(i, vrs)),
            _ => unreachable!("instance and API come from the same FMU"),
        };
        self.status(call, r.0)?;
        Ok(r.1)
    }

    pub fn set_boolean(&mut self, vrs: &[u32], values: &[bool]) -> Result<(), ImportError> {
        assert_eq!(vrs.len(), values.len(), "one value per value reference");
        let (call, c) = match (&*self.api, &self.raw) {
            (Api::V2(api), RawInstance::V2(i)) => {
                ("fmi2SetBoolean", api.set_boolean(i, vrs, values))
            }
            (Api::V3(api), RawInstance::V3(i)) => {
                ("fmi3SetBoolean", api.set_boolean(i, vrs, values))
            }
            _ => unreachable!("instance and API come from the same FMU"),
        };
        self.status(call, c).map(|_| ())
    }

    /// Get Real variables by name.
    pub fn get_real_by_name(&mut self, names: &[&str]) -> Result<Vec<f64>, ImportError> {
        let vrs = names
            .iter()
            .map(|n| self.value_reference(n, BaseType::Real))
            .collect::<Result<Vec<_>, _>>()?;
        self.get_real(&vrs)
    }

    /// Set Real variables by name.
    pub fn set_real_by_name(&mut self, names: &[&str], values: &[f64]) -> Result<(), ImportError> {
        let vrs = names
            .iter()
            .map(|n| self.value_reference(n, BaseType::Real))
            .collect::<Result<Vec<_>, _>>()?;
        self.set_real(&vrs, values)
    }

    pub fn get_boolean_by_name(&mut self, names: &[&str]) -> Result<Vec<bool>, ImportError> {
        let vrs = names
            .iter()
            .map(|n| self.value_reference(n, BaseType::Boolean))
            .collect::<Result<Vec<_>, _>>()?;
        self.get_boolean(&vrs)
    }

    fn require_state(&self, call: &'static str) -> Result<(), ImportError> {
        if self.description.co_simulation.can_get_and_set_fmu_state {
            Ok(())
        } else {
            Err(ImportError::Unsupported {
                model: self.model.clone(),
                call,
                capability: "canGetAndSetFMUstate",
            })
        }
    }

    /// Save the FMU's state (needs canGetAndSetFMUstate).
    pub fn get_state(&mut self) -> Result<FmuState, ImportError> {
        self.require_state("getFMUstate")?;
        let mut s: *mut std::ffi::c_void = std::ptr::null_mut();
        let (call, c) = match (&*self.api, &self.raw) {
            (Api::V2(api), RawInstance::V2(i)) => ("fmi2GetFMUstate", api.get_state(i, &mut s)?),
            (Api::V3(api), RawInstance::V3(i)) => ("fmi3GetFMUState", api.get_state(i, &mut s)?),
            _ => unreachable!("instance and API come from the same FMU"),
        };
        self.status(call, c)?;
        Ok(FmuState(s))
    }

    /// Restore a state saved from this instance.
    pub fn set_state(&mut self, state: &FmuState) -> Result<(), ImportError> {
        self.require_state("setFMUstate")?;
        let (call, c) = match (&*self.api, &self.raw) {
            (Api::V2(api), RawInstance::V2(i)) => ("fmi2SetFMUstate", api.set_state(i, state.0)?),
            (Api::V3(api), RawInstance::V3(i)) => ("fmi3SetFMUState", api.set_state(i, state.0)?),
            _ => unreachable!("instance and API come from the same FMU"),
        };
        self.status(call, c).map(|_| ())
    }

    pub fn free_state(&mut self, state: FmuState) -> Result<(), ImportError> {
        let mut s = state.0;
        let (call, c) = match (&*self.api, &self.raw) {
            (Api::V2(api), RawInstance::V2(i)) => ("fmi2FreeFMUstate", api.free_state(i, &mut s)?),
            (Api::V3(api), RawInstance::V3(i)) => ("fmi3FreeFMUState", api.free_state(i, &mut s)?),
            _ => unreachable!("instance and API come from the same FMU"),
        };
        self.status(call, c).map(|_| ())
    }

    pub fn terminate(&mut self) -> Result<(), ImportError> {
        let (call, c) = match (&*self.api, &self.raw) {
            (Api::V2(api), RawInstance::V2(i)) => ("fmi2Terminate", api.terminate(i)),
            (Api::V3(api), RawInstance::V3(i)) => ("fmi3Terminate", api.terminate(i)),
            _ => unreachable!("instance and API come from the same FMU"),
        };
        self.status(call, c).map(|_| ())
    }
}

impl Drop for Instance {
    fn drop(&mut self) {
        match (&*self.api, &self.raw) {
            (Api::V2(api), RawInstance::V2(i)) => api.free_instance(i),
            (Api::V3(api), RawInstance::V3(i)) => api.free_instance(i),
            _ => {}
        }
    }
}

pub(crate) fn missing(path: &Path, symbol: &str, e: libloading::Error) -> ImportError {
    ImportError::MissingFunction {
        path: path.to_path_buf(),
        symbol: symbol.into(),
        message: e.to_string(),
    }
}

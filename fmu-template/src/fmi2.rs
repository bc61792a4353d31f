//! The FMI 2.0 Co-Simulation C boundary (FMI 2.0.4 standard, Modelica Association: §2.1 common
//! functions, §4.2 Co-Simulation functions, state machine of Fig. 10/§4.2.4).
//!
//! All 34 functions of the common and Co-Simulation interfaces are exported. Functions whose
//! capability the model description does not claim (directional derivatives, input
//! interpolation, output derivatives, asynchronous steps) return `fmi2Error` and log why.
//!
//! Rules kept by every entry point:
//! - a null component or a null array with a non-zero length returns `fmi2Error`;
//! - the call order follows the standard's state machine; a call out of order, a NaN input or a
//!   non-positive step returns `fmi2Error`, logs a line naming the call, and moves the instance
//!   to the error state (the standard: after `fmi2Error` the instance cannot continue);
//! - the body runs inside `catch_unwind`: nothing panics across the boundary;
//! - each instance has its own lock: several instances run on several threads; one instance
//!   may be called from any thread (one call at a time is the host's duty, the lock makes a
//!   violation safe rather than undefined).
//!
//! Logging: messages go through the host's `logger` callback with the message as the format
//! string (every `%` doubled, no variadic arguments). Error messages are always sent; debug
//! messages (category `logFmiCall`) only while `loggingOn` is true and the category is enabled by
//! `fmi2SetDebugLogging` (no category list = all categories).

#![allow(non_snake_case, non_camel_case_types, non_upper_case_globals)]

use crate::cosim::{CoSimModel, Inputs, LoadedModel, ModelFile, ModelState, Setpoints};
use crate::variables::{self, vr, Causality, VarType};
use serde::{Deserialize, Serialize};
use std::ffi::{c_char, c_int, c_uint, c_void, CStr, CString};
use std::panic::{catch_unwind, AssertUnwindSafe};
use std::path::PathBuf;
use std::sync::Mutex;

pub type fmi2Component = *mut c_void;
pub type fmi2ComponentEnvironment = *mut c_void;
pub type fmi2FMUstate = *mut c_void;
pub type fmi2ValueReference = c_uint;
pub type fmi2Real = f64;
pub type fmi2Integer = c_int;
pub type fmi2Boolean = c_int;
pub type fmi2Char = c_char;
pub type fmi2String = *const fmi2Char;
pub type fmi2Byte = c_char;
pub type fmi2Status = c_int;
pub type fmi2Type = c_int;
pub type fmi2StatusKind = c_int;

pub const fmi2OK: fmi2Status = 0;
pub const fmi2Warning: fmi2Status = 1;
pub const fmi2Discard: fmi2Status = 2;
pub const fmi2Error: fmi2Status = 3;
pub const fmi2Fatal: fmi2Status = 4;
pub const fmi2Pending: fmi2Status = 5;

pub const fmi2ModelExchange: fmi2Type = 0;
pub const fmi2CoSimulation: fmi2Type = 1;

pub const fmi2DoStepStatus: fmi2StatusKind = 0;
pub const fmi2PendingStatus: fmi2StatusKind = 1;
pub const fmi2LastSuccessfulTime: fmi2StatusKind = 2;
pub const fmi2Terminated: fmi2StatusKind = 3;

pub const fmi2True: fmi2Boolean = 1;
pub const fmi2False: fmi2Boolean = 0;

/// The host's logger: `logger(env, instanceName, status, category, message, ...)` (C variadic).
pub type fmi2CallbackLogger = unsafe extern "C" fn(
    fmi2ComponentEnvironment,
    fmi2String,
    fmi2Status,
    fmi2String,
    fmi2String,
    ...
);

/// `fmi2CallbackFunctions` of the standard's `fmi2FunctionTypes.h`.
#[repr(C)]
pub struct fmi2CallbackFunctions {
    // spelled out rather than `Option<fmi2CallbackLogger>` so that cbindgen writes a nullable
    // function pointer
    pub logger: Option<
        unsafe extern "C" fn(
            fmi2ComponentEnvironment,
            fmi2String,
            fmi2Status,
            fmi2String,
            fmi2String,
            ...
        ),
    >,
    pub allocateMemory: Option<unsafe extern "C" fn(usize, usize) -> *mut c_void>,
    pub freeMemory: Option<unsafe extern "C" fn(*mut c_void)>,
    pub stepFinished: Option<unsafe extern "C" fn(fmi2ComponentEnvironment, fmi2Status)>,
    pub componentEnvironment: fmi2ComponentEnvironment,
}

/// Log categories offered in the model description (name, description).
pub const LOG_CATEGORIES: [(&str, &str); 4] = [
    (
        "logStatusError",
        "Errors: why a call returned fmi2Error (always sent)",
    ),
    (
        "logStatusWarning",
        "Warnings, e.g. inputs leaving the model's envelope",
    ),
    ("logFmiCall", "Every FMI call with its arguments"),
    ("logAll", "All of the above"),
];

/// Capability flags of the `CoSimulation` element (attribute name, value), in the order the
/// exporter writes them. The runtime serves exactly these.
pub const CAPABILITIES: [(&str, &str); 10] = [
    ("needsExecutionTool", "false"),
    ("canHandleVariableCommunicationStepSize", "true"),
    ("canInterpolateInputs", "false"),
    ("maxOutputDerivativeOrder", "0"),
    ("canRunAsynchronuously", "false"),
    ("canBeInstantiatedOnlyOncePerProcess", "false"),
    ("canNotUseMemoryManagementFunctions", "true"),
    ("canGetAndSetFMUstate", "true"),
    ("canSerializeFMUstate", "true"),
    ("providesDirectionalDerivative", "false"),
];

/// Every function this library exports (the 25 common + 9 Co-Simulation functions).
pub const EXPORTED_FUNCTIONS: [&str; 34] = [
    "fmi2GetTypesPlatform",
    "fmi2GetVersion",
    "fmi2SetDebugLogging",
    "fmi2Instantiate",
    "fmi2FreeInstance",
    "fmi2SetupExperiment",
    "fmi2EnterInitializationMode",
    "fmi2ExitInitializationMode",
    "fmi2Terminate",
    "fmi2Reset",
    "fmi2GetReal",
    "fmi2GetInteger",
    "fmi2GetBoolean",
    "fmi2GetString",
    "fmi2SetReal",
    "fmi2SetInteger",
    "fmi2SetBoolean",
    "fmi2SetString",
    "fmi2GetFMUstate",
    "fmi2SetFMUstate",
    "fmi2FreeFMUstate",
    "fmi2SerializedFMUstateSize",
    "fmi2SerializeFMUstate",
    "fmi2DeSerializeFMUstate",
    "fmi2GetDirectionalDerivative",
    "fmi2SetRealInputDerivatives",
    "fmi2GetRealOutputDerivatives",
    "fmi2DoStep",
    "fmi2CancelStep",
    "fmi2GetStatus",
    "fmi2GetRealStatus",
    "fmi2GetIntegerStatus",
    "fmi2GetBooleanStatus",
    "fmi2GetStringStatus",
];

/// The serialised FMU state's format tag.
pub const FMU_STATE_FORMAT: &str = "understudy-fmustate/1";

/// States of the Co-Simulation state machine (FMI 2.0, §4.2.4). `stepInProgress` and
/// `stepCanceled` never occur: steps are synchronous.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
pub enum Fmi2State {
    Instantiated,
    InitializationMode,
    StepComplete,
    StepFailed,
    StepCanceled,
    Terminated,
    Error,
}

use Fmi2State as S;

pub(crate) const ANY: &[Fmi2State] = &[
    S::Instantiated,
    S::InitializationMode,
    S::StepComplete,
    S::StepFailed,
    S::StepCanceled,
    S::Terminated,
    S::Error,
];
pub(crate) const GETTABLE: &[Fmi2State] = &[
    S::InitializationMode,
    S::StepComplete,
    S::StepFailed,
    S::StepCanceled,
    S::Terminated,
    S::Error,
];
pub(crate) const SETTABLE: &[Fmi2State] =
    &[S::Instantiated, S::InitializationMode, S::StepComplete];
const STATUS_QUERY: &[Fmi2State] = &[
    S::StepComplete,
    S::StepFailed,
    S::StepCanceled,
    S::Terminated,
];

/// The host's logger and environment, copied at instantiation; the same instance core serves
/// the FMI 2.0 and the FMI 3.0 boundary, which differ in the logger's signature.
#[derive(Clone, Copy)]
pub(crate) enum Host {
    Fmi2 {
        logger: Option<fmi2CallbackLogger>,
        environment: fmi2ComponentEnvironment,
    },
    Fmi3 {
        logger: crate::fmi3::fmi3LogMessageCallback,
        environment: crate::fmi3::fmi3InstanceEnvironment,
    },
}

impl Host {
    fn standard(&self) -> &'static str {
        match self {
            Host::Fmi2 { .. } => "FMI 2.0",
            Host::Fmi3 { .. } => "FMI 3.0",
        }
    }

    /// The standard's name of a state (FMI 3.0 calls the state after a step `StepMode`).
    fn state_name(&self, state: Fmi2State) -> &'static str {
        match (self, state) {
            (_, S::Instantiated) => "Instantiated",
            (_, S::InitializationMode) => "InitializationMode",
            (Host::Fmi2 { .. }, S::StepComplete) => "StepComplete",
            (Host::Fmi3 { .. }, S::StepComplete) => "StepMode",
            (_, S::StepFailed) => "StepFailed",
            (_, S::StepCanceled) => "StepCanceled",
            (_, S::Terminated) => "Terminated",
            (_, S::Error) => "Error",
        }
    }
}

// SAFETY: the environment pointer is the host's; the standard makes the host responsible for
// its validity while the instance lives, and we only hand it back to the host's own logger.
unsafe impl Send for Host {}

#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub(crate) enum Category {
    Error,
    Warning,
    Call,
}

impl Category {
    fn name(self) -> &'static str {
        match self {
            Category::Error => LOG_CATEGORIES[0].0,
            Category::Warning => LOG_CATEGORIES[1].0,
            Category::Call => LOG_CATEGORIES[2].0,
        }
    }
}

pub(crate) struct Inner {
    pub(crate) state: Fmi2State,
    host: Host,
    logging_on: bool,
    /// Enabled categories (Error, Warning, Call).
    categories: [bool; 3],
    pub(crate) guid: String,
    file: ModelFile,
    model: LoadedModel,
    pub(crate) start_time: f64,
    pub(crate) time: f64,
    inputs: Inputs,
    setpoints: Setpoints,
    latched_out_of_envelope: bool,
}

/// One FMU instance (what `fmi2Component` points to).
pub struct Instance {
    pub(crate) name: CString,
    pub(crate) inner: Mutex<Inner>,
}

/// An FMU state as handed to the host (`fmi2FMUstate` points to it).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
struct Snapshot {
    format: String,
    guid: String,
    state: Fmi2State,
    start_time: f64,
    time: f64,
    inputs: Inputs,
    setpoints: Setpoints,
    latched_out_of_envelope: bool,
    model: ModelState,
}

const SNAPSHOT_MAGIC: u64 = 0x7573_6d6f_6465_6c31;

struct SnapshotBox {
    magic: u64,
    snapshot: Snapshot,
}

impl Inner {
    fn enabled(&self, category: Category) -> bool {
        match category {
            Category::Error => true,
            Category::Warning => !self.logging_on || self.categories[1],
            Category::Call => self.logging_on && self.categories[2],
        }
    }

    pub(crate) fn log(&self, name: &CStr, status: fmi2Status, category: Category, message: &str) {
        if self.enabled(category) {
            send_log(&self.host, name, status, category, message);
        }
    }

    pub(crate) fn reset_to_start(&mut self) -> Result<(), String> {
        self.model = self.file.build().map_err(|e| e.to_string())?;
        self.inputs = self.file.start.inputs;
        self.setpoints = self.file.start.setpoints;
        self.start_time = 0.0;
        self.time = 0.0;
        self.latched_out_of_envelope = false;
        self.state = S::Instantiated;
        Ok(())
    }

    fn outside_envelope(&self) -> bool {
        !self.file.envelope.contains(&self.inputs)
    }

    /// Outputs at the current inputs; in initialisation mode, of the steady state the inputs
    /// and setpoints would give.
    fn outputs(&self) -> Result<crate::cosim::Outputs, String> {
        if self.state == S::InitializationMode {
            let mut trial = self.model.clone();
            trial
                .initialise(&self.inputs, &self.setpoints)
                .map_err(|e| format!("no steady state at the current inputs and setpoints: {e}"))?;
            trial.outputs(&self.inputs).map_err(|e| e.to_string())
        } else {
            self.model.outputs(&self.inputs).map_err(|e| e.to_string())
        }
    }

    fn snapshot(&self) -> Snapshot {
        Snapshot {
            format: FMU_STATE_FORMAT.into(),
            guid: self.guid.clone(),
            state: self.state,
            start_time: self.start_time,
            time: self.time,
            inputs: self.inputs,
            setpoints: self.setpoints,
            latched_out_of_envelope: self.latched_out_of_envelope,
            model: self.model.save_state(),
        }
    }

    fn restore(&mut self, s: &Snapshot) -> Result<(), String> {
        if s.guid != self.guid {
            return Err(format!(
                "the FMU state belongs to GUID {} but this instance has GUID {}",
                s.guid, self.guid
            ));
        }
        self.model
            .restore_state(&s.model)
            .map_err(|e| e.to_string())?;
        self.state = s.state;
        self.start_time = s.start_time;
        self.time = s.time;
        self.inputs = s.inputs;
        self.setpoints = s.setpoints;
        self.latched_out_of_envelope = s.latched_out_of_envelope;
        Ok(())
    }
}

pub(crate) fn send_log(
    host: &Host,
    name: &CStr,
    status: fmi2Status,
    category: Category,
    message: &str,
) {
    let category = CString::new(category.name()).expect("category names have no NUL");
    match *host {
        Host::Fmi2 {
            logger: Some(logger),
            environment,
        } => {
            // the message is the format string: double every `%`, strip NULs
            let text = message.replace('%', "%%").replace('\0', " ");
            let Ok(text) = CString::new(text) else { return };
            // SAFETY: the host supplied the logger for exactly this call shape; every pointer
            // is a valid NUL-terminated string that outlives the call.
            unsafe {
                logger(
                    environment,
                    name.as_ptr(),
                    status,
                    category.as_ptr(),
                    text.as_ptr(),
                )
            };
        }
        Host::Fmi3 {
            logger: Some(logger),
            environment,
        } => {
            // FMI 3.0's logger takes the message as plain text (not a format string)
            let Ok(text) = CString::new(message.replace('\0', " ")) else {
                return;
            };
            // SAFETY: as above, for the FMI 3.0 callback's shape.
            unsafe { logger(environment, status, category.as_ptr(), text.as_ptr()) };
        }
        _ => {}
    }
}

fn panic_text(payload: &Box<dyn std::any::Any + Send>) -> String {
    if let Some(s) = payload.downcast_ref::<&str>() {
        (*s).to_string()
    } else if let Some(s) = payload.downcast_ref::<String>() {
        s.clone()
    } else {
        "unknown panic".to_string()
    }
}

#[cfg(test)]
thread_local! {
    /// Test-only fault injection: an entry point whose call name is here panics inside its
    /// guard (compiled only into the runtime's own unit tests, never into a shipped library).
    pub(crate) static PANIC_IN: std::cell::Cell<Option<&'static str>> =
        const { std::cell::Cell::new(None) };
}

/// Run `body` on the instance behind `c`, in one of the `allowed` states, catching panics.
/// `Err(message)` from the body logs `call: message`, moves to the error state and returns
/// `fmi2Error` (= `fmi3Error`: both standards number their statuses alike). Serves the FMI 2.0
/// and the FMI 3.0 entry points.
pub(crate) fn entry(
    c: fmi2Component,
    call: &'static str,
    allowed: &[Fmi2State],
    body: impl FnOnce(&mut Inner, &CStr) -> Result<fmi2Status, String>,
) -> fmi2Status {
    if c.is_null() {
        return fmi2Error;
    }
    // SAFETY: a non-null component is one we returned from fmi2Instantiate and that the host
    // has not freed (the standard's contract).
    let instance = unsafe { &*(c as *const Instance) };
    let name = instance.name.as_c_str();
    let outcome = catch_unwind(AssertUnwindSafe(|| {
        let mut inner = instance.inner.lock().unwrap_or_else(|p| p.into_inner());
        if !allowed.contains(&inner.state) {
            let host = inner.host;
            let allowed: Vec<&str> = allowed.iter().map(|s| host.state_name(*s)).collect();
            let message = format!(
                "{call}: called in state {}; the {} Co-Simulation state machine allows it only in {}",
                host.state_name(inner.state),
                host.standard(),
                allowed.join(", ")
            );
            inner.log(name, fmi2Error, Category::Error, &message);
            inner.state = S::Error;
            return fmi2Error;
        }
        inner.log(name, fmi2OK, Category::Call, call);
        #[cfg(test)]
        if PANIC_IN.with(|p| p.get()) == Some(call) {
            panic!("fault injected into {call}");
        }
        match body(&mut inner, name) {
            Ok(status) => status,
            Err(message) => {
                inner.log(
                    name,
                    fmi2Error,
                    Category::Error,
                    &format!("{call}: {message}"),
                );
                inner.state = S::Error;
                fmi2Error
            }
        }
    }));
    outcome.unwrap_or_else(|payload| {
        let mut inner = instance.inner.lock().unwrap_or_else(|p| p.into_inner());
        inner.state = S::Error;
        let message = format!(
            "{call}: internal error (caught panic: {})",
            panic_text(&payload)
        );
        inner.log(name, fmi2Error, Category::Error, &message);
        fmi2Error
    })
}

/// An entry point whose capability the model description does not claim.
pub(crate) fn unsupported(c: fmi2Component, call: &'static str, why: &'static str) -> fmi2Status {
    entry(c, call, ANY, |_, _| Err(format!("not supported: {why}")))
}

/// The local path of a `file:` URI: `file:///abs/path`, `file://localhost/abs/path` or
/// `file:/abs/path`, percent-decoded (RFC 8089; RFC 3986 §2.1).
pub fn resource_path(uri: &str) -> Result<PathBuf, String> {
    let lower = uri.get(..5).map(|s| s.to_ascii_lowercase());
    if lower.as_deref() != Some("file:") {
        return Err(format!(
            "resource location `{uri}` is not a file: URI (expected file:///path/to/resources)"
        ));
    }
    let rest = &uri[5..];
    let path = if let Some(authority_and_path) = rest.strip_prefix("//") {
        let slash = authority_and_path
            .find('/')
            .ok_or_else(|| format!("resource location `{uri}` has no path after its authority"))?;
        let authority = &authority_and_path[..slash];
        if !(authority.is_empty() || authority.eq_ignore_ascii_case("localhost")) {
            return Err(format!(
                "resource location `{uri}` names host `{authority}`: only local files can be read"
            ));
        }
        &authority_and_path[slash..]
    } else if rest.starts_with('/') {
        rest
    } else {
        return Err(format!(
            "resource location `{uri}` is not an absolute file: URI"
        ));
    };
    let bytes = path.as_bytes();
    let mut out = Vec::with_capacity(bytes.len());
    let mut k = 0;
    while k < bytes.len() {
        if bytes[k] == b'%' {
            let hex = bytes
                .get(k + 1..k + 3)
                .and_then(|h| std::str::from_utf8(h).ok())
                .and_then(|h| u8::from_str_radix(h, 16).ok())
                .ok_or_else(|| {
                    format!("resource location `{uri}` has a bad percent escape at byte {k}")
                })?;
            out.push(hex);
            k += 3;
        } else {
            out.push(bytes[k]);
            k += 1;
        }
    }
    #[cfg(unix)]
    {
        use std::os::unix::ffi::OsStringExt;
        Ok(PathBuf::from(std::ffi::OsString::from_vec(out)))
    }
    #[cfg(not(unix))]
    {
        String::from_utf8(out)
            .map(PathBuf::from)
            .map_err(|_| format!("resource location `{uri}` is not UTF-8 after decoding"))
    }
}

/// A C string argument, or a message naming it.
///
/// # Safety
/// `p` is null or a valid NUL-terminated string.
pub(crate) unsafe fn c_str<'a>(p: fmi2String, what: &str) -> Result<&'a str, String> {
    if p.is_null() {
        return Err(format!("{what} is NULL"));
    }
    CStr::from_ptr(p)
        .to_str()
        .map_err(|_| format!("{what} is not UTF-8"))
}

fn instantiate(
    name: fmi2String,
    fmu_type: fmi2Type,
    guid: fmi2String,
    resource_location: fmi2String,
    host: Host,
    logging_on: bool,
) -> Result<Box<Instance>, String> {
    // SAFETY: the host passes NUL-terminated strings or NULL (checked).
    let name = unsafe { c_str(name, "instanceName") }?;
    if name.is_empty() {
        return Err("instanceName is empty".into());
    }
    if fmu_type != fmi2CoSimulation {
        return Err(format!(
            "fmuType = {fmu_type}: this FMU offers Co-Simulation only (fmi2CoSimulation = {fmi2CoSimulation})"
        ));
    }
    let given_guid = unsafe { c_str(guid, "fmuGUID") }?;
    let location = unsafe { c_str(resource_location, "fmuResourceLocation") }?;
    let dir = resource_path(location)?;
    load_instance(name, given_guid, "fmuGUID", &dir, host, logging_on)
}

/// An instance of the model file in the resource folder `dir`, whose fingerprint must equal
/// `given_guid` (FMI 2.0's GUID, FMI 3.0's instantiation token; `what` names the argument).
pub(crate) fn load_instance(
    name: &str,
    given_guid: &str,
    what: &str,
    dir: &std::path::Path,
    host: Host,
    logging_on: bool,
) -> Result<Box<Instance>, String> {
    if name.is_empty() {
        return Err("instanceName is empty".into());
    }
    let path = dir.join("model.json");
    let bytes = std::fs::read(&path)
        .map_err(|e| format!("cannot read the model file {}: {e}", path.display()))?;
    let expected_guid = ModelFile::guid_of(&bytes);
    if given_guid != expected_guid {
        return Err(format!(
            "{what} {given_guid} does not match the model file {} (fingerprint {expected_guid}): \
             the model description and the resources come from different exports",
            path.display()
        ));
    }
    let file = ModelFile::from_json(&bytes).map_err(|e| format!("{}: {e}", path.display()))?;
    let model = file.build().map_err(|e| e.to_string())?;
    let inner = Inner {
        state: S::Instantiated,
        host,
        logging_on,
        categories: [true; 3],
        guid: expected_guid,
        inputs: file.start.inputs,
        setpoints: file.start.setpoints,
        file,
        model,
        start_time: 0.0,
        time: 0.0,
        latched_out_of_envelope: false,
    };
    Ok(Box::new(Instance {
        name: CString::new(name).expect("checked: came from a C string"),
        inner: Mutex::new(inner),
    }))
}

// ------------------------------------------------------------------------------------------
// Common functions
// ------------------------------------------------------------------------------------------

/// `"default"`: the standard's types platform.
#[no_mangle]
pub extern "C" fn fmi2GetTypesPlatform() -> *const c_char {
    c"default".as_ptr()
}

/// `"2.0"`.
#[no_mangle]
pub extern "C" fn fmi2GetVersion() -> *const c_char {
    c"2.0".as_ptr()
}

/// Create an instance: reads `model.json` from the resource location and checks the GUID.
/// Returns NULL (after logging why, when a logger was given) on any failure.
///
/// # Safety
/// String arguments are NULL or NUL-terminated; `functions` is NULL or points to a valid
/// `fmi2CallbackFunctions` (it is copied).
#[no_mangle]
pub unsafe extern "C" fn fmi2Instantiate(
    instanceName: fmi2String,
    fmuType: fmi2Type,
    fmuGUID: fmi2String,
    fmuResourceLocation: fmi2String,
    functions: *const fmi2CallbackFunctions,
    _visible: fmi2Boolean,
    loggingOn: fmi2Boolean,
) -> fmi2Component {
    let outcome = catch_unwind(AssertUnwindSafe(|| {
        if functions.is_null() {
            return std::ptr::null_mut();
        }
        let host = Host::Fmi2 {
            logger: (*functions).logger,
            environment: (*functions).componentEnvironment,
        };
        let log_host = host;
        match instantiate(
            instanceName,
            fmuType,
            fmuGUID,
            fmuResourceLocation,
            host,
            loggingOn != fmi2False,
        ) {
            Ok(instance) => {
                {
                    let inner = instance.inner.lock().unwrap_or_else(|p| p.into_inner());
                    inner.log(
                        &instance.name,
                        fmi2OK,
                        Category::Call,
                        &format!("fmi2Instantiate: GUID {}", inner.guid),
                    );
                }
                Box::into_raw(instance) as fmi2Component
            }
            Err(message) => {
                let name = if instanceName.is_null() {
                    CString::default()
                } else {
                    CStr::from_ptr(instanceName).to_owned()
                };
                send_log(
                    &log_host,
                    &name,
                    fmi2Error,
                    Category::Error,
                    &format!("fmi2Instantiate: {message}"),
                );
                std::ptr::null_mut()
            }
        }
    }));
    outcome.unwrap_or(std::ptr::null_mut())
}

/// Free an instance (NULL is ignored).
///
/// # Safety
/// `c` is NULL or an instance from `fmi2Instantiate` not yet freed; no other call on it runs.
#[no_mangle]
pub unsafe extern "C" fn fmi2FreeInstance(c: fmi2Component) {
    free_instance(c, "fmi2FreeInstance")
}

/// Free an instance of either boundary (NULL is ignored).
///
/// # Safety
/// As [`fmi2FreeInstance`].
pub(crate) unsafe fn free_instance(c: *mut c_void, call: &str) {
    if c.is_null() {
        return;
    }
    let _ = catch_unwind(AssertUnwindSafe(|| {
        let instance = Box::from_raw(c as *mut Instance);
        {
            let inner = instance.inner.lock().unwrap_or_else(|p| p.into_inner());
            inner.log(&instance.name, fmi2OK, Category::Call, call);
        }
        drop(instance);
    }));
}

/// Switch debug logging and choose categories (none listed = all).
///
/// # Safety
/// `c` is a live instance; `categories` holds `nCategories` NUL-terminated strings.
#[no_mangle]
pub unsafe extern "C" fn fmi2SetDebugLogging(
    c: fmi2Component,
    loggingOn: fmi2Boolean,
    nCategories: usize,
    categories: *const fmi2String,
) -> fmi2Status {
    entry(c, "fmi2SetDebugLogging", ANY, |inner, name| {
        set_debug_logging(
            inner,
            name,
            "fmi2SetDebugLogging",
            loggingOn != fmi2False,
            nCategories,
            categories,
        )
    })
}

/// Switch debug logging and choose categories (none listed = all), for either boundary.
///
/// # Safety
/// `categories` holds `nCategories` NUL-terminated strings.
pub(crate) unsafe fn set_debug_logging(
    inner: &mut Inner,
    name: &CStr,
    call: &str,
    logging_on: bool,
    nCategories: usize,
    categories: *const *const c_char,
) -> Result<fmi2Status, String> {
    if nCategories > 0 && categories.is_null() {
        return Err(format!(
            "categories is NULL but nCategories = {nCategories}"
        ));
    }
    inner.logging_on = logging_on;
    if nCategories == 0 {
        inner.categories = [true; 3];
        return Ok(fmi2OK);
    }
    let mut enabled = [false; 3];
    let mut status = fmi2OK;
    for k in 0..nCategories {
        let category = c_str(*categories.add(k), "a category")?;
        match category {
            "logStatusError" => enabled[0] = true,
            "logStatusWarning" => enabled[1] = true,
            "logFmiCall" => enabled[2] = true,
            "logAll" => enabled = [true; 3],
            other => {
                status = fmi2Warning;
                send_log(
                    &inner.host,
                    name,
                    fmi2Warning,
                    Category::Warning,
                    &format!(
                        "{call}: unknown log category `{other}` (offered: {})",
                        LOG_CATEGORIES.map(|c| c.0).join(", ")
                    ),
                );
            }
        }
    }
    inner.categories = enabled;
    Ok(status)
}

/// Record the start time (the tolerance is not used: the model integrates with its own fixed
/// method).
///
/// # Safety
/// `c` is a live instance.
#[no_mangle]
pub unsafe extern "C" fn fmi2SetupExperiment(
    c: fmi2Component,
    _toleranceDefined: fmi2Boolean,
    _tolerance: fmi2Real,
    startTime: fmi2Real,
    _stopTimeDefined: fmi2Boolean,
    _stopTime: fmi2Real,
) -> fmi2Status {
    entry(c, "fmi2SetupExperiment", &[S::Instantiated], |inner, _| {
        if !startTime.is_finite() {
            return Err(format!(
                "startTime = {startTime}: expected a finite time (s)"
            ));
        }
        inner.start_time = startTime;
        inner.time = startTime;
        Ok(fmi2OK)
    })
}

/// # Safety
/// `c` is a live instance.
#[no_mangle]
pub unsafe extern "C" fn fmi2EnterInitializationMode(c: fmi2Component) -> fmi2Status {
    entry(
        c,
        "fmi2EnterInitializationMode",
        &[S::Instantiated],
        |inner, _| {
            inner.time = inner.start_time;
            inner.state = S::InitializationMode;
            Ok(fmi2OK)
        },
    )
}

/// Initialise the model at the steady state of the current inputs and setpoints.
///
/// # Safety
/// `c` is a live instance.
#[no_mangle]
pub unsafe extern "C" fn fmi2ExitInitializationMode(c: fmi2Component) -> fmi2Status {
    entry(
        c,
        "fmi2ExitInitializationMode",
        &[S::InitializationMode],
        |inner, name| exit_initialisation(inner, name).map(|()| fmi2OK),
    )
}

/// Initialise the model at the steady state of the current inputs and setpoints and enter
/// the stepping state.
pub(crate) fn exit_initialisation(inner: &mut Inner, name: &CStr) -> Result<(), String> {
    inner
        .model
        .initialise(&inner.inputs, &inner.setpoints)
        .map_err(|e| format!("no steady state at the start: {e}"))?;
    inner.state = S::StepComplete;
    if inner.outside_envelope() {
        inner.latched_out_of_envelope = true;
        inner.log(
            name,
            fmi2Warning,
            Category::Warning,
            &format!(
                "initial inputs |v| = {:.4} pu, f = {:.4} pu lie outside the model's envelope",
                inner.inputs.voltage().norm(),
                inner.inputs.f_grid
            ),
        );
    }
    Ok(())
}

/// # Safety
/// `c` is a live instance.
#[no_mangle]
pub unsafe extern "C" fn fmi2Terminate(c: fmi2Component) -> fmi2Status {
    entry(
        c,
        "fmi2Terminate",
        &[S::StepComplete, S::StepFailed],
        |inner, _| {
            inner.state = S::Terminated;
            Ok(fmi2OK)
        },
    )
}

/// Back to the instantiated state with the model file's start values.
///
/// # Safety
/// `c` is a live instance.
#[no_mangle]
pub unsafe extern "C" fn fmi2Reset(c: fmi2Component) -> fmi2Status {
    entry(c, "fmi2Reset", ANY, |inner, _| {
        inner.reset_to_start()?;
        Ok(fmi2OK)
    })
}

/// Check the common array arguments of a get/set call.
pub(crate) fn arrays_ok<T, U>(nvr: usize, vr: *const T, value: *const U) -> Result<(), String> {
    if nvr > 0 && vr.is_null() {
        return Err(format!("vr is NULL but nvr = {nvr}"));
    }
    if nvr > 0 && value.is_null() {
        return Err(format!("value is NULL but nvr = {nvr}"));
    }
    Ok(())
}

/// # Safety
/// `c` is a live instance; `vr` and `value` hold `nvr` elements.
#[no_mangle]
pub unsafe extern "C" fn fmi2GetReal(
    c: fmi2Component,
    vr: *const fmi2ValueReference,
    nvr: usize,
    value: *mut fmi2Real,
) -> fmi2Status {
    entry(c, "fmi2GetReal", GETTABLE, |inner, _| {
        get_reals(inner, vr, nvr, value, None).map(|()| fmi2OK)
    })
}

/// Read real variables (FMI 2.0 Real, FMI 3.0 Float64); `time_vr` is the value reference of
/// the independent variable where the standard has one (FMI 3.0), answered with the FMU's
/// time. The outputs are evaluated at most once per call however many are asked for.
///
/// # Safety
/// `vr` and `value` hold `nvr` elements.
pub(crate) unsafe fn get_reals(
    inner: &Inner,
    vr: *const fmi2ValueReference,
    nvr: usize,
    value: *mut f64,
    time_vr: Option<fmi2ValueReference>,
) -> Result<(), String> {
    arrays_ok(nvr, vr, value)?;
    let mut outputs = None;
    for k in 0..nvr {
        let r = *vr.add(k);
        let v = match r {
            r if Some(r) == time_vr => inner.time,
            vr::V_RE => inner.inputs.v_re,
            vr::V_IM => inner.inputs.v_im,
            vr::F_GRID => inner.inputs.f_grid,
            vr::P_REF => inner.setpoints.p_ref,
            vr::Q_REF => inner.setpoints.q_ref,
            vr::S_BASE_MVA => inner.file.bases.s_base_mva,
            vr::V_BASE_KV => inner.file.bases.v_base_kv,
            vr::I_RE | vr::I_IM | vr::P | vr::Q => {
                if outputs.is_none() {
                    outputs = Some(inner.outputs()?);
                }
                let o = outputs.expect("just set");
                match r {
                    vr::I_RE => o.i_re,
                    vr::I_IM => o.i_im,
                    vr::P => o.p,
                    _ => o.q,
                }
            }
            other => return Err(format!("value reference {other} is not a Real variable")),
        };
        *value.add(k) = v;
    }
    Ok(())
}

/// There are no Integer variables: any value reference is an error.
///
/// # Safety
/// `c` is a live instance; `vr` and `value` hold `nvr` elements.
#[no_mangle]
pub unsafe extern "C" fn fmi2GetInteger(
    c: fmi2Component,
    vr: *const fmi2ValueReference,
    nvr: usize,
    value: *mut fmi2Integer,
) -> fmi2Status {
    entry(c, "fmi2GetInteger", GETTABLE, |_, _| {
        arrays_ok(nvr, vr, value)?;
        no_variables(nvr, vr, "Integer")
    })
}

pub(crate) unsafe fn no_variables(
    nvr: usize,
    vr: *const fmi2ValueReference,
    ty: &str,
) -> Result<fmi2Status, String> {
    if nvr > 0 {
        Err(format!(
            "value reference {} is not a{} {ty} variable: the model has none",
            *vr,
            if ty.starts_with(['A', 'E', 'I', 'O', 'U']) {
                "n"
            } else {
                ""
            }
        ))
    } else {
        Ok(fmi2OK)
    }
}

/// # Safety
/// `c` is a live instance; `vr` and `value` hold `nvr` elements.
#[no_mangle]
pub unsafe extern "C" fn fmi2GetBoolean(
    c: fmi2Component,
    vr: *const fmi2ValueReference,
    nvr: usize,
    value: *mut fmi2Boolean,
) -> fmi2Status {
    entry(c, "fmi2GetBoolean", GETTABLE, |inner, _| {
        arrays_ok(nvr, vr, value)?;
        get_booleans(inner, vr, nvr, |k, b| {
            *value.add(k) = if b { fmi2True } else { fmi2False }
        })
        .map(|()| fmi2OK)
    })
}

/// Read Boolean variables; `put(k, value)` stores the k-th.
///
/// # Safety
/// `vr` holds `nvr` elements.
pub(crate) unsafe fn get_booleans(
    inner: &Inner,
    vr: *const fmi2ValueReference,
    nvr: usize,
    mut put: impl FnMut(usize, bool),
) -> Result<(), String> {
    for k in 0..nvr {
        match *vr.add(k) {
            vr::OUT_OF_ENVELOPE => {
                put(k, inner.latched_out_of_envelope || inner.outside_envelope());
            }
            other => return Err(format!("value reference {other} is not a Boolean variable")),
        }
    }
    Ok(())
}

/// There are no String variables.
///
/// # Safety
/// `c` is a live instance; `vr` and `value` hold `nvr` elements.
#[no_mangle]
pub unsafe extern "C" fn fmi2GetString(
    c: fmi2Component,
    vr: *const fmi2ValueReference,
    nvr: usize,
    value: *mut fmi2String,
) -> fmi2Status {
    entry(c, "fmi2GetString", GETTABLE, |_, _| {
        arrays_ok(nvr, vr, value)?;
        no_variables(nvr, vr, "String")
    })
}

/// Set inputs (any settable state) and parameters (before initialisation ends). Every value is
/// checked before any is applied.
///
/// # Safety
/// `c` is a live instance; `vr` and `value` hold `nvr` elements.
#[no_mangle]
pub unsafe extern "C" fn fmi2SetReal(
    c: fmi2Component,
    vr: *const fmi2ValueReference,
    nvr: usize,
    value: *const fmi2Real,
) -> fmi2Status {
    entry(c, "fmi2SetReal", SETTABLE, |inner, _| {
        set_reals(inner, vr, nvr, value).map(|()| fmi2OK)
    })
}

/// Set real inputs and parameters (FMI 2.0 Real, FMI 3.0 Float64); all values are checked
/// before any is applied.
///
/// # Safety
/// `vr` and `value` hold `nvr` elements.
pub(crate) unsafe fn set_reals(
    inner: &mut Inner,
    vr: *const fmi2ValueReference,
    nvr: usize,
    value: *const f64,
) -> Result<(), String> {
    arrays_ok(nvr, vr, value)?;
    let mut inputs = inner.inputs;
    let mut setpoints = inner.setpoints;
    for k in 0..nvr {
        let r = *vr.add(k);
        let v = *value.add(k);
        let var = variables::find(VarType::Real, r)
            .ok_or_else(|| format!("value reference {r} is not a Real variable"))?;
        if !v.is_finite() {
            return Err(format!("{} = {v}: expected a finite number", var.name));
        }
        match var.causality {
            Causality::Output => {
                return Err(format!("{} is an output: it cannot be set", var.name))
            }
            Causality::Parameter if inner.state == S::StepComplete => {
                return Err(format!(
                    "{} is a fixed parameter: it cannot change after initialisation",
                    var.name
                ))
            }
            _ => {}
        }
        match r {
            vr::V_RE => inputs.v_re = v,
            vr::V_IM => inputs.v_im = v,
            vr::F_GRID => {
                if v <= 0.0 {
                    return Err(format!("f_grid = {v}: expected a frequency > 0 pu"));
                }
                inputs.f_grid = v
            }
            vr::P_REF => setpoints.p_ref = v,
            vr::Q_REF => setpoints.q_ref = v,
            vr::S_BASE_MVA | vr::V_BASE_KV => {
                let base = if r == vr::S_BASE_MVA {
                    inner.file.bases.s_base_mva
                } else {
                    inner.file.bases.v_base_kv
                };
                if (v - base).abs() > 1e-12 * base.abs() {
                    return Err(format!(
                        "{} = {v}: the model is per unit on {} = {base}, fixed by the model file",
                        var.name, var.name
                    ));
                }
            }
            _ => unreachable!("every Real variable is handled above"),
        }
    }
    inner.inputs = inputs;
    inner.setpoints = setpoints;
    Ok(())
}

/// There are no Integer variables.
///
/// # Safety
/// `c` is a live instance; `vr` and `value` hold `nvr` elements.
#[no_mangle]
pub unsafe extern "C" fn fmi2SetInteger(
    c: fmi2Component,
    vr: *const fmi2ValueReference,
    nvr: usize,
    value: *const fmi2Integer,
) -> fmi2Status {
    entry(c, "fmi2SetInteger", SETTABLE, |_, _| {
        arrays_ok(nvr, vr, value)?;
        no_variables(nvr, vr, "Integer")
    })
}

/// The only Boolean variable is an output: any value reference is an error.
///
/// # Safety
/// `c` is a live instance; `vr` and `value` hold `nvr` elements.
#[no_mangle]
pub unsafe extern "C" fn fmi2SetBoolean(
    c: fmi2Component,
    vr: *const fmi2ValueReference,
    nvr: usize,
    value: *const fmi2Boolean,
) -> fmi2Status {
    entry(c, "fmi2SetBoolean", SETTABLE, |_, _| {
        arrays_ok(nvr, vr, value)?;
        refuse_boolean_set(vr, nvr).map(|()| fmi2OK)
    })
}

/// The only Boolean variable is an output: setting any is an error.
///
/// # Safety
/// `vr` holds `nvr` elements.
pub(crate) unsafe fn refuse_boolean_set(
    vr: *const fmi2ValueReference,
    nvr: usize,
) -> Result<(), String> {
    if nvr > 0 {
        let r = *vr;
        return Err(match variables::find(VarType::Boolean, r) {
            Some(var) => format!("{} is an output: it cannot be set", var.name),
            None => format!("value reference {r} is not a Boolean variable"),
        });
    }
    Ok(())
}

/// There are no String variables.
///
/// # Safety
/// `c` is a live instance; `vr` and `value` hold `nvr` elements.
#[no_mangle]
pub unsafe extern "C" fn fmi2SetString(
    c: fmi2Component,
    vr: *const fmi2ValueReference,
    nvr: usize,
    value: *const fmi2String,
) -> fmi2Status {
    entry(c, "fmi2SetString", SETTABLE, |_, _| {
        arrays_ok(nvr, vr, value)?;
        no_variables(nvr, vr, "String")
    })
}

/// A boxed snapshot behind a host-held pointer, checked for our tag.
///
/// # Safety
/// `p` is NULL or a pointer from `fmi2GetFMUstate`/`fmi2DeSerializeFMUstate` not yet freed.
unsafe fn snapshot_at<'a>(p: fmi2FMUstate) -> Result<&'a mut SnapshotBox, String> {
    if p.is_null() {
        return Err("FMUstate is NULL".into());
    }
    let b = &mut *(p as *mut SnapshotBox);
    if b.magic != SNAPSHOT_MAGIC {
        return Err("FMUstate was not made by this FMU (or was freed)".into());
    }
    Ok(b)
}

/// Copy the instance's state; `*FMUstate` NULL allocates, non-NULL overwrites that state.
///
/// # Safety
/// `c` is a live instance; `FMUstate` points to NULL or to a state of this FMU.
#[no_mangle]
pub unsafe extern "C" fn fmi2GetFMUstate(
    c: fmi2Component,
    FMUstate: *mut fmi2FMUstate,
) -> fmi2Status {
    entry(c, "fmi2GetFMUstate", ANY, |inner, _| {
        get_state(inner, FMUstate).map(|()| fmi2OK)
    })
}

/// Copy the instance's state into `*FMUstate` (allocated when NULL).
///
/// # Safety
/// `FMUstate` points to NULL or to a state of this FMU.
pub(crate) unsafe fn get_state(inner: &Inner, FMUstate: *mut *mut c_void) -> Result<(), String> {
    if FMUstate.is_null() {
        return Err("FMUstate is NULL".into());
    }
    let snapshot = inner.snapshot();
    if (*FMUstate).is_null() {
        *FMUstate = Box::into_raw(Box::new(SnapshotBox {
            magic: SNAPSHOT_MAGIC,
            snapshot,
        })) as fmi2FMUstate;
    } else {
        snapshot_at(*FMUstate)?.snapshot = snapshot;
    }
    Ok(())
}

/// Make a copied state the instance's state again.
///
/// # Safety
/// `c` is a live instance; `FMUstate` is a state of this FMU.
#[no_mangle]
pub unsafe extern "C" fn fmi2SetFMUstate(c: fmi2Component, FMUstate: fmi2FMUstate) -> fmi2Status {
    entry(c, "fmi2SetFMUstate", ANY, |inner, _| {
        set_state(inner, FMUstate).map(|()| fmi2OK)
    })
}

/// Make a copied state the instance's state again.
///
/// # Safety
/// `FMUstate` is a state of this FMU.
pub(crate) unsafe fn set_state(inner: &mut Inner, FMUstate: *mut c_void) -> Result<(), String> {
    let b = snapshot_at(FMUstate)?;
    inner.restore(&b.snapshot)?;
    Ok(())
}

/// Free a copied state and set `*FMUstate` to NULL (NULL is ignored).
///
/// # Safety
/// `c` is a live instance; `FMUstate` is NULL or points to NULL or to a state of this FMU.
#[no_mangle]
pub unsafe extern "C" fn fmi2FreeFMUstate(
    c: fmi2Component,
    FMUstate: *mut fmi2FMUstate,
) -> fmi2Status {
    entry(c, "fmi2FreeFMUstate", ANY, |_, _| {
        free_state(FMUstate).map(|()| fmi2OK)
    })
}

/// Free a copied state and set `*FMUstate` to NULL.
///
/// # Safety
/// `FMUstate` is NULL or points to NULL or to a state of this FMU.
pub(crate) unsafe fn free_state(FMUstate: *mut *mut c_void) -> Result<(), String> {
    if FMUstate.is_null() || (*FMUstate).is_null() {
        return Ok(());
    }
    let b = snapshot_at(*FMUstate)?;
    b.magic = 0;
    drop(Box::from_raw(b as *mut SnapshotBox));
    *FMUstate = std::ptr::null_mut();
    Ok(())
}

fn serialise(snapshot: &Snapshot) -> Vec<u8> {
    serde_json::to_vec(snapshot).expect("a snapshot always serialises")
}

/// # Safety
/// `c` is a live instance; `FMUstate` is a state of this FMU; `size` is writable.
#[no_mangle]
pub unsafe extern "C" fn fmi2SerializedFMUstateSize(
    c: fmi2Component,
    FMUstate: fmi2FMUstate,
    size: *mut usize,
) -> fmi2Status {
    entry(c, "fmi2SerializedFMUstateSize", ANY, |_, _| {
        state_size(FMUstate, size).map(|()| fmi2OK)
    })
}

/// # Safety
/// `FMUstate` is a state of this FMU; `size` is writable.
pub(crate) unsafe fn state_size(FMUstate: *mut c_void, size: *mut usize) -> Result<(), String> {
    if size.is_null() {
        return Err("size is NULL".into());
    }
    *size = serialise(&snapshot_at(FMUstate)?.snapshot).len();
    Ok(())
}

/// # Safety
/// `c` is a live instance; `FMUstate` is a state of this FMU; `serializedState` holds `size`
/// bytes.
#[no_mangle]
pub unsafe extern "C" fn fmi2SerializeFMUstate(
    c: fmi2Component,
    FMUstate: fmi2FMUstate,
    serializedState: *mut fmi2Byte,
    size: usize,
) -> fmi2Status {
    entry(c, "fmi2SerializeFMUstate", ANY, |_, _| {
        serialize_state(FMUstate, serializedState as *mut u8, size).map(|()| fmi2OK)
    })
}

/// # Safety
/// `FMUstate` is a state of this FMU; `serializedState` holds `size` bytes.
pub(crate) unsafe fn serialize_state(
    FMUstate: *mut c_void,
    serializedState: *mut u8,
    size: usize,
) -> Result<(), String> {
    let bytes = serialise(&snapshot_at(FMUstate)?.snapshot);
    if serializedState.is_null() {
        return Err("serializedState is NULL".into());
    }
    if size < bytes.len() {
        return Err(format!(
            "size = {size} bytes is too small: the state needs {} (ask for the serialized state's size)",
            bytes.len()
        ));
    }
    std::ptr::copy_nonoverlapping(bytes.as_ptr(), serializedState, bytes.len());
    // the rest of a larger buffer is blank, so the JSON reader stops at the document's end
    std::ptr::write_bytes(serializedState.add(bytes.len()), b' ', size - bytes.len());
    Ok(())
}

/// Read a serialised state into a new `*FMUstate`.
///
/// # Safety
/// `c` is a live instance; `serializedState` holds `size` bytes; `FMUstate` is writable.
#[no_mangle]
pub unsafe extern "C" fn fmi2DeSerializeFMUstate(
    c: fmi2Component,
    serializedState: *const fmi2Byte,
    size: usize,
    FMUstate: *mut fmi2FMUstate,
) -> fmi2Status {
    entry(c, "fmi2DeSerializeFMUstate", ANY, |inner, _| {
        deserialize_state(inner, serializedState as *const u8, size, FMUstate).map(|()| fmi2OK)
    })
}

/// Read a serialised state into a new `*FMUstate`.
///
/// # Safety
/// `serializedState` holds `size` bytes; `FMUstate` is writable.
pub(crate) unsafe fn deserialize_state(
    inner: &Inner,
    serializedState: *const u8,
    size: usize,
    FMUstate: *mut *mut c_void,
) -> Result<(), String> {
    if serializedState.is_null() || FMUstate.is_null() {
        return Err("serializedState or FMUstate is NULL".into());
    }
    let bytes = std::slice::from_raw_parts(serializedState, size);
    let snapshot: Snapshot = serde_json::from_slice(bytes)
        .map_err(|e| format!("not a serialised state of this FMU: {e}"))?;
    if snapshot.format != FMU_STATE_FORMAT {
        return Err(format!(
            "serialised state format `{}`: expected `{FMU_STATE_FORMAT}`",
            snapshot.format
        ));
    }
    if snapshot.guid != inner.guid {
        return Err(format!(
            "serialised state of GUID {}: this instance has GUID {}",
            snapshot.guid, inner.guid
        ));
    }
    // the model must accept it now, not when it is set
    let mut probe = inner.model.clone();
    probe
        .restore_state(&snapshot.model)
        .map_err(|e| e.to_string())?;
    *FMUstate = Box::into_raw(Box::new(SnapshotBox {
        magic: SNAPSHOT_MAGIC,
        snapshot,
    })) as fmi2FMUstate;
    Ok(())
}

/// Not offered (`providesDirectionalDerivative="false"`).
///
/// # Safety
/// `c` is a live instance.
#[no_mangle]
pub unsafe extern "C" fn fmi2GetDirectionalDerivative(
    c: fmi2Component,
    _vUnknown_ref: *const fmi2ValueReference,
    _nUnknown: usize,
    _vKnown_ref: *const fmi2ValueReference,
    _nKnown: usize,
    _dvKnown: *const fmi2Real,
    _dvUnknown: *mut fmi2Real,
) -> fmi2Status {
    unsupported(
        c,
        "fmi2GetDirectionalDerivative",
        "the model description declares providesDirectionalDerivative=\"false\"",
    )
}

// ------------------------------------------------------------------------------------------
// Co-Simulation functions
// ------------------------------------------------------------------------------------------

/// Not offered (`canInterpolateInputs="false"`).
///
/// # Safety
/// `c` is a live instance.
#[no_mangle]
pub unsafe extern "C" fn fmi2SetRealInputDerivatives(
    c: fmi2Component,
    _vr: *const fmi2ValueReference,
    _nvr: usize,
    _order: *const fmi2Integer,
    _value: *const fmi2Real,
) -> fmi2Status {
    unsupported(
        c,
        "fmi2SetRealInputDerivatives",
        "the model description declares canInterpolateInputs=\"false\": inputs are held over a step",
    )
}

/// Not offered (`maxOutputDerivativeOrder="0"`).
///
/// # Safety
/// `c` is a live instance.
#[no_mangle]
pub unsafe extern "C" fn fmi2GetRealOutputDerivatives(
    c: fmi2Component,
    _vr: *const fmi2ValueReference,
    _nvr: usize,
    _order: *const fmi2Integer,
    _value: *mut fmi2Real,
) -> fmi2Status {
    unsupported(
        c,
        "fmi2GetRealOutputDerivatives",
        "the model description declares maxOutputDerivativeOrder=\"0\"",
    )
}

/// Integrate from `currentCommunicationPoint` over `communicationStepSize` with the inputs held.
///
/// # Safety
/// `c` is a live instance.
#[no_mangle]
pub unsafe extern "C" fn fmi2DoStep(
    c: fmi2Component,
    currentCommunicationPoint: fmi2Real,
    communicationStepSize: fmi2Real,
    _noSetFMUStatePriorToCurrentPoint: fmi2Boolean,
) -> fmi2Status {
    let (t, h) = (currentCommunicationPoint, communicationStepSize);
    entry(c, "fmi2DoStep", &[S::StepComplete], |inner, name| {
        do_step(inner, name, "fmi2DoStep", t, h).map(|()| fmi2OK)
    })
}

/// Integrate from `t` over `h` with the inputs held; raises the envelope flag on the way.
pub(crate) fn do_step(
    inner: &mut Inner,
    name: &CStr,
    call: &str,
    t: f64,
    h: f64,
) -> Result<(), String> {
    if !(h.is_finite() && h > 0.0) {
        return Err(format!(
            "communicationStepSize = {h}: expected a step > 0 s (a zero-length or negative step is not a step)"
        ));
    }
    if !t.is_finite() {
        return Err(format!(
            "currentCommunicationPoint = {t}: expected a finite time"
        ));
    }
    // the host's time may differ from ours by the rounding of t + h
    let tol = 1e-9 * t.abs().max(1.0);
    if (t - inner.time).abs() > tol {
        return Err(format!(
            "currentCommunicationPoint = {t} s but the FMU is at t = {} s (steps must follow each other)",
            inner.time
        ));
    }
    if !inner.latched_out_of_envelope && inner.outside_envelope() {
        inner.latched_out_of_envelope = true;
        inner.log(
            name,
            fmi2Warning,
            Category::Warning,
            &format!(
                "{call}: at t = {t} s the inputs |v| = {:.4} pu, f = {:.4} pu left the model's envelope \
                 (|v| in [{}, {}] pu, f in [{}, {}] pu): out_of_envelope is raised",
                inner.inputs.voltage().norm(),
                inner.inputs.f_grid,
                inner.file.envelope.u_min,
                inner.file.envelope.u_max,
                inner.file.envelope.f_min,
                inner.file.envelope.f_max
            ),
        );
    }
    let inputs = inner.inputs;
    inner
        .model
        .do_step(t, h, &inputs)
        .map_err(|e| e.to_string())?;
    inner.time = t + h;
    Ok(())
}

/// Steps are synchronous: there is never a step to cancel.
///
/// # Safety
/// `c` is a live instance.
#[no_mangle]
pub unsafe extern "C" fn fmi2CancelStep(c: fmi2Component) -> fmi2Status {
    unsupported(
        c,
        "fmi2CancelStep",
        "the model description declares canRunAsynchronuously=\"false\": no step is ever in progress",
    )
}

fn discard(inner: &Inner, name: &CStr, call: &str, kind: fmi2StatusKind) -> fmi2Status {
    inner.log(
        name,
        fmi2Discard,
        Category::Warning,
        &format!("{call}: status kind {kind} is not available (steps are synchronous)"),
    );
    fmi2Discard
}

/// # Safety
/// `c` is a live instance.
#[no_mangle]
pub unsafe extern "C" fn fmi2GetStatus(
    c: fmi2Component,
    s: fmi2StatusKind,
    _value: *mut fmi2Status,
) -> fmi2Status {
    entry(c, "fmi2GetStatus", STATUS_QUERY, |inner, name| {
        Ok(discard(inner, name, "fmi2GetStatus", s))
    })
}

/// `fmi2LastSuccessfulTime` is the time reached; other kinds are not available.
///
/// # Safety
/// `c` is a live instance; `value` is writable.
#[no_mangle]
pub unsafe extern "C" fn fmi2GetRealStatus(
    c: fmi2Component,
    s: fmi2StatusKind,
    value: *mut fmi2Real,
) -> fmi2Status {
    entry(c, "fmi2GetRealStatus", STATUS_QUERY, |inner, name| {
        if s != fmi2LastSuccessfulTime {
            return Ok(discard(inner, name, "fmi2GetRealStatus", s));
        }
        if value.is_null() {
            return Err("value is NULL".into());
        }
        *value = inner.time;
        Ok(fmi2OK)
    })
}

/// # Safety
/// `c` is a live instance.
#[no_mangle]
pub unsafe extern "C" fn fmi2GetIntegerStatus(
    c: fmi2Component,
    s: fmi2StatusKind,
    _value: *mut fmi2Integer,
) -> fmi2Status {
    entry(c, "fmi2GetIntegerStatus", STATUS_QUERY, |inner, name| {
        Ok(discard(inner, name, "fmi2GetIntegerStatus", s))
    })
}

/// `fmi2Terminated` is false (the model never asks to stop); other kinds are not available.
///
/// # Safety
/// `c` is a live instance; `value` is writable.
#[no_mangle]
pub unsafe extern "C" fn fmi2GetBooleanStatus(
    c: fmi2Component,
    s: fmi2StatusKind,
    value: *mut fmi2Boolean,
) -> fmi2Status {
    entry(c, "fmi2GetBooleanStatus", STATUS_QUERY, |inner, name| {
        if s != fmi2Terminated {
            return Ok(discard(inner, name, "fmi2GetBooleanStatus", s));
        }
        if value.is_null() {
            return Err("value is NULL".into());
        }
        *value = fmi2False;
        Ok(fmi2OK)
    })
}

/// # Safety
/// `c` is a live instance.
#[no_mangle]
pub unsafe extern "C" fn fmi2GetStringStatus(
    c: fmi2Component,
    s: fmi2StatusKind,
    _value: *mut fmi2String,
) -> fmi2Status {
    entry(c, "fmi2GetStringStatus", STATUS_QUERY, |inner, name| {
        Ok(discard(inner, name, "fmi2GetStringStatus", s))
    })
}

#[cfg(test)]
pub(crate) mod tests {
    use super::*;
    use std::path::Path;

    #[test]
    fn resource_uris_of_every_accepted_form_decode_to_the_same_path() {
        let want = Path::new("/tmp/my fmu/resources");
        for uri in [
            "file:///tmp/my%20fmu/resources",
            "file:/tmp/my%20fmu/resources",
            "file://localhost/tmp/my%20fmu/resources",
            "FILE:///tmp/my fmu/resources",
        ] {
            assert_eq!(resource_path(uri).unwrap(), want, "{uri}");
        }
        assert_eq!(
            resource_path("file:///a/%C3%A9t%C3%A9/").unwrap(),
            Path::new("/a/été/")
        );
        for bad in [
            "http://example.org/resources",
            "file://server/share/resources",
            "file:relative/path",
            "file:///bad%2",
            "file:///bad%zz",
            "/plain/path",
        ] {
            assert!(resource_path(bad).is_err(), "{bad} should be refused");
        }
    }

    /// The C header of one boundary, generated by cbindgen from `src/<module>.rs`.
    pub(crate) fn generated_header(module: &str, title: &str) -> String {
        let root = Path::new(env!("CARGO_MANIFEST_DIR"));
        let mut out = Vec::new();
        let config = cbindgen::Config {
            usize_is_size_t: true,
            ..Default::default()
        };
        let mut builder = cbindgen::Builder::new()
            .with_config(config)
            .with_src(root.join(format!("src/{module}.rs")))
            .with_language(cbindgen::Language::C)
            .with_include_guard(format!("UNDERSTUDY_{}_H", module.to_uppercase()))
            .with_header(format!(
                "/* The {title} entry points of understudy-runtime.\n * \
                 Generated by cbindgen from fmu-template/src/{module}.rs: do not edit; run\n * \
                 UNDERSTUDY_BLESS_HEADER=1 cargo test -p understudy-runtime --lib header to refresh. */"
            ))
            .with_no_includes()
            .with_sys_include("stddef.h")
            .with_sys_include("stdint.h");
        if module == "fmi3" {
            builder = builder.with_sys_include("stdbool.h");
        }
        builder
            .with_documentation(false)
            .generate()
            .unwrap_or_else(|e| panic!("cbindgen reads src/{module}.rs: {e}"))
            .write(&mut out);
        String::from_utf8(out).expect("cbindgen writes UTF-8")
    }

    /// Compare (or, with `UNDERSTUDY_BLESS_HEADER`, rewrite) `include/understudy_<module>.h`.
    pub(crate) fn check_header(module: &str, title: &str, functions: &[&str]) {
        let path =
            Path::new(env!("CARGO_MANIFEST_DIR")).join(format!("include/understudy_{module}.h"));
        let fresh = generated_header(module, title);
        if std::env::var_os("UNDERSTUDY_BLESS_HEADER").is_some() {
            std::fs::create_dir_all(path.parent().unwrap()).unwrap();
            std::fs::write(&path, &fresh).unwrap();
        }
        let committed = std::fs::read_to_string(&path).unwrap_or_default();
        assert!(
            committed == fresh,
            "{} is stale: regenerate it with UNDERSTUDY_BLESS_HEADER=1 cargo test -p understudy-runtime --lib header",
            path.display()
        );
        for f in functions {
            assert!(
                fresh.contains(&format!("{f}(")),
                "{f} missing from the header"
            );
        }
    }

    #[test]
    fn committed_header_is_fresh() {
        check_header("fmi2", "FMI 2.0 Co-Simulation", &EXPORTED_FUNCTIONS);
    }

    #[test]
    fn exported_function_list_has_34_distinct_names() {
        let mut names = EXPORTED_FUNCTIONS.to_vec();
        names.sort_unstable();
        names.dedup();
        assert_eq!(names.len(), 34);
    }
}

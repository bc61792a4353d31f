//! The FMI 3.0 C boundary (FMI 3.0 standard, Modelica Association: §2.3 common functions,
//! §4 Co-Simulation and its state machine; function shapes of the standard's
//! `fmi3FunctionTypes.h`).
//!
//! All 75 functions of the standard's header are exported. Co-Simulation is served; Model
//! Exchange and Scheduled Execution instantiation return NULL after logging why, and every
//! function whose capability the model description does not claim (event mode, clocks,
//! configuration mode, directional/adjoint derivatives, output derivatives, dependencies) or
//! that belongs to another interface type returns `fmi3Error` and logs why.
//!
//! One instance core serves both standards: these entry points run through the same guard
//! ([`crate::fmi2`]'s `entry`: null check, state machine, `catch_unwind`, logging) and the same
//! model code as the FMI 2.0 ones, so the two boundaries cannot drift apart. FMI 3.0's
//! `StepMode` is the core's `StepComplete`; FMI 2.0 and 3.0 number their statuses alike.
//!
//! Logging: `logMessage(instanceEnvironment, status, category, message)` with the message as
//! plain text; errors always, `logFmiCall` lines only while `loggingOn` and the category is
//! enabled by `fmi3SetDebugLogging` (no category list = all).

#![allow(non_snake_case, non_camel_case_types, non_upper_case_globals)]

use crate::fmi2::{
    self, arrays_ok, c_str, entry, get_booleans, get_reals, load_instance, no_variables, send_log,
    set_reals, unsupported, Category, Fmi2State as S, Host, ANY, GETTABLE, SETTABLE,
};
use std::ffi::{c_char, c_void, CStr, CString};
use std::panic::{catch_unwind, AssertUnwindSafe};
use std::path::PathBuf;

pub type fmi3Instance = *mut c_void;
pub type fmi3InstanceEnvironment = *mut c_void;
pub type fmi3FMUState = *mut c_void;
pub type fmi3ValueReference = u32;
pub type fmi3Float32 = f32;
pub type fmi3Float64 = f64;
pub type fmi3Int8 = i8;
pub type fmi3UInt8 = u8;
pub type fmi3Int16 = i16;
pub type fmi3UInt16 = u16;
pub type fmi3Int32 = i32;
pub type fmi3UInt32 = u32;
pub type fmi3Int64 = i64;
pub type fmi3UInt64 = u64;
pub type fmi3Boolean = bool;
pub type fmi3Char = c_char;
pub type fmi3String = *const fmi3Char;
pub type fmi3Byte = u8;
pub type fmi3Binary = *const fmi3Byte;
pub type fmi3Clock = bool;
/// The C enum `fmi3Status` (an `int`).
pub type fmi3Status = i32;
/// The C enum `fmi3DependencyKind`.
pub type fmi3DependencyKind = i32;
/// The C enum `fmi3IntervalQualifier`.
pub type fmi3IntervalQualifier = i32;

pub const fmi3OK: fmi3Status = 0;
pub const fmi3Warning: fmi3Status = 1;
pub const fmi3Discard: fmi3Status = 2;
pub const fmi3Error: fmi3Status = 3;
pub const fmi3Fatal: fmi3Status = 4;

/// `logMessage(instanceEnvironment, status, category, message)`.
pub type fmi3LogMessageCallback =
    Option<unsafe extern "C" fn(fmi3InstanceEnvironment, fmi3Status, fmi3String, fmi3String)>;
/// `intermediateUpdate(...)`: never called (no intermediate update is offered).
pub type fmi3IntermediateUpdateCallback = Option<
    unsafe extern "C" fn(
        fmi3InstanceEnvironment,
        fmi3Float64,
        fmi3Boolean,
        fmi3Boolean,
        fmi3Boolean,
        fmi3Boolean,
        *mut fmi3Boolean,
        *mut fmi3Float64,
    ),
>;
/// `clockUpdate(instanceEnvironment)`: never called.
pub type fmi3ClockUpdateCallback = Option<unsafe extern "C" fn(fmi3InstanceEnvironment)>;
/// `lockPreemption()` / `unlockPreemption()`: never called.
pub type fmi3LockPreemptionCallback = Option<unsafe extern "C" fn()>;
pub type fmi3UnlockPreemptionCallback = Option<unsafe extern "C" fn()>;

/// Capability flags of the FMI 3.0 `CoSimulation` element (attribute name, value), in the
/// order the exporter writes them. The runtime serves exactly these.
pub const CAPABILITIES: [(&str, &str); 10] = [
    ("needsExecutionTool", "false"),
    ("canBeInstantiatedOnlyOncePerProcess", "false"),
    ("canGetAndSetFMUState", "true"),
    ("canSerializeFMUState", "true"),
    ("providesDirectionalDerivatives", "false"),
    ("providesAdjointDerivatives", "false"),
    ("providesPerElementDependencies", "false"),
    ("canHandleVariableCommunicationStepSize", "true"),
    ("canReturnEarlyAfterIntermediateUpdate", "false"),
    ("hasEventMode", "false"),
];

/// Every function of the FMI 3.0 header, all exported by this library.
pub const EXPORTED_FUNCTIONS: [&str; 75] = [
    "fmi3GetVersion",
    "fmi3SetDebugLogging",
    "fmi3InstantiateModelExchange",
    "fmi3InstantiateCoSimulation",
    "fmi3InstantiateScheduledExecution",
    "fmi3FreeInstance",
    "fmi3EnterInitializationMode",
    "fmi3ExitInitializationMode",
    "fmi3EnterEventMode",
    "fmi3Terminate",
    "fmi3Reset",
    "fmi3GetFloat32",
    "fmi3GetFloat64",
    "fmi3GetInt8",
    "fmi3GetUInt8",
    "fmi3GetInt16",
    "fmi3GetUInt16",
    "fmi3GetInt32",
    "fmi3GetUInt32",
    "fmi3GetInt64",
    "fmi3GetUInt64",
    "fmi3GetBoolean",
    "fmi3GetString",
    "fmi3GetBinary",
    "fmi3GetClock",
    "fmi3SetFloat32",
    "fmi3SetFloat64",
    "fmi3SetInt8",
    "fmi3SetUInt8",
    "fmi3SetInt16",
    "fmi3SetUInt16",
    "fmi3SetInt32",
    "fmi3SetUInt32",
    "fmi3SetInt64",
    "fmi3SetUInt64",
    "fmi3SetBoolean",
    "fmi3SetString",
    "fmi3SetBinary",
    "fmi3SetClock",
    "fmi3GetNumberOfVariableDependencies",
    "fmi3GetVariableDependencies",
    "fmi3GetFMUState",
    "fmi3SetFMUState",
    "fmi3FreeFMUState",
    "fmi3SerializedFMUStateSize",
    "fmi3SerializeFMUState",
    "fmi3DeserializeFMUState",
    "fmi3GetDirectionalDerivative",
    "fmi3GetAdjointDerivative",
    "fmi3EnterConfigurationMode",
    "fmi3ExitConfigurationMode",
    "fmi3GetIntervalDecimal",
    "fmi3GetIntervalFraction",
    "fmi3GetShiftDecimal",
    "fmi3GetShiftFraction",
    "fmi3SetIntervalDecimal",
    "fmi3SetIntervalFraction",
    "fmi3SetShiftDecimal",
    "fmi3SetShiftFraction",
    "fmi3EvaluateDiscreteStates",
    "fmi3UpdateDiscreteStates",
    "fmi3EnterContinuousTimeMode",
    "fmi3CompletedIntegratorStep",
    "fmi3SetTime",
    "fmi3SetContinuousStates",
    "fmi3GetContinuousStateDerivatives",
    "fmi3GetEventIndicators",
    "fmi3GetContinuousStates",
    "fmi3GetNominalsOfContinuousStates",
    "fmi3GetNumberOfEventIndicators",
    "fmi3GetNumberOfContinuousStates",
    "fmi3EnterStepMode",
    "fmi3GetOutputDerivatives",
    "fmi3DoStep",
    "fmi3ActivateModelPartition",
];

/// Value reference of the independent variable `time` (FMI 3.0 requires one; it is not part
/// of the shared variable table because FMI 2.0 descriptions do not list it).
pub const TIME_VR: u32 = 12;

/// Why the event-mode functions are refused.
const NO_EVENT_MODE: &str =
    "the model description declares hasEventMode=\"false\": the FMU has no event mode";
const NO_CLOCKS: &str = "the model declares no clocks";
const NOT_MODEL_EXCHANGE: &str =
    "this FMU offers Co-Simulation only: Model Exchange functions are not available";

/// FMI 3.0 passes the resource folder as a native path ending in a separator; NULL when the
/// FMU has no resources (then there is no model to load).
fn resource_dir(path: fmi3String) -> Result<PathBuf, String> {
    // SAFETY: the host passes a NUL-terminated string or NULL (checked).
    let path = unsafe { c_str(path, "resourcePath") }
        .map_err(|e| format!("{e}: the model file lives in the FMU's resources folder"))?;
    if path.is_empty() {
        return Err("resourcePath is empty: expected the FMU's resources folder".into());
    }
    let dir = PathBuf::from(path);
    if !dir.is_absolute() {
        return Err(format!(
            "resourcePath `{path}` is not an absolute path (FMI 3.0 passes the native path of the resources folder)"
        ));
    }
    Ok(dir)
}

/// A name for log lines of a failed instantiation (the instance name if there is one).
unsafe fn log_name(instanceName: fmi3String) -> CString {
    if instanceName.is_null() {
        CString::default()
    } else {
        CStr::from_ptr(instanceName).to_owned()
    }
}

/// Instantiation that always fails with `why` (after logging it).
unsafe fn refuse_instantiation(
    call: &str,
    instanceName: fmi3String,
    instanceEnvironment: fmi3InstanceEnvironment,
    logMessage: fmi3LogMessageCallback,
    why: &str,
) -> fmi3Instance {
    let _ = catch_unwind(AssertUnwindSafe(|| {
        let host = Host::Fmi3 {
            logger: logMessage,
            environment: instanceEnvironment,
        };
        send_log(
            &host,
            &log_name(instanceName),
            fmi3Error,
            Category::Error,
            &format!("{call}: {why}"),
        );
    }));
    std::ptr::null_mut()
}

/// `"3.0"`.
#[no_mangle]
pub extern "C" fn fmi3GetVersion() -> *const c_char {
    c"3.0".as_ptr()
}

/// Switch debug logging and choose categories (none listed = all).
///
/// # Safety
/// `instance` is a live instance; `categories` holds `nCategories` NUL-terminated strings.
#[no_mangle]
pub unsafe extern "C" fn fmi3SetDebugLogging(
    instance: fmi3Instance,
    loggingOn: fmi3Boolean,
    nCategories: usize,
    categories: *const fmi3String,
) -> fmi3Status {
    entry(instance, "fmi3SetDebugLogging", ANY, |inner, name| {
        fmi2::set_debug_logging(
            inner,
            name,
            "fmi3SetDebugLogging",
            loggingOn,
            nCategories,
            categories,
        )
    })
}

/// Not offered: the FMU is Co-Simulation only. Returns NULL after logging why.
///
/// # Safety
/// `instanceName` is NULL or NUL-terminated; `logMessage` is NULL or a valid callback.
#[no_mangle]
pub unsafe extern "C" fn fmi3InstantiateModelExchange(
    instanceName: fmi3String,
    _instantiationToken: fmi3String,
    _resourcePath: fmi3String,
    _visible: fmi3Boolean,
    _loggingOn: fmi3Boolean,
    instanceEnvironment: fmi3InstanceEnvironment,
    logMessage: fmi3LogMessageCallback,
) -> fmi3Instance {
    refuse_instantiation(
        "fmi3InstantiateModelExchange",
        instanceName,
        instanceEnvironment,
        logMessage,
        "the model description has no ModelExchange element: this FMU offers Co-Simulation only",
    )
}

/// Create a Co-Simulation instance: reads `model.json` from `resourcePath` and checks the
/// instantiation token. Event mode, early return and intermediate variables are not offered.
/// Returns NULL (after logging why) on any failure.
///
/// # Safety
/// String arguments are NULL or NUL-terminated; `requiredIntermediateVariables` holds
/// `nRequiredIntermediateVariables` elements; callbacks are NULL or valid.
#[no_mangle]
pub unsafe extern "C" fn fmi3InstantiateCoSimulation(
    instanceName: fmi3String,
    instantiationToken: fmi3String,
    resourcePath: fmi3String,
    _visible: fmi3Boolean,
    loggingOn: fmi3Boolean,
    eventModeUsed: fmi3Boolean,
    _earlyReturnAllowed: fmi3Boolean,
    _requiredIntermediateVariables: *const fmi3ValueReference,
    nRequiredIntermediateVariables: usize,
    instanceEnvironment: fmi3InstanceEnvironment,
    logMessage: fmi3LogMessageCallback,
    _intermediateUpdate: fmi3IntermediateUpdateCallback,
) -> fmi3Instance {
    const CALL: &str = "fmi3InstantiateCoSimulation";
    let host = Host::Fmi3 {
        logger: logMessage,
        environment: instanceEnvironment,
    };
    let outcome = catch_unwind(AssertUnwindSafe(|| {
        let made = (|| {
            let name = c_str(instanceName, "instanceName")?;
            let token = c_str(instantiationToken, "instantiationToken")?;
            if eventModeUsed {
                return Err(format!("eventModeUsed = true: {NO_EVENT_MODE}"));
            }
            if nRequiredIntermediateVariables > 0 {
                return Err(format!(
                    "nRequiredIntermediateVariables = {nRequiredIntermediateVariables}: the FMU offers no intermediate variable access"
                ));
            }
            let dir = resource_dir(resourcePath)?;
            load_instance(name, token, "instantiationToken", &dir, host, loggingOn)
        })();
        match made {
            Ok(instance) => {
                {
                    let inner = instance.inner.lock().unwrap_or_else(|p| p.into_inner());
                    inner.log(
                        &instance.name,
                        fmi3OK,
                        Category::Call,
                        &format!("{CALL}: instantiation token {}", inner.guid),
                    );
                }
                Box::into_raw(instance) as fmi3Instance
            }
            Err(message) => {
                send_log(
                    &host,
                    &log_name(instanceName),
                    fmi3Error,
                    Category::Error,
                    &format!("{CALL}: {message}"),
                );
                std::ptr::null_mut()
            }
        }
    }));
    outcome.unwrap_or(std::ptr::null_mut())
}

/// Not offered: the FMU is Co-Simulation only. Returns NULL after logging why.
///
/// # Safety
/// `instanceName` is NULL or NUL-terminated; `logMessage` is NULL or a valid callback.
#[no_mangle]
pub unsafe extern "C" fn fmi3InstantiateScheduledExecution(
    instanceName: fmi3String,
    _instantiationToken: fmi3String,
    _resourcePath: fmi3String,
    _visible: fmi3Boolean,
    _loggingOn: fmi3Boolean,
    instanceEnvironment: fmi3InstanceEnvironment,
    logMessage: fmi3LogMessageCallback,
    _clockUpdate: fmi3ClockUpdateCallback,
    _lockPreemption: fmi3LockPreemptionCallback,
    _unlockPreemption: fmi3UnlockPreemptionCallback,
) -> fmi3Instance {
    refuse_instantiation(
        "fmi3InstantiateScheduledExecution",
        instanceName,
        instanceEnvironment,
        logMessage,
        "the model description has no ScheduledExecution element: this FMU offers Co-Simulation only",
    )
}

/// Free an instance (NULL is ignored).
///
/// # Safety
/// `instance` is NULL or an instance not yet freed; no other call on it runs.
#[no_mangle]
pub unsafe extern "C" fn fmi3FreeInstance(instance: fmi3Instance) {
    fmi2::free_instance(instance, "fmi3FreeInstance")
}

/// Record the start time and enter initialisation mode (the tolerance and stop time are not
/// used: the model integrates with its own fixed method and may run any length).
///
/// # Safety
/// `instance` is a live instance.
#[no_mangle]
pub unsafe extern "C" fn fmi3EnterInitializationMode(
    instance: fmi3Instance,
    _toleranceDefined: fmi3Boolean,
    _tolerance: fmi3Float64,
    startTime: fmi3Float64,
    _stopTimeDefined: fmi3Boolean,
    _stopTime: fmi3Float64,
) -> fmi3Status {
    entry(
        instance,
        "fmi3EnterInitializationMode",
        &[S::Instantiated],
        |inner, _| {
            if !startTime.is_finite() {
                return Err(format!(
                    "startTime = {startTime}: expected a finite time (s)"
                ));
            }
            inner.start_time = startTime;
            inner.time = startTime;
            inner.state = S::InitializationMode;
            Ok(fmi3OK)
        },
    )
}

/// Initialise the model at the steady state of the current inputs and setpoints; the
/// instance enters step mode (no event mode is offered).
///
/// # Safety
/// `instance` is a live instance.
#[no_mangle]
pub unsafe extern "C" fn fmi3ExitInitializationMode(instance: fmi3Instance) -> fmi3Status {
    entry(
        instance,
        "fmi3ExitInitializationMode",
        &[S::InitializationMode],
        |inner, name| fmi2::exit_initialisation(inner, name).map(|()| fmi3OK),
    )
}

/// Not offered (`hasEventMode="false"`).
///
/// # Safety
/// `instance` is a live instance.
#[no_mangle]
pub unsafe extern "C" fn fmi3EnterEventMode(instance: fmi3Instance) -> fmi3Status {
    unsupported(instance, "fmi3EnterEventMode", NO_EVENT_MODE)
}

/// # Safety
/// `instance` is a live instance.
#[no_mangle]
pub unsafe extern "C" fn fmi3Terminate(instance: fmi3Instance) -> fmi3Status {
    entry(
        instance,
        "fmi3Terminate",
        &[S::StepComplete, S::StepFailed],
        |inner, _| {
            inner.state = S::Terminated;
            Ok(fmi3OK)
        },
    )
}

/// Back to the instantiated state with the model file's start values.
///
/// # Safety
/// `instance` is a live instance.
#[no_mangle]
pub unsafe extern "C" fn fmi3Reset(instance: fmi3Instance) -> fmi3Status {
    entry(instance, "fmi3Reset", ANY, |inner, _| {
        inner.reset_to_start()?;
        Ok(fmi3OK)
    })
}

/// Scalar variables only: one value per value reference.
fn scalar_count(nValueReferences: usize, nValues: usize) -> Result<(), String> {
    if nValues != nValueReferences {
        return Err(format!(
            "nValues = {nValues} but nValueReferences = {nValueReferences}: every variable of this FMU is a scalar"
        ));
    }
    Ok(())
}

/// A typed get/set of a type the model has no variable of.
#[allow(clippy::too_many_arguments)]
unsafe fn no_values<T>(
    instance: fmi3Instance,
    call: &'static str,
    allowed: &[S],
    ty: &str,
    valueReferences: *const fmi3ValueReference,
    nValueReferences: usize,
    values: *const T,
    nValues: usize,
) -> fmi3Status {
    entry(instance, call, allowed, |_, _| {
        arrays_ok(nValueReferences, valueReferences, values)?;
        scalar_count(nValueReferences, nValues)?;
        no_variables(nValueReferences, valueReferences, ty)
    })
}

/// # Safety
/// `instance` is a live instance; `valueReferences` and `values` hold `nValueReferences`
/// elements.
#[no_mangle]
pub unsafe extern "C" fn fmi3GetFloat64(
    instance: fmi3Instance,
    valueReferences: *const fmi3ValueReference,
    nValueReferences: usize,
    values: *mut fmi3Float64,
    nValues: usize,
) -> fmi3Status {
    entry(instance, "fmi3GetFloat64", GETTABLE, |inner, _| {
        arrays_ok(nValueReferences, valueReferences, values)?;
        scalar_count(nValueReferences, nValues)?;
        get_reals(
            inner,
            valueReferences,
            nValueReferences,
            values,
            Some(TIME_VR),
        )
        .map(|()| fmi3OK)
    })
}

/// Set inputs (any settable state) and parameters (before initialisation ends); every value
/// is checked before any is applied.
///
/// # Safety
/// `instance` is a live instance; `valueReferences` and `values` hold `nValueReferences`
/// elements.
#[no_mangle]
pub unsafe extern "C" fn fmi3SetFloat64(
    instance: fmi3Instance,
    valueReferences: *const fmi3ValueReference,
    nValueReferences: usize,
    values: *const fmi3Float64,
    nValues: usize,
) -> fmi3Status {
    entry(instance, "fmi3SetFloat64", SETTABLE, |inner, _| {
        arrays_ok(nValueReferences, valueReferences, values)?;
        scalar_count(nValueReferences, nValues)?;
        set_reals(inner, valueReferences, nValueReferences, values).map(|()| fmi3OK)
    })
}

/// The envelope flag.
///
/// # Safety
/// `instance` is a live instance; `valueReferences` and `values` hold `nValueReferences`
/// elements.
#[no_mangle]
pub unsafe extern "C" fn fmi3GetBoolean(
    instance: fmi3Instance,
    valueReferences: *const fmi3ValueReference,
    nValueReferences: usize,
    values: *mut fmi3Boolean,
    nValues: usize,
) -> fmi3Status {
    entry(instance, "fmi3GetBoolean", GETTABLE, |inner, _| {
        arrays_ok(nValueReferences, valueReferences, values)?;
        scalar_count(nValueReferences, nValues)?;
        get_booleans(inner, valueReferences, nValueReferences, |k, b| {
            *values.add(k) = b
        })
        .map(|()| fmi3OK)
    })
}

/// The only Boolean variable is an output: setting any is an error.
///
/// # Safety
/// `instance` is a live instance; `valueReferences` and `values` hold `nValueReferences`
/// elements.
#[no_mangle]
pub unsafe extern "C" fn fmi3SetBoolean(
    instance: fmi3Instance,
    valueReferences: *const fmi3ValueReference,
    nValueReferences: usize,
    values: *const fmi3Boolean,
    nValues: usize,
) -> fmi3Status {
    entry(instance, "fmi3SetBoolean", SETTABLE, |_, _| {
        arrays_ok(nValueReferences, valueReferences, values)?;
        scalar_count(nValueReferences, nValues)?;
        fmi2::refuse_boolean_set(valueReferences, nValueReferences).map(|()| fmi3OK)
    })
}

/// There are no Float32 variables: any value reference is an error.
///
/// # Safety
/// `instance` is a live instance; `valueReferences` holds `nValueReferences` elements.
#[no_mangle]
pub unsafe extern "C" fn fmi3GetFloat32(
    instance: fmi3Instance,
    valueReferences: *const fmi3ValueReference,
    nValueReferences: usize,
    values: *mut fmi3Float32,
    nValues: usize,
) -> fmi3Status {
    no_values(
        instance,
        "fmi3GetFloat32",
        GETTABLE,
        "Float32",
        valueReferences,
        nValueReferences,
        values,
        nValues,
    )
}

/// There are no Float32 variables: any value reference is an error.
///
/// # Safety
/// `instance` is a live instance; `valueReferences` holds `nValueReferences` elements.
#[no_mangle]
pub unsafe extern "C" fn fmi3SetFloat32(
    instance: fmi3Instance,
    valueReferences: *const fmi3ValueReference,
    nValueReferences: usize,
    values: *const fmi3Float32,
    nValues: usize,
) -> fmi3Status {
    no_values(
        instance,
        "fmi3SetFloat32",
        SETTABLE,
        "Float32",
        valueReferences,
        nValueReferences,
        values,
        nValues,
    )
}

/// There are no Int8 variables: any value reference is an error.
///
/// # Safety
/// `instance` is a live instance; `valueReferences` holds `nValueReferences` elements.
#[no_mangle]
pub unsafe extern "C" fn fmi3GetInt8(
    instance: fmi3Instance,
    valueReferences: *const fmi3ValueReference,
    nValueReferences: usize,
    values: *mut fmi3Int8,
    nValues: usize,
) -> fmi3Status {
    no_values(
        instance,
        "fmi3GetInt8",
        GETTABLE,
        "Int8",
        valueReferences,
        nValueReferences,
        values,
        nValues,
    )
}

/// There are no Int8 variables: any value reference is an error.
///
/// # Safety
/// `instance` is a live instance; `valueReferences` holds `nValueReferences` elements.
#[no_mangle]
pub unsafe extern "C" fn fmi3SetInt8(
    instance: fmi3Instance,
    valueReferences: *const fmi3ValueReference,
    nValueReferences: usize,
    values: *const fmi3Int8,
    nValues: usize,
) -> fmi3Status {
    no_values(
        instance,
        "fmi3SetInt8",
        SETTABLE,
        "Int8",
        valueReferences,
        nValueReferences,
        values,
        nValues,
    )
}

/// There are no UInt8 variables: any value reference is an error.
///
/// # Safety
/// `instance` is a live instance; `valueReferences` holds `nValueReferences` elements.
#[no_mangle]
pub unsafe extern "C" fn fmi3GetUInt8(
    instance: fmi3Instance,
    valueReferences: *const fmi3ValueReference,
    nValueReferences: usize,
    values: *mut fmi3UInt8,
    nValues: usize,
) -> fmi3Status {
    no_values(
        instance,
        "fmi3GetUInt8",
        GETTABLE,
        "UInt8",
        valueReferences,
        nValueReferences,
        values,
        nValues,
    )
}

/// There are no UInt8 variables: any value reference is an error.
///
/// # Safety
/// `instance` is a live instance; `valueReferences` holds `nValueReferences` elements.
#[no_mangle]
pub unsafe extern "C" fn fmi3SetUInt8(
    instance: fmi3Instance,
    valueReferences: *const fmi3ValueReference,
    nValueReferences: usize,
    values: *const fmi3UInt8,
    nValues: usize,
) -> fmi3Status {
    no_values(
        instance,
        "fmi3SetUInt8",
        SETTABLE,
        "UInt8",
        valueReferences,
        nValueReferences,
        values,
        nValues,
    )
}

/// There are no Int16 variables: any value reference is an error.
///
/// # Safety
/// `instance` is a live instance; `valueReferences` holds `nValueReferences` elements.
#[no_mangle]
pub unsafe extern "C" fn fmi3GetInt16(
    instance: fmi3Instance,
    valueReferences: *const fmi3ValueReference,
    nValueReferences: usize,
    values: *mut fmi3Int16,
    nValues: usize,
) -> fmi3Status {
    no_values(
        instance,
        "fmi3GetInt16",
        GETTABLE,
        "Int16",
        valueReferences,
        nValueReferences,
        values,
        nValues,
    )
}

/// There are no Int16 variables: any value reference is an error.
///
/// # Safety
/// `instance` is a live instance; `valueReferences` holds `nValueReferences` elements.
#[no_mangle]
pub unsafe extern "C" fn fmi3SetInt16(
    instance: fmi3Instance,
    valueReferences: *const fmi3ValueReference,
    nValueReferences: usize,
    values: *const fmi3Int16,
    nValues: usize,
) -> fmi3Status {
    no_values(
        instance,
        "fmi3SetInt16",
        SETTABLE,
        "Int16",
        valueReferences,
        nValueReferences,
        values,
        nValues,
    )
}

/// There are no UInt16 variables: any value reference is an error.
///
/// # Safety
/// `instance` is a live instance; `valueReferences` holds `nValueReferences` elements.
#[no_mangle]
pub unsafe extern "C" fn fmi3GetUInt16(
    instance: fmi3Instance,
    valueReferences: *const fmi3ValueReference,
    nValueReferences: usize,
    values: *mut fmi3UInt16,
    nValues: usize,
) -> fmi3Status {
    no_values(
        instance,
        "fmi3GetUInt16",
        GETTABLE,
        "UInt16",
        valueReferences,
        nValueReferences,
        values,
        nValues,
    )
}

/// There are no UInt16 variables: any value reference is an error.
///
/// # Safety
/// `instance` is a live instance; `valueReferences` holds `nValueReferences` elements.
#[no_mangle]
pub unsafe extern "C" fn fmi3SetUInt16(
    instance: fmi3Instance,
    valueReferences: *const fmi3ValueReference,
    nValueReferences: usize,
    values: *const fmi3UInt16,
    nValues: usize,
) -> fmi3Status {
    no_values(
        instance,
        "fmi3SetUInt16",
        SETTABLE,
        "UInt16",
        valueReferences,
        nValueReferences,
        values,
        nValues,
    )
}

/// There are no Int32 variables: any value reference is an error.
///
/// # Safety
/// `instance` is a live instance; `valueReferences` holds `nValueReferences` elements.
#[no_mangle]
pub unsafe extern "C" fn fmi3GetInt32(
    instance: fmi3Instance,
    valueReferences: *const fmi3ValueReference,
    nValueReferences: usize,
    values: *mut fmi3Int32,
    nValues: usize,
) -> fmi3Status {
    no_values(
        instance,
        "fmi3GetInt32",
        GETTABLE,
        "Int32",
        valueReferences,
        nValueReferences,
        values,
        nValues,
    )
}

/// There are no Int32 variables: any value reference is an error.
///
/// # Safety
/// `instance` is a live instance; `valueReferences` holds `nValueReferences` elements.
#[no_mangle]
pub unsafe extern "C" fn fmi3SetInt32(
    instance: fmi3Instance,
    valueReferences: *const fmi3ValueReference,
    nValueReferences: usize,
    values: *const fmi3Int32,
    nValues: usize,
) -> fmi3Status {
    no_values(
        instance,
        "fmi3SetInt32",
        SETTABLE,
        "Int32",
        valueReferences,
        nValueReferences,
        values,
        nValues,
    )
}

/// There are no UInt32 variables: any value reference is an error.
///
/// # Safety
/// `instance` is a live instance; `valueReferences` holds `nValueReferences` elements.
#[no_mangle]
pub unsafe extern "C" fn fmi3GetUInt32(
    instance: fmi3Instance,
    valueReferences: *const fmi3ValueReference,
    nValueReferences: usize,
    values: *mut fmi3UInt32,
    nValues: usize,
) -> fmi3Status {
    no_values(
        instance,
        "fmi3GetUInt32",
        GETTABLE,
        "UInt32",
        valueReferences,
        nValueReferences,
        values,
        nValues,
    )
}

/// There are no UInt32 variables: any value reference is an error.
///
/// # Safety
/// `instance` is a live instance; `valueReferences` holds `nValueReferences` elements.
#[no_mangle]
pub unsafe extern "C" fn fmi3SetUInt32(
    instance: fmi3Instance,
    valueReferences: *const fmi3ValueReference,
    nValueReferences: usize,
    values: *const fmi3UInt32,
    nValues: usize,
) -> fmi3Status {
    no_values(
        instance,
        "fmi3SetUInt32",
        SETTABLE,
        "UInt32",
        valueReferences,
        nValueReferences,
        values,
        nValues,
    )
}

/// There are no Int64 variables: any value reference is an error.
///
/// # Safety
/// `instance` is a live instance; `valueReferences` holds `nValueReferences` elements.
#[no_mangle]
pub unsafe extern "C" fn fmi3GetInt64(
    instance: fmi3Instance,
    valueReferences: *const fmi3ValueReference,
    nValueReferences: usize,
    values: *mut fmi3Int64,
    nValues: usize,
) -> fmi3Status {
    no_values(
        instance,
        "fmi3GetInt64",
        GETTABLE,
        "Int64",
        valueReferences,
        nValueReferences,
        values,
        nValues,
    )
}

/// There are no Int64 variables: any value reference is an error.
///
/// # Safety
/// `instance` is a live instance; `valueReferences` holds `nValueReferences` elements.
#[no_mangle]
pub unsafe extern "C" fn fmi3SetInt64(
    instance: fmi3Instance,
    valueReferences: *const fmi3ValueReference,
    nValueReferences: usize,
    values: *const fmi3Int64,
    nValues: usize,
) -> fmi3Status {
    no_values(
        instance,
        "fmi3SetInt64",
        SETTABLE,
        "Int64",
        valueReferences,
        nValueReferences,
        values,
        nValues,
    )
}

/// There are no UInt64 variables: any value reference is an error.
///
/// # Safety
/// `instance` is a live instance; `valueReferences` holds `nValueReferences` elements.
#[no_mangle]
pub unsafe extern "C" fn fmi3GetUInt64(
    instance: fmi3Instance,
    valueReferences: *const fmi3ValueReference,
    nValueReferences: usize,
    values: *mut fmi3UInt64,
    nValues: usize,
) -> fmi3Status {
    no_values(
        instance,
        "fmi3GetUInt64",
        GETTABLE,
        "UInt64",
        valueReferences,
        nValueReferences,
        values,
        nValues,
    )
}

/// There are no UInt64 variables: any value reference is an error.
///
/// # Safety
/// `instance` is a live instance; `valueReferences` holds `nValueReferences` elements.
#[no_mangle]
pub unsafe extern "C" fn fmi3SetUInt64(
    instance: fmi3Instance,
    valueReferences: *const fmi3ValueReference,
    nValueReferences: usize,
    values: *const fmi3UInt64,
    nValues: usize,
) -> fmi3Status {
    no_values(
        instance,
        "fmi3SetUInt64",
        SETTABLE,
        "UInt64",
        valueReferences,
        nValueReferences,
        values,
        nValues,
    )
}

/// There are no String variables: any value reference is an error.
///
/// # Safety
/// `instance` is a live instance; `valueReferences` holds `nValueReferences` elements.
#[no_mangle]
pub unsafe extern "C" fn fmi3GetString(
    instance: fmi3Instance,
    valueReferences: *const fmi3ValueReference,
    nValueReferences: usize,
    values: *mut fmi3String,
    nValues: usize,
) -> fmi3Status {
    no_values(
        instance,
        "fmi3GetString",
        GETTABLE,
        "String",
        valueReferences,
        nValueReferences,
        values,
        nValues,
    )
}

/// There are no String variables: any value reference is an error.
///
/// # Safety
/// `instance` is a live instance; `valueReferences` holds `nValueReferences` elements.
#[no_mangle]
pub unsafe extern "C" fn fmi3SetString(
    instance: fmi3Instance,
    valueReferences: *const fmi3ValueReference,
    nValueReferences: usize,
    values: *const fmi3String,
    nValues: usize,
) -> fmi3Status {
    no_values(
        instance,
        "fmi3SetString",
        SETTABLE,
        "String",
        valueReferences,
        nValueReferences,
        values,
        nValues,
    )
}

/// There are no Binary variables.
///
/// # Safety
/// `instance` is a live instance; arrays hold `nValueReferences` elements.
#[no_mangle]
pub unsafe extern "C" fn fmi3GetBinary(
    instance: fmi3Instance,
    valueReferences: *const fmi3ValueReference,
    nValueReferences: usize,
    _valueSizes: *mut usize,
    values: *mut fmi3Binary,
    nValues: usize,
) -> fmi3Status {
    no_values(
        instance,
        "fmi3GetBinary",
        GETTABLE,
        "Binary",
        valueReferences,
        nValueReferences,
        values,
        nValues,
    )
}

/// There are no Binary variables.
///
/// # Safety
/// `instance` is a live instance; arrays hold `nValueReferences` elements.
#[no_mangle]
pub unsafe extern "C" fn fmi3SetBinary(
    instance: fmi3Instance,
    valueReferences: *const fmi3ValueReference,
    nValueReferences: usize,
    _valueSizes: *const usize,
    values: *const fmi3Binary,
    nValues: usize,
) -> fmi3Status {
    no_values(
        instance,
        "fmi3SetBinary",
        SETTABLE,
        "Binary",
        valueReferences,
        nValueReferences,
        values,
        nValues,
    )
}

/// No clocks.
///
/// # Safety
/// `instance` is a live instance.
#[no_mangle]
pub unsafe extern "C" fn fmi3GetClock(
    instance: fmi3Instance,
    _valueReferences: *const fmi3ValueReference,
    _nValueReferences: usize,
    _values: *mut fmi3Clock,
) -> fmi3Status {
    unsupported(instance, "fmi3GetClock", NO_CLOCKS)
}

/// No clocks.
///
/// # Safety
/// `instance` is a live instance.
#[no_mangle]
pub unsafe extern "C" fn fmi3SetClock(
    instance: fmi3Instance,
    _valueReferences: *const fmi3ValueReference,
    _nValueReferences: usize,
    _values: *const fmi3Clock,
) -> fmi3Status {
    unsupported(instance, "fmi3SetClock", NO_CLOCKS)
}

const NO_DEPENDENCIES: &str = "the ModelStructure declares no dependencies (every output may depend on every input and parameter)";

/// Not offered: dependencies are not declared.
///
/// # Safety
/// `instance` is a live instance.
#[no_mangle]
pub unsafe extern "C" fn fmi3GetNumberOfVariableDependencies(
    instance: fmi3Instance,
    _valueReference: fmi3ValueReference,
    _nDependencies: *mut usize,
) -> fmi3Status {
    unsupported(
        instance,
        "fmi3GetNumberOfVariableDependencies",
        NO_DEPENDENCIES,
    )
}

/// Not offered: dependencies are not declared.
///
/// # Safety
/// `instance` is a live instance.
#[no_mangle]
pub unsafe extern "C" fn fmi3GetVariableDependencies(
    instance: fmi3Instance,
    _dependent: fmi3ValueReference,
    _elementIndicesOfDependent: *mut usize,
    _independents: *mut fmi3ValueReference,
    _elementIndicesOfIndependents: *mut usize,
    _dependencyKinds: *mut fmi3DependencyKind,
    _nDependencies: usize,
) -> fmi3Status {
    unsupported(instance, "fmi3GetVariableDependencies", NO_DEPENDENCIES)
}

/// Copy the instance's state; `*FMUState` NULL allocates, non-NULL overwrites that state.
///
/// # Safety
/// `instance` is a live instance; `FMUState` points to NULL or to a state of this FMU.
#[no_mangle]
pub unsafe extern "C" fn fmi3GetFMUState(
    instance: fmi3Instance,
    FMUState: *mut fmi3FMUState,
) -> fmi3Status {
    entry(instance, "fmi3GetFMUState", ANY, |inner, _| {
        fmi2::get_state(inner, FMUState).map(|()| fmi3OK)
    })
}

/// Make a copied state the instance's state again.
///
/// # Safety
/// `instance` is a live instance; `FMUState` is a state of this FMU.
#[no_mangle]
pub unsafe extern "C" fn fmi3SetFMUState(
    instance: fmi3Instance,
    FMUState: fmi3FMUState,
) -> fmi3Status {
    entry(instance, "fmi3SetFMUState", ANY, |inner, _| {
        fmi2::set_state(inner, FMUState).map(|()| fmi3OK)
    })
}

/// Free a copied state and set `*FMUState` to NULL (NULL is ignored).
///
/// # Safety
/// `instance` is a live instance; `FMUState` is NULL or points to NULL or to a state of this
/// FMU.
#[no_mangle]
pub unsafe extern "C" fn fmi3FreeFMUState(
    instance: fmi3Instance,
    FMUState: *mut fmi3FMUState,
) -> fmi3Status {
    entry(instance, "fmi3FreeFMUState", ANY, |_, _| {
        fmi2::free_state(FMUState).map(|()| fmi3OK)
    })
}

/// # Safety
/// `instance` is a live instance; `FMUState` is a state of this FMU; `size` is writable.
#[no_mangle]
pub unsafe extern "C" fn fmi3SerializedFMUStateSize(
    instance: fmi3Instance,
    FMUState: fmi3FMUState,
    size: *mut usize,
) -> fmi3Status {
    entry(instance, "fmi3SerializedFMUStateSize", ANY, |_, _| {
        fmi2::state_size(FMUState, size).map(|()| fmi3OK)
    })
}

/// # Safety
/// `instance` is a live instance; `FMUState` is a state of this FMU; `serializedState` holds
/// `size` bytes.
#[no_mangle]
pub unsafe extern "C" fn fmi3SerializeFMUState(
    instance: fmi3Instance,
    FMUState: fmi3FMUState,
    serializedState: *mut fmi3Byte,
    size: usize,
) -> fmi3Status {
    entry(instance, "fmi3SerializeFMUState", ANY, |_, _| {
        fmi2::serialize_state(FMUState, serializedState, size).map(|()| fmi3OK)
    })
}

/// Read a serialised state into a new `*FMUState`.
///
/// # Safety
/// `instance` is a live instance; `serializedState` holds `size` bytes; `FMUState` is
/// writable.
#[no_mangle]
pub unsafe extern "C" fn fmi3DeserializeFMUState(
    instance: fmi3Instance,
    serializedState: *const fmi3Byte,
    size: usize,
    FMUState: *mut fmi3FMUState,
) -> fmi3Status {
    entry(instance, "fmi3DeserializeFMUState", ANY, |inner, _| {
        fmi2::deserialize_state(inner, serializedState, size, FMUState).map(|()| fmi3OK)
    })
}

/// Not offered (`providesDirectionalDerivatives="false"`).
///
/// # Safety
/// `instance` is a live instance.
#[no_mangle]
pub unsafe extern "C" fn fmi3GetDirectionalDerivative(
    instance: fmi3Instance,
    _unknowns: *const fmi3ValueReference,
    _nUnknowns: usize,
    _knowns: *const fmi3ValueReference,
    _nKnowns: usize,
    _seed: *const fmi3Float64,
    _nSeed: usize,
    _sensitivity: *mut fmi3Float64,
    _nSensitivity: usize,
) -> fmi3Status {
    unsupported(
        instance,
        "fmi3GetDirectionalDerivative",
        "the model description declares providesDirectionalDerivatives=\"false\"",
    )
}

/// Not offered (`providesAdjointDerivatives="false"`).
///
/// # Safety
/// `instance` is a live instance.
#[no_mangle]
pub unsafe extern "C" fn fmi3GetAdjointDerivative(
    instance: fmi3Instance,
    _unknowns: *const fmi3ValueReference,
    _nUnknowns: usize,
    _knowns: *const fmi3ValueReference,
    _nKnowns: usize,
    _seed: *const fmi3Float64,
    _nSeed: usize,
    _sensitivity: *mut fmi3Float64,
    _nSensitivity: usize,
) -> fmi3Status {
    unsupported(
        instance,
        "fmi3GetAdjointDerivative",
        "the model description declares providesAdjointDerivatives=\"false\"",
    )
}

const NO_STRUCTURAL_PARAMETERS: &str =
    "the model has no structural parameters: there is no configuration mode";

/// Not offered (no structural parameters).
///
/// # Safety
/// `instance` is a live instance.
#[no_mangle]
pub unsafe extern "C" fn fmi3EnterConfigurationMode(instance: fmi3Instance) -> fmi3Status {
    unsupported(
        instance,
        "fmi3EnterConfigurationMode",
        NO_STRUCTURAL_PARAMETERS,
    )
}

/// Not offered (no structural parameters).
///
/// # Safety
/// `instance` is a live instance.
#[no_mangle]
pub unsafe extern "C" fn fmi3ExitConfigurationMode(instance: fmi3Instance) -> fmi3Status {
    unsupported(
        instance,
        "fmi3ExitConfigurationMode",
        NO_STRUCTURAL_PARAMETERS,
    )
}

/// No clocks.
///
/// # Safety
/// `instance` is a live instance.
#[no_mangle]
pub unsafe extern "C" fn fmi3GetIntervalDecimal(
    instance: fmi3Instance,
    _valueReferences: *const fmi3ValueReference,
    _nValueReferences: usize,
    _intervals: *mut fmi3Float64,
    _qualifiers: *mut fmi3IntervalQualifier,
) -> fmi3Status {
    unsupported(instance, "fmi3GetIntervalDecimal", NO_CLOCKS)
}

/// No clocks.
///
/// # Safety
/// `instance` is a live instance.
#[no_mangle]
pub unsafe extern "C" fn fmi3GetIntervalFraction(
    instance: fmi3Instance,
    _valueReferences: *const fmi3ValueReference,
    _nValueReferences: usize,
    _counters: *mut fmi3UInt64,
    _resolutions: *mut fmi3UInt64,
    _qualifiers: *mut fmi3IntervalQualifier,
) -> fmi3Status {
    unsupported(instance, "fmi3GetIntervalFraction", NO_CLOCKS)
}

/// No clocks.
///
/// # Safety
/// `instance` is a live instance.
#[no_mangle]
pub unsafe extern "C" fn fmi3GetShiftDecimal(
    instance: fmi3Instance,
    _valueReferences: *const fmi3ValueReference,
    _nValueReferences: usize,
    _shifts: *mut fmi3Float64,
) -> fmi3Status {
    unsupported(instance, "fmi3GetShiftDecimal", NO_CLOCKS)
}

/// No clocks.
///
/// # Safety
/// `instance` is a live instance.
#[no_mangle]
pub unsafe extern "C" fn fmi3GetShiftFraction(
    instance: fmi3Instance,
    _valueReferences: *const fmi3ValueReference,
    _nValueReferences: usize,
    _counters: *mut fmi3UInt64,
    _resolutions: *mut fmi3UInt64,
) -> fmi3Status {
    unsupported(instance, "fmi3GetShiftFraction", NO_CLOCKS)
}

/// No clocks.
///
/// # Safety
/// `instance` is a live instance.
#[no_mangle]
pub unsafe extern "C" fn fmi3SetIntervalDecimal(
    instance: fmi3Instance,
    _valueReferences: *const fmi3ValueReference,
    _nValueReferences: usize,
    _intervals: *const fmi3Float64,
) -> fmi3Status {
    unsupported(instance, "fmi3SetIntervalDecimal", NO_CLOCKS)
}

/// No clocks.
///
/// # Safety
/// `instance` is a live instance.
#[no_mangle]
pub unsafe extern "C" fn fmi3SetIntervalFraction(
    instance: fmi3Instance,
    _valueReferences: *const fmi3ValueReference,
    _nValueReferences: usize,
    _counters: *const fmi3UInt64,
    _resolutions: *const fmi3UInt64,
) -> fmi3Status {
    unsupported(instance, "fmi3SetIntervalFraction", NO_CLOCKS)
}

/// No clocks.
///
/// # Safety
/// `instance` is a live instance.
#[no_mangle]
pub unsafe extern "C" fn fmi3SetShiftDecimal(
    instance: fmi3Instance,
    _valueReferences: *const fmi3ValueReference,
    _nValueReferences: usize,
    _shifts: *const fmi3Float64,
) -> fmi3Status {
    unsupported(instance, "fmi3SetShiftDecimal", NO_CLOCKS)
}

/// No clocks.
///
/// # Safety
/// `instance` is a live instance.
#[no_mangle]
pub unsafe extern "C" fn fmi3SetShiftFraction(
    instance: fmi3Instance,
    _valueReferences: *const fmi3ValueReference,
    _nValueReferences: usize,
    _counters: *const fmi3UInt64,
    _resolutions: *const fmi3UInt64,
) -> fmi3Status {
    unsupported(instance, "fmi3SetShiftFraction", NO_CLOCKS)
}

/// Not offered (no event mode, no discrete states of the host's concern).
///
/// # Safety
/// `instance` is a live instance.
#[no_mangle]
pub unsafe extern "C" fn fmi3EvaluateDiscreteStates(instance: fmi3Instance) -> fmi3Status {
    unsupported(instance, "fmi3EvaluateDiscreteStates", NO_EVENT_MODE)
}

/// Not offered (no event mode).
///
/// # Safety
/// `instance` is a live instance.
#[no_mangle]
pub unsafe extern "C" fn fmi3UpdateDiscreteStates(
    instance: fmi3Instance,
    _discreteStatesNeedUpdate: *mut fmi3Boolean,
    _terminateSimulation: *mut fmi3Boolean,
    _nominalsOfContinuousStatesChanged: *mut fmi3Boolean,
    _valuesOfContinuousStatesChanged: *mut fmi3Boolean,
    _nextEventTimeDefined: *mut fmi3Boolean,
    _nextEventTime: *mut fmi3Float64,
) -> fmi3Status {
    unsupported(instance, "fmi3UpdateDiscreteStates", NO_EVENT_MODE)
}

/// Model Exchange only.
///
/// # Safety
/// `instance` is a live instance.
#[no_mangle]
pub unsafe extern "C" fn fmi3EnterContinuousTimeMode(instance: fmi3Instance) -> fmi3Status {
    unsupported(instance, "fmi3EnterContinuousTimeMode", NOT_MODEL_EXCHANGE)
}

/// Model Exchange only.
///
/// # Safety
/// `instance` is a live instance.
#[no_mangle]
pub unsafe extern "C" fn fmi3CompletedIntegratorStep(
    instance: fmi3Instance,
    _noSetFMUStatePriorToCurrentPoint: fmi3Boolean,
    _enterEventMode: *mut fmi3Boolean,
    _terminateSimulation: *mut fmi3Boolean,
) -> fmi3Status {
    unsupported(instance, "fmi3CompletedIntegratorStep", NOT_MODEL_EXCHANGE)
}

/// Model Exchange only.
///
/// # Safety
/// `instance` is a live instance.
#[no_mangle]
pub unsafe extern "C" fn fmi3SetTime(instance: fmi3Instance, _time: fmi3Float64) -> fmi3Status {
    unsupported(instance, "fmi3SetTime", NOT_MODEL_EXCHANGE)
}

/// Model Exchange only.
///
/// # Safety
/// `instance` is a live instance.
#[no_mangle]
pub unsafe extern "C" fn fmi3SetContinuousStates(
    instance: fmi3Instance,
    _continuousStates: *const fmi3Float64,
    _nContinuousStates: usize,
) -> fmi3Status {
    unsupported(instance, "fmi3SetContinuousStates", NOT_MODEL_EXCHANGE)
}

/// Model Exchange only.
///
/// # Safety
/// `instance` is a live instance.
#[no_mangle]
pub unsafe extern "C" fn fmi3GetContinuousStateDerivatives(
    instance: fmi3Instance,
    _derivatives: *mut fmi3Float64,
    _nContinuousStates: usize,
) -> fmi3Status {
    unsupported(
        instance,
        "fmi3GetContinuousStateDerivatives",
        NOT_MODEL_EXCHANGE,
    )
}

/// Model Exchange only.
///
/// # Safety
/// `instance` is a live instance.
#[no_mangle]
pub unsafe extern "C" fn fmi3GetEventIndicators(
    instance: fmi3Instance,
    _eventIndicators: *mut fmi3Float64,
    _nEventIndicators: usize,
) -> fmi3Status {
    unsupported(instance, "fmi3GetEventIndicators", NOT_MODEL_EXCHANGE)
}

/// Model Exchange only.
///
/// # Safety
/// `instance` is a live instance.
#[no_mangle]
pub unsafe extern "C" fn fmi3GetContinuousStates(
    instance: fmi3Instance,
    _continuousStates: *mut fmi3Float64,
    _nContinuousStates: usize,
) -> fmi3Status {
    unsupported(instance, "fmi3GetContinuousStates", NOT_MODEL_EXCHANGE)
}

/// Model Exchange only.
///
/// # Safety
/// `instance` is a live instance.
#[no_mangle]
pub unsafe extern "C" fn fmi3GetNominalsOfContinuousStates(
    instance: fmi3Instance,
    _nominals: *mut fmi3Float64,
    _nContinuousStates: usize,
) -> fmi3Status {
    unsupported(
        instance,
        "fmi3GetNominalsOfContinuousStates",
        NOT_MODEL_EXCHANGE,
    )
}

/// Model Exchange only.
///
/// # Safety
/// `instance` is a live instance.
#[no_mangle]
pub unsafe extern "C" fn fmi3GetNumberOfEventIndicators(
    instance: fmi3Instance,
    _nEventIndicators: *mut usize,
) -> fmi3Status {
    unsupported(
        instance,
        "fmi3GetNumberOfEventIndicators",
        NOT_MODEL_EXCHANGE,
    )
}

/// Model Exchange only.
///
/// # Safety
/// `instance` is a live instance.
#[no_mangle]
pub unsafe extern "C" fn fmi3GetNumberOfContinuousStates(
    instance: fmi3Instance,
    _nContinuousStates: *mut usize,
) -> fmi3Status {
    unsupported(
        instance,
        "fmi3GetNumberOfContinuousStates",
        NOT_MODEL_EXCHANGE,
    )
}

/// Not offered: step mode follows initialisation directly (no event mode).
///
/// # Safety
/// `instance` is a live instance.
#[no_mangle]
pub unsafe extern "C" fn fmi3EnterStepMode(instance: fmi3Instance) -> fmi3Status {
    unsupported(instance, "fmi3EnterStepMode", NO_EVENT_MODE)
}

/// Not offered (`maxOutputDerivativeOrder` is not declared, i.e. 0).
///
/// # Safety
/// `instance` is a live instance.
#[no_mangle]
pub unsafe extern "C" fn fmi3GetOutputDerivatives(
    instance: fmi3Instance,
    _valueReferences: *const fmi3ValueReference,
    _nValueReferences: usize,
    _orders: *const fmi3Int32,
    _values: *mut fmi3Float64,
    _nValues: usize,
) -> fmi3Status {
    unsupported(
        instance,
        "fmi3GetOutputDerivatives",
        "the model description declares no output derivatives (maxOutputDerivativeOrder = 0)",
    )
}

/// Integrate from `currentCommunicationPoint` over `communicationStepSize` with the inputs
/// held. Never asks for event handling or termination and never returns early;
/// `lastSuccessfulTime` is the time reached (unchanged when the step fails).
///
/// # Safety
/// `instance` is a live instance; the four output pointers are writable.
#[no_mangle]
pub unsafe extern "C" fn fmi3DoStep(
    instance: fmi3Instance,
    currentCommunicationPoint: fmi3Float64,
    communicationStepSize: fmi3Float64,
    _noSetFMUStatePriorToCurrentPoint: fmi3Boolean,
    eventHandlingNeeded: *mut fmi3Boolean,
    terminateSimulation: *mut fmi3Boolean,
    earlyReturn: *mut fmi3Boolean,
    lastSuccessfulTime: *mut fmi3Float64,
) -> fmi3Status {
    const CALL: &str = "fmi3DoStep";
    let (t, h) = (currentCommunicationPoint, communicationStepSize);
    entry(instance, CALL, &[S::StepComplete], |inner, name| {
        if eventHandlingNeeded.is_null()
            || terminateSimulation.is_null()
            || earlyReturn.is_null()
            || lastSuccessfulTime.is_null()
        {
            return Err(
                "eventHandlingNeeded, terminateSimulation, earlyReturn and lastSuccessfulTime must not be NULL"
                    .into(),
            );
        }
        *eventHandlingNeeded = false;
        *terminateSimulation = false;
        *earlyReturn = false;
        let outcome = fmi2::do_step(inner, name, CALL, t, h);
        *lastSuccessfulTime = inner.time;
        outcome.map(|()| fmi3OK)
    })
}

/// Scheduled Execution only.
///
/// # Safety
/// `instance` is a live instance.
#[no_mangle]
pub unsafe extern "C" fn fmi3ActivateModelPartition(
    instance: fmi3Instance,
    _clockReference: fmi3ValueReference,
    _activationTime: fmi3Float64,
) -> fmi3Status {
    unsupported(
        instance,
        "fmi3ActivateModelPartition",
        "this FMU offers Co-Simulation only: Scheduled Execution is not available",
    )
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::cosim::{Bases, ModelFile};
    use crate::fmi2::tests::check_header;
    use crate::fmi2::PANIC_IN;
    use crate::unit::full_converter::FullConverterParams;
    use std::sync::Mutex;

    #[test]
    fn committed_header_is_fresh() {
        check_header("fmi3", "FMI 3.0", &EXPORTED_FUNCTIONS);
    }

    #[test]
    fn exported_function_list_has_75_distinct_names() {
        let mut names = EXPORTED_FUNCTIONS.to_vec();
        names.sort_unstable();
        names.dedup();
        assert_eq!(names.len(), 75);
        // the independent variable's value reference is free in the shared table
        assert!(crate::variables::VARIABLES.iter().all(|v| v.vr != TIME_VR));
    }

    /// A resource folder with a detailed model file; returns (folder, token).
    fn resources(tag: &str) -> (PathBuf, String) {
        let dir = std::env::temp_dir().join(format!(
            "understudy-fmi3-{tag}-{}/resources",
            std::process::id()
        ));
        std::fs::create_dir_all(&dir).unwrap();
        let json = ModelFile::full_converter(
            "panic_test",
            FullConverterParams::default(),
            Bases {
                s_base_mva: 5.0,
                v_base_kv: 0.69,
            },
        )
        .to_json();
        std::fs::write(dir.join("model.json"), &json).unwrap();
        (dir, ModelFile::guid_of(json.as_bytes()))
    }

    unsafe extern "C" fn collect3(
        env: fmi3InstanceEnvironment,
        status: fmi3Status,
        category: fmi3String,
        message: fmi3String,
    ) {
        let lines = &*(env as *const Mutex<Vec<String>>);
        lines.lock().unwrap().push(format!(
            "[{status}] {}: {}",
            CStr::from_ptr(category).to_string_lossy(),
            CStr::from_ptr(message).to_string_lossy()
        ));
    }

    /// The FMU passes the message as the format string with no variadic arguments, so a
    /// non-variadic callee reads it correctly (System V x86-64 passes the fixed arguments
    /// alike for both).
    unsafe extern "C" fn collect2(
        env: fmi2::fmi2ComponentEnvironment,
        _name: fmi2::fmi2String,
        status: fmi2::fmi2Status,
        category: fmi2::fmi2String,
        message: fmi2::fmi2String,
    ) {
        collect3(env, status, category, message)
    }

    #[test]
    fn a_panic_inside_an_entry_point_becomes_an_error_status_and_a_log_line() {
        // fault injection (compiled into unit tests only): the guard must catch the panic,
        // log it, return the error status, and leave the instance usable for Reset/Free
        let (dir, token) = resources("panic");
        let log = Mutex::new(Vec::<String>::new());
        let env = &log as *const Mutex<Vec<String>> as *mut c_void;
        let path = CString::new(format!("{}/", dir.display())).unwrap();
        let token_c = CString::new(token.clone()).unwrap();
        unsafe {
            let i = fmi3InstantiateCoSimulation(
                c"p3".as_ptr(),
                token_c.as_ptr(),
                path.as_ptr(),
                false,
                false,
                false,
                false,
                std::ptr::null(),
                0,
                env,
                Some(collect3),
                None,
            );
            assert!(!i.is_null(), "{:?}", log.lock().unwrap());
            assert_eq!(
                fmi3EnterInitializationMode(i, false, 0.0, 0.0, false, 0.0),
                fmi3OK
            );
            assert_eq!(fmi3ExitInitializationMode(i), fmi3OK);
            PANIC_IN.with(|p| p.set(Some("fmi3DoStep")));
            let (mut e, mut t, mut r, mut last) = (false, false, false, 0.0);
            let status = fmi3DoStep(i, 0.0, 1e-3, false, &mut e, &mut t, &mut r, &mut last);
            PANIC_IN.with(|p| p.set(None));
            assert_eq!(status, fmi3Error);
            let lines = log.lock().unwrap().clone();
            assert!(
                lines.iter().any(|l| l.starts_with(
                    "[3] logStatusError: fmi3DoStep: internal error (caught panic: fault injected"
                )),
                "{lines:?}"
            );
            // after the error the instance can be reset and used again
            assert_eq!(fmi3Reset(i), fmi3OK);
            assert_eq!(
                fmi3EnterInitializationMode(i, false, 0.0, 0.0, false, 0.0),
                fmi3OK
            );
            assert_eq!(fmi3ExitInitializationMode(i), fmi3OK);
            let status = fmi3DoStep(i, 0.0, 1e-3, false, &mut e, &mut t, &mut r, &mut last);
            assert_eq!(status, fmi3OK);
            assert!((last - 1e-3).abs() < 1e-15 && !e && !t && !r);
            fmi3FreeInstance(i);

            // the same guard serves FMI 2.0
            log.lock().unwrap().clear();
            let uri = CString::new(format!("file://{}", dir.display())).unwrap();
            let callbacks = fmi2::fmi2CallbackFunctions {
                logger: Some(std::mem::transmute::<
                    unsafe extern "C" fn(
                        *mut c_void,
                        *const c_char,
                        i32,
                        *const c_char,
                        *const c_char,
                    ),
                    fmi2::fmi2CallbackLogger,
                >(collect2)),
                allocateMemory: None,
                freeMemory: None,
                stepFinished: None,
                componentEnvironment: env,
            };
            let c = fmi2::fmi2Instantiate(
                c"p2".as_ptr(),
                fmi2::fmi2CoSimulation,
                token_c.as_ptr(),
                uri.as_ptr(),
                &callbacks,
                0,
                0,
            );
            assert!(!c.is_null(), "{:?}", log.lock().unwrap());
            PANIC_IN.with(|p| p.set(Some("fmi2SetupExperiment")));
            let status = fmi2::fmi2SetupExperiment(c, 0, 0.0, 0.0, 0, 0.0);
            PANIC_IN.with(|p| p.set(None));
            assert_eq!(status, fmi2::fmi2Error);
            let lines = log.lock().unwrap().clone();
            assert!(
                lines
                    .iter()
                    .any(|l| l.contains("fmi2SetupExperiment: internal error (caught panic")),
                "{lines:?}"
            );
            fmi2::fmi2FreeInstance(c);
        }
        let _ = std::fs::remove_dir_all(dir.parent().unwrap());
    }
}

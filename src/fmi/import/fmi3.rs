//! The FMI 3.0 Co-Simulation C API (FMI 3.0 standard, sections 2.3 and 4), bound by hand.
//! `fmi3Boolean` is C99 `bool` (one byte); `fmi3ValueReference` is `uint32_t`.

use super::{missing, ImportError, LogLine, LogSink, Status};
use std::ffi::{c_char, c_int, c_void, CStr, CString};
use std::path::Path;
use std::sync::Arc;

type Handle = *mut c_void;
type LogMessage = unsafe extern "C" fn(*mut c_void, c_int, *const c_char, *const c_char);

unsafe extern "C" fn collect(
    env: *mut c_void,
    status: c_int,
    category: *const c_char,
    message: *const c_char,
) {
    if env.is_null() {
        return;
    }
    let sink = &*(env as *const LogSink);
    let text = |p: *const c_char| {
        if p.is_null() {
            String::new()
        } else {
            CStr::from_ptr(p).to_string_lossy().into_owned()
        }
    };
    if let Ok(mut lines) = sink.lock() {
        lines.push(LogLine {
            status: Status::from_code(status),
            category: text(category),
            message: text(message),
        });
    }
}

type InstantiateCs = unsafe extern "C" fn(
    *const c_char, // instanceName
    *const c_char, // instantiationToken
    *const c_char, // resourcePath
    bool,          // visible
    bool,          // loggingOn
    bool,          // eventModeUsed
    bool,          // earlyReturnAllowed
    *const u32,    // requiredIntermediateVariables
    usize,         // nRequiredIntermediateVariables
    *mut c_void,   // instanceEnvironment
    Option<LogMessage>,
    *const c_void, // intermediateUpdate (NULL)
) -> Handle;

type DoStep = unsafe extern "C" fn(
    Handle,
    f64,
    f64,
    bool,
    *mut bool,
    *mut bool,
    *mut bool,
    *mut f64,
) -> c_int;

pub(crate) struct Api {
    instantiate: InstantiateCs,
    free_instance: unsafe extern "C" fn(Handle),
    enter_init: unsafe extern "C" fn(Handle, bool, f64, f64, bool, f64) -> c_int,
    exit_init: unsafe extern "C" fn(Handle) -> c_int,
    terminate: unsafe extern "C" fn(Handle) -> c_int,
    get_float64: unsafe extern "C" fn(Handle, *const u32, usize, *mut f64, usize) -> c_int,
    set_float64: unsafe extern "C" fn(Handle, *const u32, usize, *const f64, usize) -> c_int,
    get_boolean: unsafe extern "C" fn(Handle, *const u32, usize, *mut bool, usize) -> c_int,
    set_boolean: unsafe extern "C" fn(Handle, *const u32, usize, *const bool, usize) -> c_int,
    do_step: DoStep,
    get_state: Option<unsafe extern "C" fn(Handle, *mut *mut c_void) -> c_int>,
    set_state: Option<unsafe extern "C" fn(Handle, *mut c_void) -> c_int>,
    free_state: Option<unsafe extern "C" fn(Handle, *mut *mut c_void) -> c_int>,
    path: std::path::PathBuf,
    _library: libloading::Library,
}

pub(crate) struct Instance {
    handle: Handle,
    _log: Arc<LogSink>,
}

pub(crate) struct StepResult {
    pub status: i32,
    pub event_handling_needed: bool,
    pub terminate: bool,
    pub early_return: bool,
    pub last_successful_time_s: f64,
}

macro_rules! sym {
    ($lib:expr, $path:expr, $name:literal) => {{
        // SAFETY: the symbol's type is the one the FMI 3.0 standard's header declares
        let s = unsafe { $lib.get::<_>(concat!($name, "\0").as_bytes()) }
            .map_err(|e| missing($path, $name, e))?;
        *s
    }};
}

macro_rules! opt_sym {
    ($lib:expr, $name:literal) => {{
        // SAFETY: as above
        unsafe { $lib.get::<_>(concat!($name, "\0").as_bytes()) }
            .ok()
            .map(|s| *s)
    }};
}

impl Api {
    pub(crate) fn load(library: libloading::Library, path: &Path) -> Result<Self, ImportError> {
        let lib = &library;
        Ok(Self {
            instantiate: sym!(lib, path, "fmi3InstantiateCoSimulation"),
            free_instance: sym!(lib, path, "fmi3FreeInstance"),
            enter_init: sym!(lib, path, "fmi3EnterInitializationMode"),
            exit_init: sym!(lib, path, "fmi3ExitInitializationMode"),
            terminate: sym!(lib, path, "fmi3Terminate"),
            get_float64: sym!(lib, path, "fmi3GetFloat64"),
            set_float64: sym!(lib, path, "fmi3SetFloat64"),
            get_boolean: sym!(lib, path, "fmi3GetBoolean"),
            set_boolean: sym!(lib, path, "fmi3SetBoolean"),
            do_step: sym!(lib, path, "fmi3DoStep"),
            get_state: opt_sym!(lib, "fmi3GetFMUState"),
            set_state: opt_sym!(lib, "fmi3SetFMUState"),
            free_state: opt_sym!(lib, "fmi3FreeFMUState"),
            path: path.to_path_buf(),
            _library: library,
        })
    }

    pub(crate) fn instantiate(
        &self,
        name: &str,
        token: &str,
        resources: &Path,
        log: Arc<LogSink>,
        model: &str,
    ) -> Result<Instance, ImportError> {
        let name_c = CString::new(name.replace('\0', "")).expect("NULs removed");
        let token_c = CString::new(token.replace('\0', "")).expect("NULs removed");
        // FMI 3.0: an absolute native path with a trailing separator
        let mut dir = resources.display().to_string();
        if !dir.ends_with(std::path::MAIN_SEPARATOR) {
            dir.push(std::path::MAIN_SEPARATOR);
        }
        let dir_c = CString::new(dir.replace('\0', "")).expect("NULs removed");
        // SAFETY: valid pointers for the call; the log sink lives as long as the instance
        let handle = unsafe {
            (self.instantiate)(
                name_c.as_ptr(),
                token_c.as_ptr(),
                dir_c.as_ptr(),
                false,
                true,
                false,
                false,
                std::ptr::null(),
                0,
                Arc::as_ptr(&log) as *mut c_void,
                Some(collect),
                std::ptr::null(),
            )
        };
        if handle.is_null() {
            let lines = log.lock().map(|l| l.clone()).unwrap_or_default();
            return Err(ImportError::Instantiate {
                model: model.into(),
                call: "fmi3InstantiateCoSimulation",
                log: if lines.is_empty() {
                    String::new()
                } else {
                    format!(
                        "; FMU log: {}",
                        lines
                            .iter()
                            .map(|l| l.message.clone())
                            .collect::<Vec<_>>()
                            .join(" | ")
                    )
                },
            });
        }
        Ok(Instance { handle, _log: log })
    }

    pub(crate) fn free_instance(&self, i: &Instance) {
        // SAFETY: freed once (Drop)
        unsafe { (self.free_instance)(i.handle) }
    }

    pub(crate) fn enter_initialization(
        &self,
        i: &Instance,
        tolerance: Option<f64>,
        start_s: f64,
        stop_s: Option<f64>,
    ) -> i32 {
        // SAFETY: a live instance
        unsafe {
            (self.enter_init)(
                i.handle,
                tolerance.is_some(),
                tolerance.unwrap_or(0.0),
                start_s,
                stop_s.is_some(),
                stop_s.unwrap_or(0.0),
            )
        }
    }

    pub(crate) fn exit_initialization(&self, i: &Instance) -> i32 {
        // SAFETY: a live instance
        unsafe { (self.exit_init)(i.handle) }
    }

    pub(crate) fn terminate(&self, i: &Instance) -> i32 {
        // SAFETY: a live instance
        unsafe { (self.terminate)(i.handle) }
    }

    pub(crate) fn do_step(&self, i: &Instance, t_s: f64, h_s: f64) -> StepResult {
        let (mut event, mut terminate, mut early) = (false, false, false);
        let mut last = t_s;
        // SAFETY: a live instance and valid out-pointers
        let status = unsafe {
            (self.do_step)(
                i.handle,
                t_s,
                h_s,
                false,
                &mut event,
                &mut terminate,
                &mut early,
                &mut last,
            )
        };
        StepResult {
            status,
            event_handling_needed: event,
            terminate,
            early_return: early,
            last_successful_time_s: last,
        }
    }

    pub(crate) fn get_float64(&self, i: &Instance, vrs: &[u32], out: &mut [f64]) -> i32 {
        // SAFETY: scalar variables: nValues = nvr
        unsafe {
            (self.get_float64)(
                i.handle,
                vrs.as_ptr(),
                vrs.len(),
                out.as_mut_ptr(),
                out.len(),
            )
        }
    }

    pub(crate) fn set_float64(&self, i: &Instance, vrs: &[u32], values: &[f64]) -> i32 {
        // SAFETY: scalar variables: nValues = nvr
        unsafe {
            (self.set_float64)(
                i.handle,
                vrs.as_ptr(),
                vrs.len(),
                values.as_ptr(),
                values.len(),
            )
        }
    }

    pub(crate) fn get_boolean(&self, i: &Instance, vrs: &[u32]) -> (i32, Vec<bool>) {
        let mut out = vec![false; vrs.len()];
        // SAFETY: scalar variables: nValues = nvr
        let c = unsafe {
            (self.get_boolean)(
                i.handle,
                vrs.as_ptr(),
                vrs.len(),
                out.as_mut_ptr(),
                out.len(),
            )
        };
        (c, out)
    }

    pub(crate) fn set_boolean(&self, i: &Instance, vrs: &[u32], values: &[bool]) -> i32 {
        // SAFETY: scalar variables: nValues = nvr
        unsafe {
            (self.set_boolean)(
                i.handle,
                vrs.as_ptr(),
                vrs.len(),
                values.as_ptr(),
                values.len(),
            )
        }
    }

    fn state_fn<T: Copy>(&self, f: Option<T>, symbol: &str) -> Result<T, ImportError> {
        f.ok_or_else(|| ImportError::MissingFunction {
            path: self.path.clone(),
            symbol: symbol.into(),
            message: "declared canGetAndSetFMUState but the symbol is missing".into(),
        })
    }

    pub(crate) fn get_state(&self, i: &Instance, s: &mut *mut c_void) -> Result<i32, ImportError> {
        let f = self.state_fn(self.get_state, "fmi3GetFMUState")?;
        // SAFETY: a live instance and a valid out-pointer
        Ok(unsafe { f(i.handle, s) })
    }

    pub(crate) fn set_state(&self, i: &Instance, s: *mut c_void) -> Result<i32, ImportError> {
        let f = self.state_fn(self.set_state, "fmi3SetFMUState")?;
        // SAFETY: a state from this FMU
        Ok(unsafe { f(i.handle, s) })
    }

    pub(crate) fn free_state(&self, i: &Instance, s: &mut *mut c_void) -> Result<i32, ImportError> {
        let f = self.state_fn(self.free_state, "fmi3FreeFMUState")?;
        // SAFETY: a state from this FMU, freed once
        Ok(unsafe { f(i.handle, s) })
    }
}

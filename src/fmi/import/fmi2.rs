//! The FMI 2.0 Co-Simulation C API (FMI 2.0.4 standard, chapters 2 and 4), bound by hand.

use super::{missing, ImportError, LogLine, LogSink, Status};
use std::ffi::{c_char, c_int, c_uint, c_void, CStr, CString};
use std::path::Path;
use std::sync::Arc;

type Component = *mut c_void;
type Logger = unsafe extern "C" fn(*mut c_void, *const c_char, c_int, *const c_char, *const c_char);

/// fmi2CallbackFunctions (FMI 2.0 standard, section 2.1.5).
#[repr(C)]
struct Callbacks {
    logger: Option<Logger>,
    allocate: Option<unsafe extern "C" fn(usize, usize) -> *mut c_void>,
    free: Option<unsafe extern "C" fn(*mut c_void)>,
    step_finished: Option<unsafe extern "C" fn(*mut c_void, c_int)>,
    environment: *mut c_void,
}

extern "C" {
    fn calloc(n: usize, size: usize) -> *mut c_void;
    fn free(p: *mut c_void);
}

unsafe extern "C" fn alloc_memory(n: usize, size: usize) -> *mut c_void {
    calloc(n, size)
}

unsafe extern "C" fn free_memory(p: *mut c_void) {
    free(p)
}

/// The logger: the standard declares it variadic (printf-style); a non-variadic callee reads the
/// fixed arguments the same way on System V x86-64 and AAPCS64, so the format string is recorded
/// unexpanded.
unsafe extern "C" fn collect(
    env: *mut c_void,
    _name: *const c_char,
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

type Instantiate = unsafe extern "C" fn(
    *const c_char,
    c_int,
    *const c_char,
    *const c_char,
    *const Callbacks,
    c_int,
    c_int,
) -> Component;

pub(crate) struct Api {
    instantiate: Instantiate,
    free_instance: unsafe extern "C" fn(Component),
    setup: unsafe extern "C" fn(Component, c_int, f64, f64, c_int, f64) -> c_int,
    enter_init: unsafe extern "C" fn(Component) -> c_int,
    exit_init: unsafe extern "C" fn(Component) -> c_int,
    terminate: unsafe extern "C" fn(Component) -> c_int,
    get_real: unsafe extern "C" fn(Component, *const c_uint, usize, *mut f64) -> c_int,
    set_real: unsafe extern "C" fn(Component, *const c_uint, usize, *const f64) -> c_int,
    get_boolean: unsafe extern "C" fn(Component, *const c_uint, usize, *mut c_int) -> c_int,
    set_boolean: unsafe extern "C" fn(Component, *const c_uint, usize, *const c_int) -> c_int,
    do_step: unsafe extern "C" fn(Component, f64, f64, c_int) -> c_int,
    get_state: Option<unsafe extern "C" fn(Component, *mut *mut c_void) -> c_int>,
    set_state: Option<unsafe extern "C" fn(Component, *mut c_void) -> c_int>,
    free_state: Option<unsafe extern "C" fn(Component, *mut *mut c_void) -> c_int>,
    path: std::path::PathBuf,
    // kept last: the function pointers above point into it
    _library: libloading::Library,
}

pub(crate) struct Instance {
    component: Component,
    _callbacks: Box<Callbacks>,
    _log: Arc<LogSink>,
}

macro_rules! sym {
    ($lib:expr, $path:expr, $name:literal) => {{
        // SAFETY: the symbol's type is the one the FMI 2.0 standard's header declares
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

fn cstring(s: &str) -> CString {
    CString::new(s.replace('\0', "")).expect("NULs removed")
}

/// `file://` URI of a folder, percent-encoding what RFC 3986 does not allow in a path.
pub(crate) fn file_uri(p: &Path) -> String {
    let mut s = String::from("file://");
    for b in p.display().to_string().bytes() {
        if b.is_ascii_alphanumeric() || b"/-._~".contains(&b) {
            s.push(b as char);
        } else {
            s.push_str(&format!("%{b:02X}"));
        }
    }
    s
}

impl Api {
    pub(crate) fn load(library: libloading::Library, path: &Path) -> Result<Self, ImportError> {
        let lib = &library;
        Ok(Self {
            instantiate: sym!(lib, path, "fmi2Instantiate"),
            free_instance: sym!(lib, path, "fmi2FreeInstance"),
            setup: sym!(lib, path, "fmi2SetupExperiment"),
            enter_init: sym!(lib, path, "fmi2EnterInitializationMode"),
            exit_init: sym!(lib, path, "fmi2ExitInitializationMode"),
            terminate: sym!(lib, path, "fmi2Terminate"),
            get_real: sym!(lib, path, "fmi2GetReal"),
            set_real: sym!(lib, path, "fmi2SetReal"),
            get_boolean: sym!(lib, path, "fmi2GetBoolean"),
            set_boolean: sym!(lib, path, "fmi2SetBoolean"),
            do_step: sym!(lib, path, "fmi2DoStep"),
            get_state: opt_sym!(lib, "fmi2GetFMUstate"),
            set_state: opt_sym!(lib, "fmi2SetFMUstate"),
            free_state: opt_sym!(lib, "fmi2FreeFMUstate"),
            path: path.to_path_buf(),
            _library: library,
        })
    }

    pub(crate) fn instantiate(
        &self,
        name: &str,
        guid: &str,
        resources: &Path,
        log: Arc<LogSink>,
        model: &str,
    ) -> Result<Instance, ImportError> {
        let callbacks = Box::new(Callbacks {
            logger: Some(collect),
            allocate: Some(alloc_memory),
            free: Some(free_memory),
            step_finished: None,
            environment: Arc::as_ptr(&log) as *mut c_void,
        });
        let name_c = cstring(name);
        let guid_c = cstring(guid);
        let uri = cstring(&file_uri(resources));
        const CO_SIMULATION: c_int = 1;
        // SAFETY: every pointer is valid for the call; the callbacks and the log sink live as
        // long as the instance (kept in it).
        let component = unsafe {
            (self.instantiate)(
                name_c.as_ptr(),
                CO_SIMULATION,
                guid_c.as_ptr(),
                uri.as_ptr(),
                &*callbacks,
                0,
                1,
            )
        };
        if component.is_null() {
            let lines = log.lock().map(|l| l.clone()).unwrap_or_default();
            return Err(ImportError::Instantiate {
                model: model.into(),
                call: "fmi2Instantiate",
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
        Ok(Instance {
            component,
            _callbacks: callbacks,
            _log: log,
        })
    }

    pub(crate) fn free_instance(&self, i: &Instance) {
        // SAFETY: the component came from fmi2Instantiate and is freed once (Drop)
        unsafe { (self.free_instance)(i.component) }
    }

    pub(crate) fn setup_experiment(
        &self,
        i: &Instance,
        tolerance: Option<f64>,
        start_s: f64,
        stop_s: Option<f64>,
    ) -> i32 {
        // SAFETY: a live component
        unsafe {
            (self.setup)(
                i.component,
                c_int::from(tolerance.is_some()),
                tolerance.unwrap_or(0.0),
                start_s,
                c_int::from(stop_s.is_some()),
                stop_s.unwrap_or(0.0),
            )
        }
    }

    pub(crate) fn enter_initialization(&self, i: &Instance) -> i32 {
        // SAFETY: a live component
        unsafe { (self.enter_init)(i.component) }
    }

    pub(crate) fn exit_initialization(&self, i: &Instance) -> i32 {
        // SAFETY: a live component
        unsafe { (self.exit_init)(i.component) }
    }

    pub(crate) fn terminate(&self, i: &Instance) -> i32 {
        // SAFETY: a live component
        unsafe { (self.terminate)(i.component) }
    }

    pub(crate) fn do_step(&self, i: &Instance, t_s: f64, h_s: f64) -> i32 {
        // noSetFMUStatePriorToCurrentPoint = false: we may roll back with setFMUstate
        // SAFETY: a live component
        unsafe { (self.do_step)(i.component, t_s, h_s, 0) }
    }

    pub(crate) fn get_real(&self, i: &Instance, vrs: &[u32], out: &mut [f64]) -> i32 {
        // SAFETY: both slices have vrs.len() elements
        unsafe { (self.get_real)(i.component, vrs.as_ptr(), vrs.len(), out.as_mut_ptr()) }
    }

    pub(crate) fn set_real(&self, i: &Instance, vrs: &[u32], values: &[f64]) -> i32 {
        // SAFETY: both slices have vrs.len() elements
        unsafe { (self.set_real)(i.component, vrs.as_ptr(), vrs.len(), values.as_ptr()) }
    }

    pub(crate) fn get_boolean(&self, i: &Instance, vrs: &[u32]) -> (i32, Vec<bool>) {
        let mut out = vec![0 as c_int; vrs.len()];
        // SAFETY: both slices have vrs.len() elements
        let c =
            unsafe { (self.get_boolean)(i.component, vrs.as_ptr(), vrs.len(), out.as_mut_ptr()) };
        (c, out.into_iter().map(|b| b != 0).collect())
    }

    pub(crate) fn set_boolean(&self, i: &Instance, vrs: &[u32], values: &[bool]) -> i32 {
        let v: Vec<c_int> = values.iter().map(|&b| c_int::from(b)).collect();
        // SAFETY: both slices have vrs.len() elements
        unsafe { (self.set_boolean)(i.component, vrs.as_ptr(), vrs.len(), v.as_ptr()) }
    }

    fn state_fn<T: Copy>(&self, f: Option<T>, symbol: &str) -> Result<T, ImportError> {
        f.ok_or_else(|| ImportError::MissingFunction {
            path: self.path.clone(),
            symbol: symbol.into(),
            message: "declared canGetAndSetFMUstate but the symbol is missing".into(),
        })
    }

    pub(crate) fn get_state(&self, i: &Instance, s: &mut *mut c_void) -> Result<i32, ImportError> {
        let f = self.state_fn(self.get_state, "fmi2GetFMUstate")?;
        // SAFETY: a live component and a valid out-pointer
        Ok(unsafe { f(i.component, s) })
    }

    pub(crate) fn set_state(&self, i: &Instance, s: *mut c_void) -> Result<i32, ImportError> {
        let f = self.state_fn(self.set_state, "fmi2SetFMUstate")?;
        // SAFETY: a state obtained from this FMU
        Ok(unsafe { f(i.component, s) })
    }

    pub(crate) fn free_state(&self, i: &Instance, s: &mut *mut c_void) -> Result<i32, ImportError> {
        let f = self.state_fn(self.free_state, "fmi2FreeFMUstate")?;
        // SAFETY: a state obtained from this FMU, freed once (the value is consumed)
        Ok(unsafe { f(i.component, s) })
    }
}

//! FMI 2.0 Co-Simulation export and runtime: the archive, FMPy's validation and simulation
//! (an independent importer), the exported symbols, the C boundary's error handling, FMU
//! state, and several instances on threads.
//!
//! The C boundary is driven in-process through `libloading` on the `.so` taken out of the
//! exported FMU, with a logger callback that collects the lines per instance.

use crate::common;
use serde_json::json;
use std::ffi::{c_char, c_int, c_uint, c_void, CStr, CString};
use std::io::Read;
use std::path::{Path, PathBuf};
use std::sync::Mutex;
use understudy::fmi::{export_fmu, FmiVersion};
use understudy::runtime::cosim::{Bases, CoSimModel, Envelope, Inputs, ModelFile};
use understudy::runtime::fmi2::EXPORTED_FUNCTIONS;
use understudy::runtime::unit::full_converter::FullConverterParams;
use understudy::runtime::unit::C64;

const OK: c_int = 0;
const DISCARD: c_int = 2;
const ERROR: c_int = 3;
const CO_SIMULATION: c_int = 1;

const V_RE: c_uint = 0;
const V_IM: c_uint = 1;
const I_RE: c_uint = 3;
const I_IM: c_uint = 4;
const P: c_uint = 5;
const Q: c_uint = 6;
const OUT_OF_ENVELOPE: c_uint = 11;

/// The test unit: 5 MVA at 0.69 kV, 0.8 pu, envelope |v| in [0.5, 1.3] pu so a deep dip leaves it.
pub(crate) fn test_model() -> ModelFile {
    let mut m = ModelFile::full_converter(
        "fmi_test_unit",
        FullConverterParams::default(),
        Bases {
            s_base_mva: 5.0,
            v_base_kv: 0.69,
        },
    );
    m.envelope = Envelope {
        u_min: 0.5,
        u_max: 1.3,
        f_min: 0.95,
        f_max: 1.05,
    };
    m.start.inputs.v_re = 1.0;
    m.start.inputs.v_im = 0.05;
    m
}

/// Export `model` into a fresh folder and unpack it there; returns (folder, fmu path,
/// unpacked root, model identifier, guid).
pub(crate) struct Exported {
    _dir: tempfile::TempDir,
    pub(crate) fmu: PathBuf,
    pub(crate) root: PathBuf,
    pub(crate) identifier: String,
    pub(crate) guid: String,
}

pub(crate) fn export(model: &ModelFile) -> Exported {
    let dir = tempfile::tempdir().unwrap();
    let fmu = dir.path().join("unit.fmu");
    let report = export_fmu(model, &fmu, FmiVersion::V2).expect("export succeeds");
    // a space in the path exercises percent-decoding of the resource URI
    let root = dir.path().join("un packed");
    let mut archive = zip::ZipArchive::new(std::fs::File::open(&fmu).unwrap()).unwrap();
    archive.extract(&root).unwrap();
    Exported {
        _dir: dir,
        fmu,
        root,
        identifier: report.model_identifier,
        guid: report.guid,
    }
}

pub(crate) fn resource_uri(root: &Path) -> String {
    let path = root.join("resources").display().to_string();
    format!("file://{}", path.replace('%', "%25").replace(' ', "%20"))
}

// ------------------------------------------------------------------------------------------
// The C boundary through libloading
// ------------------------------------------------------------------------------------------

/// Our logger: the FMU passes the message as the format string with no variadic arguments, so a
/// non-variadic callee reads it correctly (System V x86-64 and AAPCS64 pass the fixed arguments
/// alike for both).
type Logger = unsafe extern "C" fn(*mut c_void, *const c_char, c_int, *const c_char, *const c_char);

#[repr(C)]
struct Callbacks {
    logger: Option<Logger>,
    allocate: Option<unsafe extern "C" fn(usize, usize) -> *mut c_void>,
    free: Option<unsafe extern "C" fn(*mut c_void)>,
    step_finished: Option<unsafe extern "C" fn(*mut c_void, c_int)>,
    environment: *mut c_void,
}

unsafe extern "C" fn collect(
    env: *mut c_void,
    _name: *const c_char,
    status: c_int,
    category: *const c_char,
    message: *const c_char,
) {
    let lines = &*(env as *const Mutex<Vec<String>>);
    let category = CStr::from_ptr(category).to_string_lossy();
    let message = CStr::from_ptr(message).to_string_lossy().replace("%%", "%");
    lines
        .lock()
        .unwrap()
        .push(format!("[{status}] {category}: {message}"));
}

type Component = *mut c_void;

pub(crate) struct Api {
    _lib: libloading::Library,
    instantiate: unsafe extern "C" fn(
        *const c_char,
        c_int,
        *const c_char,
        *const c_char,
        *const Callbacks,
        c_int,
        c_int,
    ) -> Component,
    free_instance: unsafe extern "C" fn(Component),
    set_debug_logging: unsafe extern "C" fn(Component, c_int, usize, *const *const c_char) -> c_int,
    setup: unsafe extern "C" fn(Component, c_int, f64, f64, c_int, f64) -> c_int,
    enter_init: unsafe extern "C" fn(Component) -> c_int,
    exit_init: unsafe extern "C" fn(Component) -> c_int,
    get_real: unsafe extern "C" fn(Component, *const c_uint, usize, *mut f64) -> c_int,
    set_real: unsafe extern "C" fn(Component, *const c_uint, usize, *const f64) -> c_int,
    get_boolean: unsafe extern "C" fn(Component, *const c_uint, usize, *mut c_int) -> c_int,
    do_step: unsafe extern "C" fn(Component, f64, f64, c_int) -> c_int,
    get_state: unsafe extern "C" fn(Component, *mut *mut c_void) -> c_int,
    set_state: unsafe extern "C" fn(Component, *mut c_void) -> c_int,
    free_state: unsafe extern "C" fn(Component, *mut *mut c_void) -> c_int,
    state_size: unsafe extern "C" fn(Component, *mut c_void, *mut usize) -> c_int,
    serialize: unsafe extern "C" fn(Component, *mut c_void, *mut c_char, usize) -> c_int,
    deserialize: unsafe extern "C" fn(Component, *const c_char, usize, *mut *mut c_void) -> c_int,
    directional: unsafe extern "C" fn(
        Component,
        *const c_uint,
        usize,
        *const c_uint,
        usize,
        *const f64,
        *mut f64,
    ) -> c_int,
    get_status: unsafe extern "C" fn(Component, c_int, *mut c_int) -> c_int,
    terminate: unsafe extern "C" fn(Component) -> c_int,
}

impl Api {
    pub(crate) fn load(exported: &Exported) -> Api {
        let so = exported
            .root
            .join("binaries/linux64")
            .join(format!("{}.so", exported.identifier));
        // SAFETY: the library is our own runtime; its initialisers have no side effects.
        unsafe {
            let lib = libloading::Library::new(&so).expect("the FMU's library loads");
            macro_rules! f {
                ($name:literal) => {
                    *lib.get(concat!($name, "\0").as_bytes())
                        .expect(concat!("symbol ", $name))
                };
            }
            Api {
                instantiate: f!("fmi2Instantiate"),
                free_instance: f!("fmi2FreeInstance"),
                set_debug_logging: f!("fmi2SetDebugLogging"),
                setup: f!("fmi2SetupExperiment"),
                enter_init: f!("fmi2EnterInitializationMode"),
                exit_init: f!("fmi2ExitInitializationMode"),
                get_real: f!("fmi2GetReal"),
                set_real: f!("fmi2SetReal"),
                get_boolean: f!("fmi2GetBoolean"),
                do_step: f!("fmi2DoStep"),
                get_state: f!("fmi2GetFMUstate"),
                set_state: f!("fmi2SetFMUstate"),
                free_state: f!("fmi2FreeFMUstate"),
                state_size: f!("fmi2SerializedFMUstateSize"),
                serialize: f!("fmi2SerializeFMUstate"),
                deserialize: f!("fmi2DeSerializeFMUstate"),
                directional: f!("fmi2GetDirectionalDerivative"),
                get_status: f!("fmi2GetStatus"),
                terminate: f!("fmi2Terminate"),
                _lib: lib,
            }
        }
    }
}

/// One instance with its own log.
pub(crate) struct Instance<'a> {
    api: &'a Api,
    c: Component,
    log: Box<Mutex<Vec<String>>>,
    _callbacks: Box<Callbacks>,
}

impl<'a> Instance<'a> {
    /// Instantiate; on failure returns the log lines.
    fn new(
        api: &'a Api,
        name: Option<&str>,
        guid: Option<&str>,
        uri: Option<&str>,
        logging_on: bool,
    ) -> Result<Self, Vec<String>> {
        let log = Box::new(Mutex::new(Vec::new()));
        let callbacks = Box::new(Callbacks {
            logger: Some(collect),
            allocate: None,
            free: None,
            step_finished: None,
            environment: &*log as *const Mutex<Vec<String>> as *mut c_void,
        });
        let name = name.map(|s| CString::new(s).unwrap());
        let guid = guid.map(|s| CString::new(s).unwrap());
        let uri = uri.map(|s| CString::new(s).unwrap());
        let ptr = |s: &Option<CString>| s.as_ref().map_or(std::ptr::null(), |s| s.as_ptr());
        let c = unsafe {
            (api.instantiate)(
                ptr(&name),
                CO_SIMULATION,
                ptr(&guid),
                ptr(&uri),
                &*callbacks,
                0,
                c_int::from(logging_on),
            )
        };
        if c.is_null() {
            return Err(log.lock().unwrap().clone());
        }
        Ok(Self {
            api,
            c,
            log,
            _callbacks: callbacks,
        })
    }

    pub(crate) fn open(api: &'a Api, e: &Exported, name: &str) -> Self {
        Self::new(
            api,
            Some(name),
            Some(&e.guid),
            Some(&resource_uri(&e.root)),
            false,
        )
        .expect("instantiation succeeds")
    }

    fn lines(&self) -> Vec<String> {
        self.log.lock().unwrap().clone()
    }

    fn set_voltage(&self, v: C64) -> c_int {
        let refs = [V_RE, V_IM];
        let values = [v.re, v.im];
        unsafe { (self.api.set_real)(self.c, refs.as_ptr(), 2, values.as_ptr()) }
    }

    pub(crate) fn initialise(&self, v: C64) {
        unsafe {
            assert_eq!((self.api.setup)(self.c, 0, 0.0, 0.0, 0, 0.0), OK);
            assert_eq!((self.api.enter_init)(self.c), OK);
            assert_eq!(self.set_voltage(v), OK);
            assert_eq!((self.api.exit_init)(self.c), OK, "{:?}", self.lines());
        }
    }

    /// (i_re, i_im, p, q, out_of_envelope)
    fn outputs(&self) -> [f64; 5] {
        let refs = [I_RE, I_IM, P, Q];
        let mut values = [0.0; 4];
        let mut flag = 0;
        unsafe {
            assert_eq!(
                (self.api.get_real)(self.c, refs.as_ptr(), 4, values.as_mut_ptr()),
                OK
            );
            assert_eq!(
                (self.api.get_boolean)(self.c, &OUT_OF_ENVELOPE, 1, &mut flag),
                OK
            );
        }
        [values[0], values[1], values[2], values[3], f64::from(flag)]
    }

    fn step(&self, t: f64, h: f64) -> c_int {
        unsafe { (self.api.do_step)(self.c, t, h, 0) }
    }

    /// Run `n` steps of `h` from `t0` with the terminal voltage `v(t)`; outputs after each.
    fn run(&self, t0: f64, h: f64, n: usize, v: impl Fn(f64) -> C64) -> Vec<[f64; 5]> {
        (0..n)
            .map(|k| {
                let t = t0 + k as f64 * h;
                assert_eq!(self.set_voltage(v(t)), OK);
                assert_eq!(self.step(t, h), OK, "{:?}", self.lines());
                self.outputs()
            })
            .collect()
    }
}

impl Drop for Instance<'_> {
    fn drop(&mut self) {
        unsafe { (self.api.free_instance)(self.c) }
    }
}

/// A dip to `depth` pu with a −20° phase jump between 0.05 s and 0.15 s, from 1.0∠2.9°.
pub(crate) fn dip(depth: f64) -> impl Fn(f64) -> C64 {
    move |t| {
        if (0.05..0.15).contains(&t) {
            C64::from_polar(depth, (2.862f64 - 20.0).to_radians())
        } else {
            C64::new(1.0, 0.05)
        }
    }
}

fn bits(rows: &[[f64; 5]]) -> Vec<[u64; 5]> {
    rows.iter().map(|r| r.map(f64::to_bits)).collect()
}

// ------------------------------------------------------------------------------------------
// Tests
// ------------------------------------------------------------------------------------------

#[test]
fn the_archive_has_the_standard_layout_and_a_consistent_description() {
    let model = test_model();
    let e = export(&model);
    let mut archive = zip::ZipArchive::new(std::fs::File::open(&e.fmu).unwrap()).unwrap();
    let mut names: Vec<String> = (0..archive.len())
        .map(|k| archive.by_index(k).unwrap().name().unwrap().to_string())
        .collect();
    names.sort();
    assert_eq!(
        names,
        [
            "binaries/linux64/fmi_test_unit.so",
            "documentation/index.html",
            "modelDescription.xml",
            "resources/model.json",
        ]
    );
    let mut xml = String::new();
    archive
        .by_name("modelDescription.xml")
        .unwrap()
        .read_to_string(&mut xml)
        .unwrap();
    let mut json = Vec::new();
    archive
        .by_name("resources/model.json")
        .unwrap()
        .read_to_end(&mut json)
        .unwrap();
    // the GUID in the description is the fingerprint of the model file it ships
    assert!(xml.contains(&format!("guid=\"{}\"", ModelFile::guid_of(&json))));
    assert_eq!(ModelFile::from_json(&json).unwrap(), model);
    for needle in [
        "fmiVersion=\"2.0\"",
        "modelIdentifier=\"fmi_test_unit\"",
        "canGetAndSetFMUstate=\"true\"",
        "stepSize=\"0.001\"",
        "<Unit name=\"MVA\">",
        "name=\"s_base_mva\"",
    ] {
        assert!(xml.contains(needle), "modelDescription.xml lacks {needle}");
    }
    let mut doc = String::new();
    archive
        .by_name("documentation/index.html")
        .unwrap()
        .read_to_string(&mut doc)
        .unwrap();
    assert!(doc.contains("support, and do not replace"));
    // atomic: no temporary file left beside the FMU
    let left: Vec<_> = std::fs::read_dir(e.fmu.parent().unwrap())
        .unwrap()
        .map(|d| d.unwrap().file_name().to_string_lossy().into_owned())
        .filter(|n| n.contains(".part-"))
        .collect();
    assert!(left.is_empty(), "{left:?}");
}

#[test]
fn nm_lists_every_fmi2_function() {
    let e = export(&test_model());
    let so = e.root.join("binaries/linux64/fmi_test_unit.so");
    let out = std::process::Command::new("nm")
        .args(["-D", "--defined-only"])
        .arg(&so)
        .output()
        .expect("nm (binutils) runs");
    assert!(out.status.success());
    let text = String::from_utf8_lossy(&out.stdout);
    let defined: Vec<&str> = text
        .lines()
        .filter_map(|l| {
            let mut parts = l.split_whitespace();
            let (_, kind, name) = (parts.next()?, parts.next()?, parts.next()?);
            (kind == "T").then_some(name)
        })
        .collect();
    let missing: Vec<_> = EXPORTED_FUNCTIONS
        .iter()
        .filter(|f| !defined.contains(f))
        .collect();
    assert!(missing.is_empty(), "not exported: {missing:?}");
    assert_eq!(EXPORTED_FUNCTIONS.len(), 34);
}

#[test]
fn fmpy_validates_the_fmu_and_its_simulation_equals_the_rust_model() {
    // Reference: FMPy (fmpy.validation.validate_fmu, fmpy.simulate_fmu) as an independent FMI
    // importer. Requirement: no validation problem; outputs equal our own evaluation of the same
    // model with the same communication steps and inputs within 1e-9.
    let model = test_model();
    let e = export(&model);
    let v0 = C64::new(1.0, 0.05);
    let vd = C64::from_polar(0.3, (2.862f64 - 20.0).to_radians());
    let input = json!([
        [0.0, v0.re, v0.im],
        [0.05, v0.re, v0.im],
        [0.05, vd.re, vd.im],
        [0.15, vd.re, vd.im],
        [0.15, v0.re, v0.im],
        [0.3, v0.re, v0.im],
    ]);
    let Some(r) = common::run_reference(
        "fmi_check.py",
        &json!({"fmu": e.fmu, "stop_time": 0.3, "step": 1e-3, "input": input,
                "start_values": {"p_ref": 0.8, "q_ref": 0.1}}),
    ) else {
        return;
    };
    let problems = r["problems"].as_array().unwrap();
    assert!(problems.is_empty(), "FMPy validation: {problems:?}");
    assert_eq!(r["guid"], e.guid.as_str());
    assert_eq!(
        r["outputs"],
        json!(["i_re", "i_im", "p", "q", "out_of_envelope"])
    );
    assert_eq!(r["initial_unknowns"], r["outputs"]);
    assert_eq!(r["default_step"].as_f64(), Some(1e-3));
    let col = |name: &str| -> Vec<f64> {
        r[name]
            .as_array()
            .unwrap()
            .iter()
            .map(|v| v.as_f64().unwrap())
            .collect()
    };
    let t = col("time");
    let (v_re, v_im) = (col("v_re"), col("v_im"));
    let fmu_out: Vec<[f64; 5]> = (0..t.len())
        .map(|k| {
            [
                col("i_re")[k],
                col("i_im")[k],
                col("p")[k],
                col("q")[k],
                col("out_of_envelope")[k],
            ]
        })
        .collect();
    assert_eq!(t.len(), 301, "one row per 1 ms step and the start");

    // our own evaluation: the same model file, the inputs FMPy applied before each step
    let mut m = model.build().unwrap();
    let inputs = |k: usize| Inputs {
        v_re: v_re[k],
        v_im: v_im[k],
        f_grid: 1.0,
    };
    let mut setpoints = model.start.setpoints;
    setpoints.q_ref = 0.1;
    m.initialise(&inputs(0), &setpoints).unwrap();
    let mut latched = !model.envelope.contains(&inputs(0));
    let mut ours = Vec::with_capacity(t.len());
    let row = |m: &understudy::runtime::cosim::LoadedModel, k: usize, latched: bool| {
        let o = m.outputs(&inputs(k)).unwrap();
        let out = latched || !model.envelope.contains(&inputs(k));
        [o.i_re, o.i_im, o.p, o.q, f64::from(u8::from(out))]
    };
    ours.push(row(&m, 0, latched));
    for k in 1..t.len() {
        latched |= !model.envelope.contains(&inputs(k));
        m.do_step(t[k - 1], t[k] - t[k - 1], &inputs(k)).unwrap();
        ours.push(row(&m, k, latched));
    }
    let mut worst = 0.0f64;
    for (a, b) in fmu_out.iter().zip(&ours) {
        for j in 0..5 {
            worst = worst.max((a[j] - b[j]).abs());
        }
    }
    eprintln!(
        "FMPy vs Rust evaluation: max |difference| = {worst:e} over {} rows",
        t.len()
    );
    assert!(worst <= 1e-9, "max difference {worst:e}");

    // the run is not trivial: the dip was applied, P fell and recovered, the flag rose
    let k_dip = t.iter().position(|&x| x > 0.1).unwrap();
    assert!((C64::new(v_re[k_dip], v_im[k_dip]).norm() - 0.3).abs() < 1e-12);
    assert!(
        (fmu_out[0][2] - 0.8).abs() < 1e-9,
        "P at start {}",
        fmu_out[0][2]
    );
    assert!(
        fmu_out[k_dip][2] < 0.5,
        "P in the dip {}",
        fmu_out[k_dip][2]
    );
    // after the dip the active current ramps back (5 pu/s recovery): P climbs towards 0.8
    let p_end = fmu_out[t.len() - 1][2];
    assert!(
        p_end > 0.7 && p_end < 0.8 + 1e-6 && p_end > fmu_out[t.len() - 11][2],
        "P at the end {p_end}"
    );
    assert_eq!(fmu_out[40][4], 0.0);
    assert_eq!(fmu_out[k_dip][4], 1.0);
    assert_eq!(fmu_out[t.len() - 1][4], 1.0, "the flag stays up");
}

#[test]
fn bad_calls_return_errors_and_log_a_line_naming_the_call() {
    let e = export(&test_model());
    let api = Api::load(&e);
    let uri = resource_uri(&e.root);

    // instantiation failures: NULL or the wrong thing → NULL, and a log line saying why
    let wrong_guid = Instance::new(&api, Some("a"), Some("{0000}"), Some(&uri), false)
        .err()
        .expect("wrong GUID refused");
    assert!(
        wrong_guid
            .iter()
            .any(|l| l.contains("fmi2Instantiate") && l.contains("fmuGUID {0000}")),
        "{wrong_guid:?}"
    );
    let no_name = Instance::new(&api, None, Some(&e.guid), Some(&uri), false)
        .err()
        .expect("NULL instance name refused");
    assert!(
        no_name.iter().any(|l| l.contains("instanceName is NULL")),
        "{no_name:?}"
    );
    let no_resources = Instance::new(&api, Some("a"), Some(&e.guid), None, false)
        .err()
        .expect("NULL resource location refused");
    assert!(no_resources
        .iter()
        .any(|l| l.contains("fmuResourceLocation is NULL")));
    let http = Instance::new(
        &api,
        Some("a"),
        Some(&e.guid),
        Some("http://x/resources"),
        false,
    )
    .err()
    .expect("non-file URI refused");
    assert!(http.iter().any(|l| l.contains("not a file: URI")));
    // the other accepted URI form
    let short = format!(
        "file:{}",
        resource_uri(&e.root).trim_start_matches("file://")
    );
    assert!(Instance::new(&api, Some("a"), Some(&e.guid), Some(&short), false).is_ok());

    // DoStep before initialisation
    let a = Instance::open(&api, &e, "before-init");
    assert_eq!(a.step(0.0, 1e-3), ERROR);
    assert!(a
        .lines()
        .iter()
        .any(|l| l.contains("fmi2DoStep") && l.contains("Instantiated")));
    // the instance is now in the error state: even a call valid before is refused
    assert_eq!(unsafe { (api.enter_init)(a.c) }, ERROR);

    // GetReal in the instantiated state
    let b = Instance::open(&api, &e, "get-early");
    let mut value = 0.0;
    assert_eq!(unsafe { (api.get_real)(b.c, &P, 1, &mut value) }, ERROR);
    assert!(b.lines().iter().any(|l| l.contains("fmi2GetReal")));

    // zero-length and NaN steps, NaN inputs, setting an output, a fixed parameter after init
    let c = Instance::open(&api, &e, "zero-step");
    c.initialise(C64::new(1.0, 0.0));
    assert_eq!(c.step(0.0, 0.0), ERROR);
    assert!(c
        .lines()
        .iter()
        .any(|l| l.contains("fmi2DoStep") && l.contains("communicationStepSize = 0")));
    let d = Instance::open(&api, &e, "nan-input");
    d.initialise(C64::new(1.0, 0.0));
    assert_eq!(d.set_voltage(C64::new(f64::NAN, 0.0)), ERROR);
    assert!(d
        .lines()
        .iter()
        .any(|l| l.contains("fmi2SetReal") && l.contains("v_re = NaN")));
    let f = Instance::open(&api, &e, "set-output");
    f.initialise(C64::new(1.0, 0.0));
    assert_eq!(unsafe { (api.set_real)(f.c, &P, 1, &0.5) }, ERROR);
    assert!(f.lines().iter().any(|l| l.contains("p is an output")));
    let g = Instance::open(&api, &e, "fixed-after-init");
    g.initialise(C64::new(1.0, 0.0));
    assert_eq!(unsafe { (api.set_real)(g.c, &7, 1, &0.5) }, ERROR);
    assert!(g
        .lines()
        .iter()
        .any(|l| l.contains("p_ref is a fixed parameter")));
    let h = Instance::open(&api, &e, "wrong-time");
    h.initialise(C64::new(1.0, 0.0));
    assert_eq!(h.step(0.5, 1e-3), ERROR);
    assert!(h.lines().iter().any(|l| l.contains("FMU is at t = 0")));

    // capabilities not claimed
    let k = Instance::open(&api, &e, "unsupported");
    k.initialise(C64::new(1.0, 0.0));
    let status = unsafe { (api.directional)(k.c, &P, 1, &V_RE, 1, &1.0, &mut value) };
    assert_eq!(status, ERROR);
    assert!(k
        .lines()
        .iter()
        .any(|l| l.contains("fmi2GetDirectionalDerivative")
            && l.contains("providesDirectionalDerivative")));
    let s = Instance::open(&api, &e, "status");
    s.initialise(C64::new(1.0, 0.0));
    let mut st = 0;
    assert_eq!(unsafe { (api.get_status)(s.c, 0, &mut st) }, DISCARD);

    // a model-file edit behind the description's back is caught by the GUID
    let tampered = tempfile::tempdir().unwrap();
    std::fs::create_dir(tampered.path().join("resources")).unwrap();
    let json = std::fs::read_to_string(e.root.join("resources/model.json"))
        .unwrap()
        .replace("\"p_ref\": 0.8", "\"p_ref\": 0.7");
    std::fs::write(tampered.path().join("resources/model.json"), json).unwrap();
    let lines = Instance::new(
        &api,
        Some("t"),
        Some(&e.guid),
        Some(&resource_uri(tampered.path())),
        false,
    )
    .err()
    .expect("tampered model refused");
    assert!(lines
        .iter()
        .any(|l| l.contains("does not match the model file")));

    // no callbacks at all: NULL, not a crash
    let (name, guid, uri_c) = (
        CString::new("n").unwrap(),
        CString::new(e.guid.as_str()).unwrap(),
        CString::new(uri.as_str()).unwrap(),
    );
    let c = unsafe {
        (api.instantiate)(
            name.as_ptr(),
            CO_SIMULATION,
            guid.as_ptr(),
            uri_c.as_ptr(),
            std::ptr::null(),
            0,
            0,
        )
    };
    assert!(c.is_null());

    // a null component is an error, not a crash
    assert_eq!(
        unsafe { (api.do_step)(std::ptr::null_mut(), 0.0, 1e-3, 0) },
        ERROR
    );
    unsafe { (api.free_instance)(std::ptr::null_mut()) };
}

#[test]
fn debug_logging_follows_logging_on_and_categories() {
    let e = export(&test_model());
    let api = Api::load(&e);
    let uri = resource_uri(&e.root);
    let quiet = Instance::new(&api, Some("quiet"), Some(&e.guid), Some(&uri), false).unwrap();
    quiet.initialise(C64::new(1.0, 0.0));
    quiet.step(0.0, 1e-3);
    assert!(quiet.lines().is_empty(), "{:?}", quiet.lines());

    let loud = Instance::new(&api, Some("loud"), Some(&e.guid), Some(&uri), true).unwrap();
    let category = CString::new("logFmiCall").unwrap();
    let list = [category.as_ptr()];
    assert_eq!(
        unsafe { (api.set_debug_logging)(loud.c, 1, 1, list.as_ptr()) },
        OK
    );
    loud.initialise(C64::new(1.0, 0.0));
    loud.step(0.0, 1e-3);
    assert!(loud
        .lines()
        .iter()
        .any(|l| l.contains("logFmiCall: fmi2DoStep")));
    let unknown = CString::new("logNoSuchThing").unwrap();
    assert_eq!(
        unsafe { (api.set_debug_logging)(loud.c, 1, 1, [unknown.as_ptr()].as_ptr()) },
        1
    );
    assert!(loud.lines().iter().any(|l| l.contains("logNoSuchThing")));
}

#[test]
fn fmu_state_restores_a_trajectory_exactly_and_survives_serialisation() {
    let e = export(&test_model());
    let api = Api::load(&e);
    let h = 1e-3;
    let v = dip(0.35);

    let a = Instance::open(&api, &e, "a");
    a.initialise(v(0.0));
    a.run(0.0, h, 40, &v);
    let mut state: *mut c_void = std::ptr::null_mut();
    assert_eq!(unsafe { (api.get_state)(a.c, &mut state) }, OK);
    let first = a.run(0.04, h, 160, &v);
    assert_eq!(unsafe { (api.set_state)(a.c, state) }, OK);
    let again = a.run(0.04, h, 160, &v);
    assert_eq!(
        bits(&first),
        bits(&again),
        "get/set FMU state replays exactly"
    );
    assert!(
        first.iter().any(|r| r[4] == 1.0),
        "the trajectory crosses the dip"
    );

    // serialise, free, and continue in a fresh instance
    let mut size = 0usize;
    assert_eq!(unsafe { (api.state_size)(a.c, state, &mut size) }, OK);
    let mut buffer = vec![0 as c_char; size];
    assert_eq!(
        unsafe { (api.serialize)(a.c, state, buffer.as_mut_ptr(), size) },
        OK
    );
    assert_eq!(unsafe { (api.free_state)(a.c, &mut state) }, OK);
    assert!(state.is_null());
    let b = Instance::open(&api, &e, "b");
    let mut restored: *mut c_void = std::ptr::null_mut();
    assert_eq!(
        unsafe { (api.deserialize)(b.c, buffer.as_ptr(), size, &mut restored) },
        OK,
        "{:?}",
        b.lines()
    );
    assert_eq!(unsafe { (api.set_state)(b.c, restored) }, OK);
    let continued = b.run(0.04, h, 160, &v);
    assert_eq!(
        bits(&first),
        bits(&continued),
        "serialise → deserialise → continue"
    );
    assert_eq!(unsafe { (api.free_state)(b.c, &mut restored) }, OK);

    // and a damaged buffer is refused
    let mut junk: *mut c_void = std::ptr::null_mut();
    let bad = [b'{' as c_char, b'x' as c_char];
    assert_eq!(
        unsafe { (api.deserialize)(b.c, bad.as_ptr(), 2, &mut junk) },
        ERROR
    );
    assert!(junk.is_null());
    unsafe { (api.terminate)(a.c) };
}

#[test]
fn instances_on_threads_give_the_same_outputs_as_a_serial_run() {
    let e = export(&test_model());
    let api = Api::load(&e);
    let depths = [0.2, 0.45, 0.7, 0.85];
    let h = 1e-3;
    let serial: Vec<_> = depths
        .iter()
        .map(|&d| {
            let inst = Instance::open(&api, &e, "serial");
            inst.initialise(dip(d)(0.0));
            bits(&inst.run(0.0, h, 200, dip(d)))
        })
        .collect();
    let parallel: Vec<_> = std::thread::scope(|scope| {
        let handles: Vec<_> = depths
            .iter()
            .map(|&d| {
                let (api, e) = (&api, &e);
                scope.spawn(move || {
                    let inst = Instance::open(api, e, "threaded");
                    inst.initialise(dip(d)(0.0));
                    bits(&inst.run(0.0, h, 200, dip(d)))
                })
            })
            .collect();
        handles.into_iter().map(|h| h.join().unwrap()).collect()
    });
    assert_eq!(serial, parallel);
    // the four runs differ from each other (the depth matters), so equality is not vacuous
    assert_ne!(serial[0], serial[3]);
}

#[test]
fn host_driven_unit_reproduces_the_detailed_model_behind_an_ideal_source() {
    // Behind an ideal source (SCR = ∞) the terminal voltage of the grid-equivalent model IS the
    // source phasor, so feeding that phasor to the host-driven unit, held over 1 ms steps whose
    // edges include the dip's, must give the same currents (1e-9 pu): the adapter adds nothing
    // of its own to the dynamics (common practice: cross-check of two paths through one model).
    use understudy::runtime::ode::{integrate, Method};
    use understudy::runtime::unit::full_converter::{ix, FullConverter};
    use understudy::runtime::unit::{Disturbance, GridEquivalent, OperatingPoint};
    let params = FullConverterParams::default();
    let op = OperatingPoint::new(0.8, 0.1);
    let ideal = GridEquivalent {
        scr: f64::INFINITY,
        x_over_r: 10.0,
    };
    let disturbance = Disturbance::VoltageDip {
        start_s: 0.1,
        duration_s: 0.1,
        residual_voltage: 0.5,
        phase_jump_deg: -10.0,
    };
    let method = Method::Rk4 { step_s: 5e-5 };
    let (mut unit, mut x) =
        FullConverter::initialise(params.clone(), &op, &ideal, &disturbance).expect("steady state");
    let h = 1e-3;
    let mut reference = Vec::new();
    let breakpoints = unit.breakpoints_s();
    integrate(
        &mut unit,
        &mut x,
        0.0,
        0.3,
        h,
        &breakpoints,
        &method,
        |t, x, u| {
            let k = u.grid.phase_index_at(t);
            reference.push((
                u.grid.source(k, t, params.f_nom_hz).0,
                C64::new(x[ix::I_RE], x[ix::I_IM]),
            ));
        },
    )
    .unwrap();

    let model = ModelFile::full_converter("cross", params.clone(), test_model().bases);
    let mut m = model.build().unwrap();
    let held = |v: C64| Inputs {
        v_re: v.re,
        v_im: v.im,
        f_grid: 1.0,
    };
    let setpoints = understudy::runtime::cosim::Setpoints {
        p_ref: 0.8,
        q_ref: 0.1,
    };
    m.initialise(&held(reference[0].0), &setpoints).unwrap();
    let mut worst = 0.0f64;
    for k in 1..reference.len() {
        // the voltage in force over [t_{k-1}, t_k) is the source at t_{k-1} (right-continuous)
        let v = reference[k - 1].0;
        m.do_step((k - 1) as f64 * h, h, &held(v)).unwrap();
        let o = m.outputs(&held(v)).unwrap();
        worst = worst.max((C64::new(o.i_re, o.i_im) - reference[k].1).norm());
    }
    eprintln!("host-driven vs grid-equivalent model: max |Δi| = {worst:e} pu");
    assert!(worst <= 1e-9, "max |Δi| = {worst:e} pu");
    // the dip moved the current (the comparison is not of two constants)
    let moved = reference
        .iter()
        .map(|r| (r.1 - reference[0].1).norm())
        .fold(0.0, f64::max);
    assert!(moved > 0.2, "current moved by only {moved}");
}

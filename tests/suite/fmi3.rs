//! FMI 3.0 Co-Simulation export: the archive, the C boundary through libloading, FMPy as an
//! independent importer (fmpy.validation.validate_fmu, fmpy.simulate_fmu), and memory use of
//! repeated instantiation through both boundaries.
//!
//! Function shapes from the FMI 3.0 standard's `fmi3FunctionTypes.h` (Modelica Association).

use crate::common;
use crate::fmi::{self, dip, test_model};
use serde_json::json;
use std::ffi::{c_char, c_void, CStr, CString};
use std::path::{Path, PathBuf};
use std::sync::Mutex;
use understudy::fmi::{export_fmu, FmiVersion};
use understudy::runtime::cosim::{CoSimModel, Inputs, ModelFile};
use understudy::runtime::unit::C64;

const OK: i32 = 0;
const ERROR: i32 = 3;
const V_RE: u32 = 0;
const V_IM: u32 = 1;
const I_RE: u32 = 3;
const I_IM: u32 = 4;
const P: u32 = 5;
const Q: u32 = 6;
const OUT_OF_ENVELOPE: u32 = 11;

struct Exported3 {
    _dir: tempfile::TempDir,
    fmu: PathBuf,
    root: PathBuf,
    identifier: String,
    token: String,
}

fn export3(model: &ModelFile) -> Exported3 {
    let dir = tempfile::tempdir().unwrap();
    let fmu = dir.path().join("unit3.fmu");
    let report = export_fmu(model, &fmu, FmiVersion::V3).expect("FMI 3.0 export succeeds");
    let root = dir.path().join("un packed");
    let mut archive = zip::ZipArchive::new(std::fs::File::open(&fmu).unwrap()).unwrap();
    archive.extract(&root).unwrap();
    Exported3 {
        _dir: dir,
        fmu,
        root,
        identifier: report.model_identifier,
        token: report.guid,
    }
}

/// FMI 3.0: the native path of the resources folder with a trailing separator.
fn resource_path(root: &Path) -> String {
    format!("{}/", root.join("resources").display())
}

type Inst = *mut c_void;
type LogMessage = unsafe extern "C" fn(*mut c_void, i32, *const c_char, *const c_char);

unsafe extern "C" fn collect(
    env: *mut c_void,
    status: i32,
    category: *const c_char,
    message: *const c_char,
) {
    let lines = &*(env as *const Mutex<Vec<String>>);
    lines.lock().unwrap().push(format!(
        "[{status}] {}: {}",
        CStr::from_ptr(category).to_string_lossy(),
        CStr::from_ptr(message).to_string_lossy()
    ));
}

type Instantiate = unsafe extern "C" fn(
    *const c_char,
    *const c_char,
    *const c_char,
    bool,
    bool,
    bool,
    bool,
    *const u32,
    usize,
    *mut c_void,
    Option<LogMessage>,
    *const c_void,
) -> Inst;

pub(crate) struct Api3 {
    _lib: libloading::Library,
    instantiate: Instantiate,
    free_instance: unsafe extern "C" fn(Inst),
    enter_init: unsafe extern "C" fn(Inst, bool, f64, f64, bool, f64) -> i32,
    exit_init: unsafe extern "C" fn(Inst) -> i32,
    get_f64: unsafe extern "C" fn(Inst, *const u32, usize, *mut f64, usize) -> i32,
    set_f64: unsafe extern "C" fn(Inst, *const u32, usize, *const f64, usize) -> i32,
    get_bool: unsafe extern "C" fn(Inst, *const u32, usize, *mut bool, usize) -> i32,
    do_step: unsafe extern "C" fn(
        Inst,
        f64,
        f64,
        bool,
        *mut bool,
        *mut bool,
        *mut bool,
        *mut f64,
    ) -> i32,
    get_state: unsafe extern "C" fn(Inst, *mut *mut c_void) -> i32,
    set_state: unsafe extern "C" fn(Inst, *mut c_void) -> i32,
    free_state: unsafe extern "C" fn(Inst, *mut *mut c_void) -> i32,
    state_size: unsafe extern "C" fn(Inst, *mut c_void, *mut usize) -> i32,
    serialize: unsafe extern "C" fn(Inst, *mut c_void, *mut u8, usize) -> i32,
    deserialize: unsafe extern "C" fn(Inst, *const u8, usize, *mut *mut c_void) -> i32,
    enter_event_mode: unsafe extern "C" fn(Inst) -> i32,
}

impl Api3 {
    fn load_so(so: &Path) -> Api3 {
        // SAFETY: the library is our own runtime; its initialisers have no side effects.
        unsafe {
            let lib = libloading::Library::new(so).expect("the FMU's library loads");
            macro_rules! f {
                ($name:literal) => {
                    *lib.get(concat!($name, "\0").as_bytes())
                        .expect(concat!("symbol ", $name))
                };
            }
            Api3 {
                instantiate: f!("fmi3InstantiateCoSimulation"),
                free_instance: f!("fmi3FreeInstance"),
                enter_init: f!("fmi3EnterInitializationMode"),
                exit_init: f!("fmi3ExitInitializationMode"),
                get_f64: f!("fmi3GetFloat64"),
                set_f64: f!("fmi3SetFloat64"),
                get_bool: f!("fmi3GetBoolean"),
                do_step: f!("fmi3DoStep"),
                get_state: f!("fmi3GetFMUState"),
                set_state: f!("fmi3SetFMUState"),
                free_state: f!("fmi3FreeFMUState"),
                state_size: f!("fmi3SerializedFMUStateSize"),
                serialize: f!("fmi3SerializeFMUState"),
                deserialize: f!("fmi3DeserializeFMUState"),
                enter_event_mode: f!("fmi3EnterEventMode"),
                _lib: lib,
            }
        }
    }

    fn load(e: &Exported3) -> Api3 {
        Self::load_so(
            &e.root
                .join("binaries/x86_64-linux")
                .join(format!("{}.so", e.identifier)),
        )
    }
}

struct Instance3<'a> {
    api: &'a Api3,
    i: Inst,
    log: Box<Mutex<Vec<String>>>,
}

impl<'a> Instance3<'a> {
    fn new(
        api: &'a Api3,
        name: Option<&str>,
        token: &str,
        path: &str,
    ) -> Result<Self, Vec<String>> {
        let log = Box::new(Mutex::new(Vec::new()));
        let name = name.map(|s| CString::new(s).unwrap());
        let token = CString::new(token).unwrap();
        let path = CString::new(path).unwrap();
        let i = unsafe {
            (api.instantiate)(
                name.as_ref().map_or(std::ptr::null(), |s| s.as_ptr()),
                token.as_ptr(),
                path.as_ptr(),
                false,
                false,
                false,
                false,
                std::ptr::null(),
                0,
                &*log as *const Mutex<Vec<String>> as *mut c_void,
                Some(collect),
                std::ptr::null(),
            )
        };
        if i.is_null() {
            return Err(log.lock().unwrap().clone());
        }
        Ok(Self { api, i, log })
    }

    fn open(api: &'a Api3, e: &Exported3) -> Self {
        Self::new(api, Some("u3"), &e.token, &resource_path(&e.root)).expect("instantiates")
    }

    fn lines(&self) -> Vec<String> {
        self.log.lock().unwrap().clone()
    }

    fn set_voltage(&self, v: C64) -> i32 {
        let refs = [V_RE, V_IM];
        let values = [v.re, v.im];
        unsafe { (self.api.set_f64)(self.i, refs.as_ptr(), 2, values.as_ptr(), 2) }
    }

    fn initialise(&self, v: C64) {
        unsafe {
            assert_eq!(
                (self.api.enter_init)(self.i, false, 0.0, 0.0, false, 0.0),
                OK
            );
            assert_eq!(self.set_voltage(v), OK);
            assert_eq!((self.api.exit_init)(self.i), OK, "{:?}", self.lines());
        }
    }

    fn outputs(&self) -> [f64; 5] {
        let refs = [I_RE, I_IM, P, Q];
        let mut values = [0.0; 4];
        let mut flag = false;
        unsafe {
            assert_eq!(
                (self.api.get_f64)(self.i, refs.as_ptr(), 4, values.as_mut_ptr(), 4),
                OK
            );
            assert_eq!(
                (self.api.get_bool)(self.i, &OUT_OF_ENVELOPE, 1, &mut flag, 1),
                OK
            );
        }
        [
            values[0],
            values[1],
            values[2],
            values[3],
            f64::from(u8::from(flag)),
        ]
    }

    /// (status, lastSuccessfulTime)
    fn step(&self, t: f64, h: f64) -> (i32, f64) {
        let (mut e, mut term, mut early, mut last) = (true, true, true, f64::NAN);
        let s = unsafe {
            (self.api.do_step)(
                self.i, t, h, false, &mut e, &mut term, &mut early, &mut last,
            )
        };
        if s == OK {
            assert!(!e && !term && !early);
        }
        (s, last)
    }

    fn run(&self, t0: f64, h: f64, n: usize, v: impl Fn(f64) -> C64) -> Vec<[f64; 5]> {
        (0..n)
            .map(|k| {
                let t = t0 + k as f64 * h;
                assert_eq!(self.set_voltage(v(t)), OK);
                let (s, last) = self.step(t, h);
                assert_eq!(s, OK, "{:?}", self.lines());
                assert!((last - (t + h)).abs() < 1e-12);
                self.outputs()
            })
            .collect()
    }
}

impl Drop for Instance3<'_> {
    fn drop(&mut self) {
        unsafe { (self.api.free_instance)(self.i) }
    }
}

fn bits(rows: &[[f64; 5]]) -> Vec<[u64; 5]> {
    rows.iter().map(|r| r.map(f64::to_bits)).collect()
}

#[test]
fn fmi3_archive_layout_and_description() {
    let e = export3(&test_model());
    for f in [
        "modelDescription.xml",
        "resources/model.json",
        "documentation/index.html",
        "binaries/x86_64-linux/fmi_test_unit.so",
    ] {
        assert!(e.root.join(f).is_file(), "{f} missing");
    }
    let md = std::fs::read_to_string(e.root.join("modelDescription.xml")).unwrap();
    assert!(md.contains(r#"fmiVersion="3.0""#));
    assert!(md.contains(&format!(r#"instantiationToken="{}""#, e.token)));
    assert!(md.contains(r#"canGetAndSetFMUState="true""#));
    assert!(md.contains(r#"<Output valueReference="3"/>"#));
    let doc = std::fs::read_to_string(e.root.join("documentation/index.html")).unwrap();
    assert!(doc.contains("FMI 3.0") && doc.contains("Envelope") && doc.contains("Caution"));
}

#[test]
fn nm_lists_every_fmi3_and_fmi2_function() {
    let e = export3(&test_model());
    let so = e.root.join("binaries/x86_64-linux/fmi_test_unit.so");
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
    let missing: Vec<_> = understudy::runtime::fmi3::EXPORTED_FUNCTIONS
        .iter()
        .chain(understudy::runtime::fmi2::EXPORTED_FUNCTIONS.iter())
        .filter(|f| !defined.contains(f))
        .collect();
    assert!(missing.is_empty(), "not exported: {missing:?}");
}

#[test]
fn fmpy_validates_the_fmi3_fmu_and_its_simulation_equals_the_rust_model() {
    // Reference: FMPy (fmpy.validation.validate_fmu, fmpy.simulate_fmu, FMI 3.0 importer).
    // Requirement: no validation problem; outputs equal our own evaluation of the same model
    // with the same communication steps and inputs within 1e-9.
    let model = test_model();
    let e = export3(&model);
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
    assert_eq!(r["fmi_version"], "3.0");
    assert_eq!(r["guid"], e.token.as_str());
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
    assert_eq!(t.len(), 301, "one row per 1 ms step and the start");
    let (v_re, v_im) = (col("v_re"), col("v_im"));
    let names = ["i_re", "i_im", "p", "q", "out_of_envelope"];
    let cols: Vec<Vec<f64>> = names.iter().map(|n| col(n)).collect();

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
    let mut worst = 0.0f64;
    for k in 0..t.len() {
        if k > 0 {
            latched |= !model.envelope.contains(&inputs(k));
            m.do_step(t[k - 1], t[k] - t[k - 1], &inputs(k)).unwrap();
        }
        let o = m.outputs(&inputs(k)).unwrap();
        let ours = [o.i_re, o.i_im, o.p, o.q, f64::from(u8::from(latched))];
        for (c, o) in cols.iter().zip(ours) {
            worst = worst.max((c[k] - o).abs());
        }
    }
    eprintln!(
        "FMPy (FMI 3.0) vs Rust evaluation: max |difference| = {worst:e} over {} rows",
        t.len()
    );
    assert!(worst <= 1e-9, "max difference {worst:e}");
    // the run is not trivial: P fell in the dip and the flag rose and stayed up
    let k_dip = t.iter().position(|&x| x > 0.1).unwrap();
    assert!(cols[2][k_dip] < 0.5, "P in the dip {}", cols[2][k_dip]);
    assert_eq!(cols[4][40], 0.0);
    assert_eq!(cols[4][t.len() - 1], 1.0);
}

#[test]
fn fmi3_bad_calls_return_errors_and_log_a_line_naming_the_call() {
    let e = export3(&test_model());
    let api = Api3::load(&e);
    let path = resource_path(&e.root);

    let wrong = Instance3::new(&api, Some("a"), "{0000}", &path)
        .err()
        .unwrap();
    assert!(
        wrong
            .iter()
            .any(|l| l
                .contains("fmi3InstantiateCoSimulation: instantiationToken {0000} does not match")),
        "{wrong:?}"
    );
    let no_name = Instance3::new(&api, None, &e.token, &path).err().unwrap();
    assert!(
        no_name.iter().any(|l| l.contains("instanceName is NULL")),
        "{no_name:?}"
    );

    let u = Instance3::open(&api, &e);
    // a get in the instantiated state
    let mut x = 0.0;
    let s = unsafe { (api.get_f64)(u.i, &I_RE, 1, &mut x, 1) };
    assert_eq!(s, ERROR);
    assert!(
        u.lines().iter().any(|l| l.contains(
            "fmi3GetFloat64: called in state Instantiated; the FMI 3.0 Co-Simulation state machine"
        )),
        "{:?}",
        u.lines()
    );
    drop(u);

    // doStep before initialisation
    let u = Instance3::open(&api, &e);
    assert_eq!(u.step(0.0, 1e-3).0, ERROR);
    assert!(u
        .lines()
        .iter()
        .any(|l| l.contains("fmi3DoStep: called in state Instantiated")));
    drop(u);

    // a zero-length step after initialisation; lastSuccessfulTime stays at the start
    let u = Instance3::open(&api, &e);
    u.initialise(C64::new(1.0, 0.05));
    let (s, last) = u.step(0.0, 0.0);
    assert_eq!(s, ERROR);
    assert_eq!(last, 0.0);
    assert!(
        u.lines()
            .iter()
            .any(|l| l.contains("fmi3DoStep: communicationStepSize = 0")),
        "{:?}",
        u.lines()
    );
    drop(u);

    // an unclaimed capability
    let u = Instance3::open(&api, &e);
    u.initialise(C64::new(1.0, 0.05));
    assert_eq!(unsafe { (api.enter_event_mode)(u.i) }, ERROR);
    assert!(u.lines().iter().any(|l| l.contains(
        "fmi3EnterEventMode: not supported: the model description declares hasEventMode=\"false\""
    )));
}

#[test]
fn fmi3_get_float64_answers_time_and_outputs_in_one_call() {
    // FMI 3.0 standard (from memory): the independent variable `time` has a value reference
    // and is read with fmi3GetFloat64 like any other Float64, here mixed with outputs
    let e = export3(&test_model());
    let api = Api3::load(&e);
    let u = Instance3::open(&api, &e);
    u.initialise(C64::new(1.0, 0.05));
    let last = *u.run(0.0, 1e-3, 30, dip(0.3)).last().unwrap();
    let refs = [P, understudy::runtime::fmi3::TIME_VR, Q, V_RE, I_RE];
    let mut values = [f64::NAN; 5];
    assert_eq!(
        unsafe { (api.get_f64)(u.i, refs.as_ptr(), 5, values.as_mut_ptr(), 5) },
        OK
    );
    assert!((values[1] - 0.03).abs() < 1e-12, "time {}", values[1]);
    assert_eq!(values[0].to_bits(), last[2].to_bits());
    assert_eq!(values[2].to_bits(), last[3].to_bits());
    assert_eq!(values[4].to_bits(), last[0].to_bits());
    assert!(values[3].is_finite());
}

#[test]
fn fmi3_state_restores_a_trajectory_and_survives_serialisation() {
    let e = export3(&test_model());
    let api = Api3::load(&e);
    let h = 1e-3;
    let a = Instance3::open(&api, &e);
    a.initialise(C64::new(1.0, 0.05));
    a.run(0.0, h, 40, dip(0.3));
    let mut state: *mut c_void = std::ptr::null_mut();
    assert_eq!(unsafe { (api.get_state)(a.i, &mut state) }, OK);
    let first = a.run(0.04, h, 80, dip(0.3));
    assert_eq!(unsafe { (api.set_state)(a.i, state) }, OK);
    let again = a.run(0.04, h, 80, dip(0.3));
    assert_eq!(bits(&first), bits(&again), "get/set state restores exactly");

    // serialise → deserialise into a fresh instance → continue = the uninterrupted run
    let mut size = 0usize;
    assert_eq!(unsafe { (api.state_size)(a.i, state, &mut size) }, OK);
    let mut buf = vec![0u8; size];
    assert_eq!(
        unsafe { (api.serialize)(a.i, state, buf.as_mut_ptr(), size) },
        OK
    );
    let b = Instance3::open(&api, &e);
    let mut restored: *mut c_void = std::ptr::null_mut();
    assert_eq!(
        unsafe { (api.deserialize)(b.i, buf.as_ptr(), size, &mut restored) },
        OK,
        "{:?}",
        b.lines()
    );
    assert_eq!(unsafe { (api.set_state)(b.i, restored) }, OK);
    let resumed = b.run(0.04, h, 80, dip(0.3));
    assert_eq!(
        bits(&first),
        bits(&resumed),
        "serialised state resumes exactly"
    );
    unsafe {
        assert_eq!((api.free_state)(a.i, &mut state), OK);
        assert_eq!((api.free_state)(b.i, &mut restored), OK);
    }
    assert!(state.is_null() && restored.is_null());
}

/// Resident set size of this process (bytes), from /proc/self/statm (proc(5)).
fn rss_bytes() -> u64 {
    let statm = std::fs::read_to_string("/proc/self/statm").unwrap();
    let pages: u64 = statm.split_whitespace().nth(1).unwrap().parse().unwrap();
    pages * 4096
}

const MEMORY_CHILD: &str = "UNDERSTUDY_MEMORY_CHILD";

#[test]
fn a_thousand_instantiate_free_cycles_do_not_grow_memory() {
    // RSS is per process and other tests run on other threads: the measurement runs in a
    // child process of this test binary that runs only this test.
    if std::env::var_os(MEMORY_CHILD).is_none() {
        let out = std::process::Command::new(std::env::current_exe().unwrap())
            .args([
                "fmi3::a_thousand_instantiate_free_cycles_do_not_grow_memory",
                "--exact",
                "--test-threads=1",
                "--nocapture",
            ])
            .env(MEMORY_CHILD, "1")
            .output()
            .unwrap();
        let text = String::from_utf8_lossy(&out.stderr).to_string()
            + &String::from_utf8_lossy(&out.stdout);
        eprintln!("{text}");
        assert!(out.status.success(), "the measuring child failed:\n{text}");
        assert!(text.contains("1 passed"), "the child ran no test:\n{text}");
        return;
    }
    let model = test_model();
    let e3 = export3(&model);
    let api3 = Api3::load(&e3);
    let e2 = fmi::export(&model);
    let api2 = fmi::Api::load(&e2);
    let cycle3 = || {
        let u = Instance3::open(&api3, &e3);
        u.initialise(C64::new(1.0, 0.05));
        assert_eq!(u.step(0.0, 1e-3).0, OK);
    };
    let cycle2 = || {
        let u = fmi::Instance::open(&api2, &e2, "m2");
        u.initialise(C64::new(1.0, 0.05));
    };
    // warm up: the allocator's pools and the libraries' lazy data settle first
    for _ in 0..100 {
        cycle3();
        cycle2();
    }
    let before = rss_bytes();
    for _ in 0..1000 {
        cycle3();
    }
    let after3 = rss_bytes();
    for _ in 0..1000 {
        cycle2();
    }
    let after2 = rss_bytes();
    let g3 = after3 as i64 - before as i64;
    let g2 = after2 as i64 - after3 as i64;
    eprintln!("RSS growth over 1000 cycles: FMI 3.0 {g3} B, FMI 2.0 {g2} B");
    // an instance holds the model file and its state (several kB): leaking one per cycle
    // would grow RSS by megabytes; 256 KiB allows for allocator noise (common practice)
    assert!(g3 < 256 * 1024, "FMI 3.0: RSS grew by {g3} B");
    assert!(g2 < 256 * 1024, "FMI 2.0: RSS grew by {g2} B");
}

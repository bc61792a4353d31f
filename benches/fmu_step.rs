//! doStep of an exported FMU through the C ABI (FMI 3.0, loaded with libloading) at the model's
//! natural communication step, against the detailed full-converter model's own simulation of
//! the same fault, measured in one run.
//!
//! Reports: median wall time per fmi3DoStep call, simulated seconds per wall second of the FMU
//! and of the detailed model's native simulation, and their ratio.
//!
//! The FMU's model comes from `model_to_measure`: a model file given by
//! `UNDERSTUDY_BENCH_MODEL=path/to/model.json` (e.g. the surrogate's), otherwise the detailed
//! full-converter model file, so today the ratio compares the detailed model inside an FMU
//! with the detailed model's native simulation.
//!
//! `cargo bench --bench fmu_step` measures 2 simulated seconds; under `cargo test` (no
//! `--bench` argument) it runs a 0.3 s smoke pass.

use std::ffi::{c_char, c_void, CString};
use std::path::Path;
use std::time::Instant;
use understudy::fmi::{export_fmu, FmiVersion};
use understudy::runtime::cosim::{Bases, ModelFile};
use understudy::runtime::ode::{integrate, Method};
use understudy::runtime::unit::full_converter::{FullConverter, FullConverterParams};
use understudy::runtime::unit::{Disturbance, GridEquivalent, OperatingPoint, C64};

/// The fault both sides see: the terminal voltage falls to `retained` pu from `start_s` for
/// `duration_s`.
#[derive(Clone, Copy)]
struct Fault {
    start_s: f64,
    duration_s: f64,
    retained: f64,
}

/// The model the FMU carries (see the module documentation).
fn model_to_measure() -> ModelFile {
    match std::env::var_os("UNDERSTUDY_BENCH_MODEL") {
        Some(p) => {
            let bytes = std::fs::read(&p).expect("UNDERSTUDY_BENCH_MODEL is readable");
            ModelFile::from_json(&bytes).expect("UNDERSTUDY_BENCH_MODEL is a model file")
        }
        None => ModelFile::full_converter(
            "bench_detailed",
            FullConverterParams::default(),
            Bases {
                s_base_mva: 5.0,
                v_base_kv: 0.69,
            },
        ),
    }
}

type Inst = *mut c_void;

unsafe extern "C" fn quiet(_: *mut c_void, _: i32, _: *const c_char, _: *const c_char) {}

/// (median s per doStep, simulated s per wall s) of the model's FMU over `duration_s`.
fn measure_fmu(model: &ModelFile, fault: Fault, duration_s: f64) -> (f64, f64) {
    let dir = tempfile::tempdir().unwrap();
    let fmu = dir.path().join("bench.fmu");
    let report = export_fmu(model, &fmu, FmiVersion::V3).expect("export");
    let root = dir.path().join("unpacked");
    zip::ZipArchive::new(std::fs::File::open(&fmu).unwrap())
        .unwrap()
        .extract(&root)
        .unwrap();
    let so = root
        .join("binaries/x86_64-linux")
        .join(format!("{}.so", report.model_identifier));
    unsafe { run_fmu(&so, &root, &report.guid, model, fault, duration_s) }
}

unsafe fn run_fmu(
    so: &Path,
    root: &Path,
    token: &str,
    model: &ModelFile,
    fault: Fault,
    duration_s: f64,
) -> (f64, f64) {
    let lib = libloading::Library::new(so).expect("the FMU's library loads");
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
        Option<unsafe extern "C" fn(*mut c_void, i32, *const c_char, *const c_char)>,
        *const c_void,
    ) -> Inst;
    let instantiate: libloading::Symbol<Instantiate> =
        lib.get(b"fmi3InstantiateCoSimulation\0").unwrap();
    let enter: libloading::Symbol<unsafe extern "C" fn(Inst, bool, f64, f64, bool, f64) -> i32> =
        lib.get(b"fmi3EnterInitializationMode\0").unwrap();
    let exit: libloading::Symbol<unsafe extern "C" fn(Inst) -> i32> =
        lib.get(b"fmi3ExitInitializationMode\0").unwrap();
    let set: libloading::Symbol<
        unsafe extern "C" fn(Inst, *const u32, usize, *const f64, usize) -> i32,
    > = lib.get(b"fmi3SetFloat64\0").unwrap();
    type DoStep = unsafe extern "C" fn(
        Inst,
        f64,
        f64,
        bool,
        *mut bool,
        *mut bool,
        *mut bool,
        *mut f64,
    ) -> i32;
    let do_step: libloading::Symbol<DoStep> = lib.get(b"fmi3DoStep\0").unwrap();
    let free: libloading::Symbol<unsafe extern "C" fn(Inst)> =
        lib.get(b"fmi3FreeInstance\0").unwrap();

    let name = CString::new("bench").unwrap();
    let token = CString::new(token).unwrap();
    let path = CString::new(format!("{}/", root.join("resources").display())).unwrap();
    let i = instantiate(
        name.as_ptr(),
        token.as_ptr(),
        path.as_ptr(),
        false,
        false,
        false,
        false,
        std::ptr::null(),
        0,
        std::ptr::null_mut(),
        Some(quiet),
        std::ptr::null(),
    );
    assert!(!i.is_null());
    let refs = [0u32, 1];
    let v0 = C64::new(1.0, 0.0);
    let vf = C64::new(fault.retained, 0.0);
    assert_eq!(enter(i, false, 0.0, 0.0, false, 0.0), 0);
    assert_eq!(set(i, refs.as_ptr(), 2, [v0.re, v0.im].as_ptr(), 2), 0);
    assert_eq!(exit(i), 0);
    let h = model.communication_step_s;
    let n = (duration_s / h).round() as usize;
    let mut per_call = Vec::with_capacity(n);
    let wall = Instant::now();
    for k in 0..n {
        let t = k as f64 * h;
        let v = if (fault.start_s..fault.start_s + fault.duration_s).contains(&t) {
            vf
        } else {
            v0
        };
        assert_eq!(set(i, refs.as_ptr(), 2, [v.re, v.im].as_ptr(), 2), 0);
        let (mut a, mut b, mut c, mut last) = (false, false, false, 0.0);
        let start = Instant::now();
        let s = do_step(i, t, h, true, &mut a, &mut b, &mut c, &mut last);
        per_call.push(start.elapsed().as_secs_f64());
        assert_eq!(s, 0, "fmi3DoStep failed at t = {t} s");
    }
    let total = wall.elapsed().as_secs_f64();
    free(i);
    per_call.sort_by(f64::total_cmp);
    (per_call[n / 2], n as f64 * h / total)
}

/// Simulated s per wall s of the detailed model's own simulation (RK4 at 50 µs, the
/// detailed model's native step) of the same fault behind a stiff grid (SCR 5).
fn measure_detailed(fault: Fault, duration_s: f64) -> f64 {
    let wall = Instant::now();
    let (mut unit, mut x) = FullConverter::initialise(
        FullConverterParams::default(),
        &OperatingPoint::new(0.8, 0.0),
        &GridEquivalent {
            scr: 5.0,
            x_over_r: 10.0,
        },
        &Disturbance::Fault {
            start_s: fault.start_s,
            duration_s: fault.duration_s,
            retained_voltage: fault.retained,
        },
    )
    .unwrap();
    let bp = unit.breakpoints_s();
    integrate(
        &mut unit,
        &mut x,
        0.0,
        duration_s,
        1e-3,
        &bp,
        &Method::Rk4 { step_s: 5e-5 },
        |_, _, _| {},
    )
    .unwrap();
    duration_s / wall.elapsed().as_secs_f64()
}

fn main() {
    let full = std::env::args().any(|a| a == "--bench");
    let duration_s = if full { 2.0 } else { 0.3 };
    let fault = Fault {
        start_s: 0.1,
        duration_s: 0.15,
        retained: 0.2,
    };
    let model = model_to_measure();
    let (median, fmu_rate) = measure_fmu(&model, fault, duration_s);
    let detailed_rate = measure_detailed(fault, duration_s);
    println!(
        "FMU `{}` (FMI 3.0, C ABI), step {} s, {duration_s} s simulated: median fmi3DoStep {:.2} µs, {:.1} simulated s per wall s",
        model.name,
        model.communication_step_s,
        median * 1e6,
        fmu_rate
    );
    println!(
        "detailed full-converter model, native simulation (RK4 50 µs): {detailed_rate:.1} simulated s per wall s"
    );
    println!(
        "ratio FMU / detailed native: {:.2}x",
        fmu_rate / detailed_rate
    );
}

//! doStep of an exported FMU through the C ABI (FMI 3.0, loaded with libloading) against the
//! detailed full-converter model's own simulation of the same fault, measured in one run.
//!
//! Reports, per host communication step: simulated seconds per wall second of the FMU (a
//! host's loop: fmi3SetFloat64 of the inputs, fmi3GetFloat64 of the four outputs, fmi3DoStep,
//! and nothing else timed inside it) and of the detailed model's native simulation (RK4 at its
//! 50 µs step, whatever the host's step), their ratio, the wall time per host step, and the
//! median fmi3DoStep call (from a second run in which every doStep is timed). Both rates leave
//! out what is paid once per run — the FMU's instantiation and initialisation, the detailed
//! model's steady-state initialisation — and these are reported beside them. Each figure is the
//! median of `REPEATS` runs, FMU and detailed interleaved, so a load change on a shared machine
//! hits both sides alike.
//!
//! The FMU's model comes from `model_to_measure`: a model file given by
//! `UNDERSTUDY_BENCH_MODEL=path/to/model.json` (e.g. the stand-in's), otherwise the detailed
//! full-converter model file. Host steps: `UNDERSTUDY_BENCH_STEPS=0.001,0.01` (s), default the
//! model's natural step (its DefaultExperiment step) and 10 ms (a usual RMS simulator step,
//! common practice).
//!
//! `cargo bench --bench fmu_step` measures 10 simulated seconds (a usual length for a
//! transient-stability run, common practice); under `cargo test` (no `--bench` argument) it
//! runs a 0.3 s smoke pass.

use std::ffi::{c_char, c_void, CString};
use std::path::Path;
use std::time::Instant;
use understudy::fmi::{export_fmu, FmiVersion};
use understudy::runtime::cosim::{Bases, CoSimModel, ModelFile};
use understudy::runtime::ode::{integrate, Method};
use understudy::runtime::unit::full_converter::{FullConverter, FullConverterParams};
use understudy::runtime::unit::{Disturbance, GridEquivalent, OperatingPoint, C64};
use understudy::runtime::variables::vr;

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

/// One timed run of the FMU.
#[derive(Clone, Copy)]
struct Measured {
    median_do_step_s: f64,
    /// wall time per host step: set inputs, get outputs, doStep
    per_host_step_s: f64,
    /// simulated s per wall s of the stepping (set, get, doStep), setup excluded
    rate: f64,
    /// instantiation and initialisation (s), paid once per run
    setup_s: f64,
}

/// The FMU of `model`, exported and unpacked once for all runs.
struct Exported {
    _dir: tempfile::TempDir,
    so: std::path::PathBuf,
    root: std::path::PathBuf,
    guid: String,
}

fn export(model: &ModelFile) -> Exported {
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
    Exported {
        _dir: dir,
        so,
        root,
        guid: report.guid,
    }
}

fn measure_fmu(fmu: &Exported, h: f64, fault: Fault, duration_s: f64) -> Measured {
    // SAFETY: the library is the runtime we just exported, called as FMI 3.0 prescribes
    unsafe { run_fmu(&fmu.so, &fmu.root, &fmu.guid, h, fault, duration_s) }
}

unsafe fn run_fmu(
    so: &Path,
    root: &Path,
    token: &str,
    h: f64,
    fault: Fault,
    duration_s: f64,
) -> Measured {
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
    let get: libloading::Symbol<
        unsafe extern "C" fn(Inst, *const u32, usize, *mut f64, usize) -> i32,
    > = lib.get(b"fmi3GetFloat64\0").unwrap();
    let refs = [vr::V_RE, vr::V_IM];
    let outs = [vr::I_RE, vr::I_IM, vr::P, vr::Q];
    let v0 = C64::new(1.0, 0.0);
    let vf = C64::new(fault.retained, 0.0);
    // a new instance, initialised at the pre-fault voltage
    let start = || {
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
        assert_eq!(enter(i, false, 0.0, 0.0, false, 0.0), 0);
        assert_eq!(set(i, refs.as_ptr(), 2, [v0.re, v0.im].as_ptr(), 2), 0);
        assert_eq!(exit(i), 0);
        i
    };
    let n = (duration_s / h).round() as usize;
    // a host's loop over the whole run; with `timed`, each doStep's wall time is pushed there
    let run = |i: Inst, mut timed: Option<&mut Vec<f64>>| {
        let mut y = [0.0; 4];
        for k in 0..n {
            let t = k as f64 * h;
            let v = if (fault.start_s..fault.start_s + fault.duration_s).contains(&t) {
                vf
            } else {
                v0
            };
            assert_eq!(set(i, refs.as_ptr(), 2, [v.re, v.im].as_ptr(), 2), 0);
            assert_eq!(get(i, outs.as_ptr(), 4, y.as_mut_ptr(), 4), 0);
            let (mut a, mut b, mut c, mut last) = (false, false, false, 0.0);
            let clock = timed.is_some().then(Instant::now);
            let s = do_step(i, t, h, true, &mut a, &mut b, &mut c, &mut last);
            if let (Some(times), Some(clock)) = (timed.as_deref_mut(), clock) {
                times.push(clock.elapsed().as_secs_f64());
            }
            assert_eq!(s, 0, "fmi3DoStep failed at t = {t} s");
        }
        std::hint::black_box(y);
    };
    // the rate: a host's loop with nothing else in it
    let setup = Instant::now();
    let i = start();
    let setup_s = setup.elapsed().as_secs_f64();
    let wall = Instant::now();
    run(i, None);
    let total = wall.elapsed().as_secs_f64();
    free(i);
    // the median fmi3DoStep: the same run again in a new instance, each doStep timed (the
    // clock reads stay out of the rate above)
    let i = start();
    let mut per_call = Vec::with_capacity(n);
    run(i, Some(&mut per_call));
    free(i);
    per_call.sort_by(f64::total_cmp);
    Measured {
        median_do_step_s: per_call[n / 2],
        per_host_step_s: total / n as f64,
        rate: n as f64 * h / total,
        setup_s,
    }
}

/// Wall time per host step of the same model and the same host loop called directly in Rust
/// (no C ABI: inputs set, outputs got, step), the FMU's own code without the FMI calls around it.
fn measure_native(model: &ModelFile, h: f64, fault: Fault, duration_s: f64) -> f64 {
    let mut m = model.build().expect("the model builds");
    let mut inputs = model.start.inputs;
    inputs.v_re = 1.0;
    inputs.v_im = 0.0;
    m.initialise(&inputs, &model.start.setpoints)
        .expect("initialises");
    let n = (duration_s / h).round() as usize;
    let wall = Instant::now();
    let mut y = 0.0;
    for k in 0..n {
        let t = k as f64 * h;
        inputs.v_re = if (fault.start_s..fault.start_s + fault.duration_s).contains(&t) {
            fault.retained
        } else {
            1.0
        };
        y += m.outputs(&inputs).expect("outputs").p;
        m.do_step(t, h, &inputs).expect("steps");
    }
    std::hint::black_box(y);
    wall.elapsed().as_secs_f64() / n as f64
}

/// Simulated s per wall s of the detailed model's own simulation (RK4 at 50 µs, the
/// detailed model's native step) of the same fault behind a stiff grid (SCR 5).
fn measure_detailed(fault: Fault, duration_s: f64) -> Detailed {
    let setup = Instant::now();
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
    let setup_s = setup.elapsed().as_secs_f64();
    let wall = Instant::now();
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
    Detailed {
        rate: duration_s / wall.elapsed().as_secs_f64(),
        setup_s,
    }
}

/// One timed run of the detailed model.
#[derive(Clone, Copy)]
struct Detailed {
    /// simulated s per wall s of the integration, initialisation excluded
    rate: f64,
    /// initialisation to steady state (s)
    setup_s: f64,
}

/// Interleaved repeats per host step.
const REPEATS: usize = 5;

fn median(mut v: Vec<f64>) -> f64 {
    v.sort_by(f64::total_cmp);
    v[v.len() / 2]
}

fn main() {
    let full = std::env::args().any(|a| a == "--bench");
    let duration_s = if full { 10.0 } else { 0.3 };
    let repeats = if full { REPEATS } else { 1 };
    let fault = Fault {
        start_s: 0.1,
        duration_s: 0.15,
        retained: 0.2,
    };
    let model = model_to_measure();
    let steps: Vec<f64> = match std::env::var("UNDERSTUDY_BENCH_STEPS") {
        Ok(list) => list
            .split(',')
            .map(|s| s.trim().parse().expect("UNDERSTUDY_BENCH_STEPS: seconds"))
            .collect(),
        Err(_) => {
            let mut s = vec![model.communication_step_s];
            if (model.communication_step_s - 0.01).abs() > 1e-12 {
                s.push(0.01);
            }
            s
        }
    };
    let fmu = export(&model);
    println!(
        "FMU `{}` (FMI 3.0, C ABI) vs the detailed full-converter model's native simulation (RK4 \
         at 50 µs, whatever the host step), {duration_s} s with a {} s fault to {} pu, median of \
         {repeats} interleaved runs each",
        model.name, fault.duration_s, fault.retained
    );
    for h in steps {
        let mut runs = Vec::new();
        let mut detailed = Vec::new();
        let mut native = Vec::new();
        for _ in 0..repeats {
            runs.push(measure_fmu(&fmu, h, fault, duration_s));
            detailed.push(measure_detailed(fault, duration_s));
            native.push(measure_native(&model, h, fault, duration_s));
        }
        let fmu_rate = median(runs.iter().map(|m| m.rate).collect());
        let detailed_rate = median(detailed.iter().map(|d| d.rate).collect());
        println!(
            "host step {:>6.1} ms: FMU median fmi3DoStep {:8.2} µs, per host step (set + get + \
             doStep) {:8.2} µs, {:9.1} simulated s per wall s | detailed {:6.1} simulated s per \
             wall s | ratio FMU / detailed {:7.1}x | setup (once per run): FMU {:.2} ms, detailed {:.2} ms",
            h * 1e3,
            median(runs.iter().map(|m| m.median_do_step_s).collect()) * 1e6,
            median(runs.iter().map(|m| m.per_host_step_s).collect()) * 1e6,
            fmu_rate,
            detailed_rate,
            fmu_rate / detailed_rate,
            median(runs.iter().map(|m| m.setup_s).collect()) * 1e3,
            median(detailed.iter().map(|d| d.setup_s).collect()) * 1e3
        );
        // where the time of a host step goes, against what 100× would allow
        let per_host_step = median(runs.iter().map(|m| m.per_host_step_s).collect());
        let native = median(native);
        println!(
            "    the same loop without the C ABI: {:.2} µs per host step (the FMI calls add {:.2} \
             µs); the detailed model takes {:.2} µs per host step, so 100x would allow {:.3} µs",
            native * 1e6,
            (per_host_step - native) * 1e6,
            h / detailed_rate * 1e6,
            h / detailed_rate / 100.0 * 1e6
        );
    }
}

//! The FMU importer, `understudy check` and the black-box FMU source.
//!
//! External checks: FMPy (PyPI `fmpy`, `fmpy.simulate_fmu`) is the independent importer our
//! outputs must equal (1e-12) on the same FMU and inputs, for an FMU of ours and for one built by
//! a different exporter (PyPI `pythonfmu`, `pythonfmu build`).

use crate::common;
use serde_json::json;
use std::io::Write;
use std::path::{Path, PathBuf};
use std::process::Command;
use understudy::fmi::import::{self, description, Causality, FmiMajor, Fmu, LoadOptions};
use understudy::fmi::{export_fmu, FmiVersion};
use understudy::runtime::cosim::{Bases, ModelFile};
use understudy::runtime::unit::full_converter::FullConverterParams;
use understudy::runtime::unit::C64;
use understudy::signal::trace::Trace;

fn test_model() -> ModelFile {
    let mut m = ModelFile::full_converter(
        "import_test_unit",
        FullConverterParams::default(),
        Bases {
            s_base_mva: 5.0,
            v_base_kv: 0.69,
        },
    );
    m.start.inputs.v_im = 0.05;
    m
}

fn export(dir: &Path, version: FmiVersion) -> PathBuf {
    let fmu = dir.join("unit.fmu");
    export_fmu(&test_model(), &fmu, version).expect("export succeeds");
    fmu
}

/// The dip input table of the FMPy comparison: 0.3 pu with a −20° jump from 50 to 150 ms.
fn dip_table() -> serde_json::Value {
    let v0 = C64::new(1.0, 0.05);
    let vd = C64::from_polar(0.3, (2.862f64 - 20.0).to_radians());
    json!([
        [0.0, v0.re, v0.im],
        [0.05, v0.re, v0.im],
        [0.05, vd.re, vd.im],
        [0.15, vd.re, vd.im],
        [0.15, v0.re, v0.im],
        [0.2, v0.re, v0.im],
    ])
}

fn col(r: &serde_json::Value, name: &str) -> Vec<f64> {
    r[name]
        .as_array()
        .unwrap_or_else(|| panic!("no column {name}"))
        .iter()
        .map(|v| v.as_f64().unwrap())
        .collect()
}

/// Replay FMPy's run with our importer: the inputs FMPy held over each step (it records them in
/// the row after the step), setpoints as FMPy set them; returns the largest difference of the
/// Real outputs and the number of values compared.
fn replay_against_fmpy(fmu: &Fmu, r: &serde_json::Value, setpoints: [f64; 2]) -> (f64, usize) {
    let t = col(r, "time");
    let (v_re, v_im) = (col(r, "v_re"), col(r, "v_im"));
    let names = ["i_re", "i_im", "p", "q"];
    let theirs: Vec<Vec<f64>> = names.iter().map(|n| col(r, n)).collect();
    let flag = col(r, "out_of_envelope");
    let mut inst = fmu.instantiate("replay").unwrap();
    inst.set_real_by_name(&["p_ref", "q_ref"], &setpoints)
        .unwrap();
    inst.set_real_by_name(&["v_re", "v_im", "f_grid"], &[v_re[0], v_im[0], 1.0])
        .unwrap();
    inst.enter_initialization(None, 0.0, Some(t[t.len() - 1]))
        .unwrap();
    inst.exit_initialization().unwrap();
    let mut worst = 0.0f64;
    let mut compared = 0;
    for k in 0..t.len() {
        if k > 0 {
            inst.set_real_by_name(&["v_re", "v_im"], &[v_re[k], v_im[k]])
                .unwrap();
            inst.do_step(t[k - 1], t[k] - t[k - 1]).unwrap();
        }
        let ours = inst.get_real_by_name(&names).unwrap();
        for (j, o) in ours.iter().enumerate() {
            worst = worst.max((o - theirs[j][k]).abs());
            compared += 1;
        }
        let up = inst.get_boolean_by_name(&["out_of_envelope"]).unwrap()[0];
        assert_eq!(
            f64::from(u8::from(up)),
            flag[k],
            "out_of_envelope at row {k}"
        );
    }
    (worst, compared)
}

#[test]
fn importer_equals_fmpy_on_our_fmu() {
    // Reference: FMPy (fmpy.simulate_fmu, CoSimulation) on the same FMU and inputs; requirement:
    // every Real output equal within 1e-12.
    let dir = tempfile::tempdir().unwrap();
    let path = export(dir.path(), FmiVersion::V2);
    let fmu = Fmu::load(&path).unwrap();
    assert!(fmu.warnings().is_empty(), "{:?}", fmu.warnings());
    let md = fmu.description();
    assert_eq!(md.fmi_version, FmiMajor::V2);
    assert!(md.co_simulation.can_get_and_set_fmu_state);
    assert_eq!(fmu.variable("i_re").unwrap().causality, Causality::Output);
    assert_eq!(
        fmu.variable("v_base_kv").unwrap().unit.as_deref(),
        Some("kV")
    );
    let Some(r) = common::run_reference(
        "fmi_check.py",
        &json!({"fmu": path, "stop_time": 0.2, "step": 1e-3, "input": dip_table(),
                "start_values": {"p_ref": 0.8, "q_ref": 0.1}}),
    ) else {
        return;
    };
    let (worst, n) = replay_against_fmpy(&fmu, &r, [0.8, 0.1]);
    eprintln!("importer vs FMPy (our FMU): max |difference| = {worst:e} over {n} values");
    assert!(worst <= 1e-12, "max difference {worst:e}");
    // not a trivial run: P fell in the dip
    let p = col(&r, "p");
    assert!(
        p[100] < 0.5 && (p[0] - 0.8).abs() < 1e-9,
        "P {} → {}",
        p[0],
        p[100]
    );
}

/// The reference venv's libpython and site-packages (pythonfmu FMUs embed that interpreter).
fn python_paths(python: &Path) -> (PathBuf, PathBuf) {
    let out = Command::new(python)
        .args([
            "-c",
            "import sysconfig, pythonfmu, os; \
             print(os.path.join(sysconfig.get_config_var('LIBDIR'), sysconfig.get_config_var('LDLIBRARY'))); \
             print(os.path.dirname(os.path.dirname(pythonfmu.__file__)))",
        ])
        .output()
        .unwrap();
    assert!(
        out.status.success(),
        "the reference venv lacks pythonfmu (build-scripts/reference-env): {}",
        String::from_utf8_lossy(&out.stderr)
    );
    let text = String::from_utf8(out.stdout).unwrap();
    let mut lines = text.lines();
    (
        PathBuf::from(lines.next().unwrap()),
        PathBuf::from(lines.next().unwrap()),
    )
}

/// A tiny pythonfmu slave with our terminal interface: the current follows conj(S_ref / v) with
/// a 20 ms lag (explicit Euler per communication step); P, Q = v·conj(i).
const PYTHON_SLAVE: &str = r#"
import sys
sys.path.insert(0, SITE_PACKAGES)
from pythonfmu import Fmi2Causality, Fmi2Slave, Fmi2Variability, Real, Boolean


class LagUnit(Fmi2Slave):
    author = "understudy tests"
    description = "first-order current source behind the terminal"

    def __init__(self, **kwargs):
        super().__init__(**kwargs)
        self.v_re = 1.0
        self.v_im = 0.05
        self.f_grid = 1.0
        self.p_ref = 0.8
        self.q_ref = 0.0
        self.i_re = 0.0
        self.i_im = 0.0
        self.p = 0.0
        self.q = 0.0
        self.out_of_envelope = False
        self.started = False
        for name in ("v_re", "v_im", "f_grid"):
            self.register_variable(Real(name, causality=Fmi2Causality.input))
        for name in ("p_ref", "q_ref"):
            self.register_variable(Real(name, causality=Fmi2Causality.parameter, variability=Fmi2Variability.tunable))
        for name in ("i_re", "i_im", "p", "q"):
            self.register_variable(Real(name, causality=Fmi2Causality.output))
        self.register_variable(Boolean("out_of_envelope", causality=Fmi2Causality.output, variability=Fmi2Variability.discrete))

    def _target(self):
        v = complex(self.v_re, self.v_im)
        return (complex(self.p_ref, self.q_ref) / v).conjugate()

    def _outputs(self):
        s = complex(self.v_re, self.v_im) * complex(self.i_re, -self.i_im)
        self.p, self.q = s.real, s.imag
        self.out_of_envelope = self.out_of_envelope or abs(complex(self.v_re, self.v_im)) < 0.5

    def exit_initialization_mode(self):
        i = self._target()
        self.i_re, self.i_im = i.real, i.imag
        self._outputs()

    def do_step(self, current_time, step_size):
        if CRASH and current_time > 0.01:
            import os
            os.abort()
        i = complex(self.i_re, self.i_im)
        i = i + (self._target() - i) * (step_size / 0.02)
        self.i_re, self.i_im = i.real, i.imag
        self._outputs()
        return True
"#;

/// Build the slave with `pythonfmu build`; returns the FMU's path.
fn build_python_fmu(python: &Path, dir: &Path, site: &Path, crash: bool) -> PathBuf {
    let script = dir.join("lag_unit.py");
    let text = PYTHON_SLAVE
        .replace(
            "SITE_PACKAGES",
            &format!("{:?}", site.display().to_string()),
        )
        .replace("CRASH", if crash { "True" } else { "False" });
    std::fs::write(&script, text).unwrap();
    let out = Command::new(python)
        .args(["-m", "pythonfmu", "build", "-f"])
        .arg(&script)
        .arg("-d")
        .arg(dir)
        .output()
        .unwrap();
    assert!(
        out.status.success(),
        "pythonfmu build failed: {}{}",
        String::from_utf8_lossy(&out.stdout),
        String::from_utf8_lossy(&out.stderr)
    );
    let fmu = dir.join("LagUnit.fmu");
    assert!(
        fmu.exists(),
        "pythonfmu wrote no LagUnit.fmu in {}",
        dir.display()
    );
    fmu
}

#[test]
fn importer_equals_fmpy_on_a_pythonfmu_slave() {
    // Reference: FMPy (fmpy.simulate_fmu) on an FMU built by another exporter (PyPI pythonfmu,
    // `pythonfmu build`); requirement: every Real output equal within 1e-12. pythonfmu's binary
    // leaves the Python C API undefined: we preload the venv's libpython with RTLD_GLOBAL
    // (LoadOptions::with_preload), and the slave script puts the venv's site-packages on
    // sys.path itself so the embedded interpreter finds pythonfmu.
    let Some(python) = common::reference_python() else {
        if std::env::var_os("CI").is_some() {
            panic!("reference environment missing");
        }
        eprintln!("SKIPPED pythonfmu check: no reference environment");
        return;
    };
    let (libpython, site) = python_paths(&python);
    let dir = tempfile::tempdir().unwrap();
    let path = build_python_fmu(&python, dir.path(), &site, false);
    let r = common::run_reference(
        "fmi_check.py",
        &json!({"fmu": path, "stop_time": 0.2, "step": 1e-3, "input": dip_table(),
                "start_values": {"p_ref": 0.7, "q_ref": 0.2}}),
    )
    .expect("reference environment present");
    let fmu = Fmu::load_with(&path, &LoadOptions::default().with_preload(&libpython)).unwrap();
    assert_eq!(fmu.description().co_simulation.model_identifier, "LagUnit");
    let (worst, n) = replay_against_fmpy(&fmu, &r, [0.7, 0.2]);
    eprintln!("importer vs FMPy (pythonfmu slave): max |difference| = {worst:e} over {n} values");
    assert!(worst <= 1e-12, "max difference {worst:e}");
    let p = col(&r, "p");
    assert!(
        (p[0] - 0.7).abs() < 1e-9 && p[60] < 0.5,
        "P {} → {}",
        p[0],
        p[60]
    );
}

#[test]
fn instances_run_in_parallel_threads_like_a_serial_run() {
    let dir = tempfile::tempdir().unwrap();
    let fmu = Fmu::load(&export(dir.path(), FmiVersion::V2)).unwrap();
    let run = |depth: f64| -> Vec<f64> {
        let mut inst = fmu.instantiate(&format!("thread-{depth}")).unwrap();
        inst.enter_initialization(None, 0.0, None).unwrap();
        inst.exit_initialization().unwrap();
        let mut out = Vec::new();
        for k in 0..60 {
            let v = if (10..30).contains(&k) { depth } else { 1.0 };
            inst.set_real_by_name(&["v_re", "v_im"], &[v, 0.05])
                .unwrap();
            inst.do_step(k as f64 * 1e-3, 1e-3).unwrap();
            out.extend(inst.get_real_by_name(&["i_re", "i_im", "p", "q"]).unwrap());
        }
        out
    };
    let depths = [0.2, 0.4, 0.6, 0.8];
    let serial: Vec<Vec<f64>> = depths.iter().map(|&d| run(d)).collect();
    let parallel: Vec<Vec<f64>> = std::thread::scope(|s| {
        let handles: Vec<_> = depths.iter().map(|&d| s.spawn(move || run(d))).collect();
        handles.into_iter().map(|h| h.join().unwrap()).collect()
    });
    for (a, b) in serial.iter().zip(&parallel) {
        assert!(a.iter().zip(b).all(|(x, y)| x.to_bits() == y.to_bits()));
    }
    assert!(serial[0] != serial[3], "different dips give different runs");
}

#[test]
fn state_save_and_restore_reproduce_a_trajectory() {
    let dir = tempfile::tempdir().unwrap();
    let fmu = Fmu::load(&export(dir.path(), FmiVersion::V2)).unwrap();
    let mut inst = fmu.instantiate("state").unwrap();
    inst.enter_initialization(None, 0.0, None).unwrap();
    inst.exit_initialization().unwrap();
    inst.do_step(0.0, 1e-3).unwrap();
    let state = inst.get_state().unwrap();
    let go = |inst: &mut understudy::fmi::Instance| -> Vec<f64> {
        let mut out = Vec::new();
        for k in 1..40 {
            let v = if k < 20 { 0.4 } else { 1.0 };
            inst.set_real_by_name(&["v_re"], &[v]).unwrap();
            inst.do_step(k as f64 * 1e-3, 1e-3).unwrap();
            out.extend(inst.get_real_by_name(&["p", "q"]).unwrap());
        }
        out
    };
    let first = go(&mut inst);
    inst.set_state(&state).unwrap();
    let second = go(&mut inst);
    inst.free_state(state).unwrap();
    assert!(first
        .iter()
        .zip(&second)
        .all(|(a, b)| a.to_bits() == b.to_bits()));
    inst.terminate().unwrap();
}

#[test]
fn fmi3_fmu_of_ours_loads_steps_and_restores_state() {
    let dir = tempfile::tempdir().unwrap();
    let path = export(dir.path(), FmiVersion::V3);
    let fmu = Fmu::load(&path).unwrap();
    assert_eq!(fmu.description().fmi_version, FmiMajor::V3);
    let mut inst = fmu.instantiate("fmi3").unwrap();
    inst.set_real_by_name(&["p_ref", "q_ref"], &[0.8, 0.1])
        .unwrap();
    inst.enter_initialization(None, 0.0, None).unwrap();
    inst.exit_initialization().unwrap();
    let p0 = inst.get_real_by_name(&["p"]).unwrap()[0];
    assert!((p0 - 0.8).abs() < 1e-9, "P at start {p0}");
    let state = inst.get_state().unwrap();
    let run = |inst: &mut understudy::fmi::Instance| -> Vec<f64> {
        (0..30)
            .map(|k| {
                inst.set_real_by_name(&["v_re"], &[if k < 15 { 0.3 } else { 1.0 }])
                    .unwrap();
                let o = inst.do_step(k as f64 * 1e-3, 1e-3).unwrap();
                assert!(!o.early_return);
                inst.get_real_by_name(&["p"]).unwrap()[0]
            })
            .collect()
    };
    let first = run(&mut inst);
    assert!(first[10] < 0.5, "P in the dip {}", first[10]);
    inst.set_state(&state).unwrap();
    assert_eq!(first, run(&mut inst));
    inst.free_state(state).unwrap();
    inst.terminate().unwrap();
}

#[test]
fn a_description_with_minor_flaws_loads_with_warnings_and_fatal_flaws_are_named() {
    let xml = r#"<?xml version="1.0"?>
<fmiModelDescription fmiVersion="2.0" modelName="flawed" guid="{1}">
  <CoSimulation modelIdentifier="flawed" canGetAndSetFMUstate="yes"/>
  <ModelVariables>
    <ScalarVariable name="a" valueReference="0" causality="input"><Real start="1"/></ScalarVariable>
    <ScalarVariable name="b" causality="output"><Real/></ScalarVariable>
    <ScalarVariable name="c" valueReference="2" causality="sideways"><Real unit="pu"/></ScalarVariable>
    <ScalarVariable name="a" valueReference="3" causality="output"><Real/></ScalarVariable>
  </ModelVariables>
</fmiModelDescription>"#;
    let (md, warnings) = description::parse(xml).unwrap();
    assert_eq!(md.variables.len(), 3, "b (no valueReference) skipped");
    assert_eq!(md.variables[1].causality, Causality::Local);
    assert_eq!(md.variables[1].unit.as_deref(), Some("pu"));
    assert!(!md.co_simulation.can_get_and_set_fmu_state);
    let all = warnings.join("\n");
    for needle in [
        "\"yes\" is not a boolean",
        "`b` has no valid valueReference",
        "sideways",
        "`a` is declared more than once",
    ] {
        assert!(
            all.contains(needle),
            "missing warning {needle:?} in:\n{all}"
        );
    }
    let me_only = xml.replace(
        r#"<CoSimulation modelIdentifier="flawed" canGetAndSetFMUstate="yes"/>"#,
        r#"<ModelExchange modelIdentifier="flawed"/>"#,
    );
    let e = description::parse(&me_only).unwrap_err();
    assert!(e.0.contains("Model Exchange only"), "{}", e.0);
    let e = description::parse("<fmiModelDescription fmiVersion=\"1.0\"/>").unwrap_err();
    assert!(e.0.contains("1.0"), "{}", e.0);
    let e = description::parse("<a><b></a>").unwrap_err();
    assert!(
        e.0.contains("root element") || e.0.contains("XML"),
        "{}",
        e.0
    );
}

/// Write a zip with the given (name, bytes) entries.
fn write_zip(path: &Path, entries: &[(&str, Vec<u8>)]) {
    let mut z = zip::ZipWriter::new(std::fs::File::create(path).unwrap());
    for (name, bytes) in entries {
        z.start_file(*name, zip::write::SimpleFileOptions::default())
            .unwrap();
        z.write_all(bytes).unwrap();
    }
    z.finish().unwrap();
}

fn cli_check(dir: &Path, fmu: &Path, extra: &[&str]) -> (i32, String, String) {
    let mut args = vec!["check", fmu.to_str().unwrap()];
    args.extend_from_slice(extra);
    common::run_cli(dir, &args)
}

#[test]
fn bad_files_are_refused_with_the_file_and_the_flaw_named() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    // not a zip
    let not_zip = d.join("notes.fmu");
    std::fs::write(&not_zip, "hello").unwrap();
    // a zip without modelDescription.xml
    let no_md = d.join("empty.fmu");
    write_zip(&no_md, &[("resources/readme.txt", b"x".to_vec())]);
    // a binary for another platform only
    let ours = export(d, FmiVersion::V2);
    let mut archive = zip::ZipArchive::new(std::fs::File::open(&ours).unwrap()).unwrap();
    let mut entries = Vec::new();
    for k in 0..archive.len() {
        let mut f = archive.by_index(k).unwrap();
        if f.is_dir() {
            continue;
        }
        let mut bytes = Vec::new();
        std::io::Read::read_to_end(&mut f, &mut bytes).unwrap();
        entries.push((
            f.name()
                .unwrap()
                .replace("binaries/linux64/", "binaries/win64/"),
            bytes,
        ));
    }
    let win = d.join("win-only.fmu");
    let refs: Vec<(&str, Vec<u8>)> = entries
        .iter()
        .map(|(n, b)| (n.as_str(), b.clone()))
        .collect();
    write_zip(&win, &refs);
    // Model Exchange only
    let me = d.join("me.fmu");
    write_zip(
        &me,
        &[(
            "modelDescription.xml",
            br#"<fmiModelDescription fmiVersion="2.0" modelName="m" guid="g"><ModelExchange modelIdentifier="m"/><ModelVariables/></fmiModelDescription>"#.to_vec(),
        )],
    );
    for (file, expected) in [
        (&not_zip, "not a zip archive"),
        (&no_md, "no modelDescription.xml"),
        (&win, "no binary for this platform (linux64)"),
        (&me, "Model Exchange only"),
    ] {
        let (code, _, stderr) = cli_check(d, file, &[]);
        assert_eq!(code, 2, "{}: {stderr}", file.display());
        assert!(
            stderr.contains(file.to_str().unwrap()) && stderr.contains(expected),
            "{}: {stderr}",
            file.display()
        );
        // the library says the same
        let e = Fmu::load(file).unwrap_err().to_string();
        assert!(e.contains(expected), "{e}");
    }
    let (_, _, stderr) = cli_check(d, &win, &[]);
    assert!(stderr.contains("win64"), "lists what the FMU has: {stderr}");
}

/// A minimal FMI 2.0 CS binary in C whose doStep crashes (SIGSEGV) or returns fmi2Fatal.
const CRASHING_C: &str = r#"
#include <stddef.h>
typedef void* C;
static int dummy;
C fmi2Instantiate(const char* n, int t, const char* g, const char* r, const void* f, int v, int l) { return &dummy; }
void fmi2FreeInstance(C c) {}
int fmi2SetupExperiment(C c, int a, double b, double d, int e, double f) { return 0; }
int fmi2EnterInitializationMode(C c) { return 0; }
int fmi2ExitInitializationMode(C c) { return 0; }
int fmi2Terminate(C c) { return 0; }
int fmi2GetReal(C c, const unsigned* vr, size_t n, double* v) { for (size_t k = 0; k < n; k++) v[k] = 1.0; return 0; }
int fmi2SetReal(C c, const unsigned* vr, size_t n, const double* v) { return 0; }
int fmi2GetBoolean(C c, const unsigned* vr, size_t n, int* v) { return 0; }
int fmi2SetBoolean(C c, const unsigned* vr, size_t n, const int* v) { return 0; }
int fmi2DoStep(C c, double t, double h, int x) {
#ifdef CRASH
    volatile int* p = NULL; return *p;
#else
    return 4; /* fmi2Fatal */
#endif
}
"#;

fn build_c_fmu(dir: &Path, name: &str, crash: bool) -> Option<PathBuf> {
    let src = dir.join(format!("{name}.c"));
    std::fs::write(&src, CRASHING_C).unwrap();
    let so = dir.join(format!("{name}.so"));
    let mut cmd = Command::new("gcc");
    cmd.args(["-shared", "-fPIC", "-o"]).arg(&so).arg(&src);
    if crash {
        cmd.arg("-DCRASH");
    }
    match cmd.output() {
        Ok(o) if o.status.success() => {}
        other => {
            assert!(std::env::var_os("CI").is_none(), "gcc failed: {other:?}");
            eprintln!("SKIPPED: no gcc");
            return None;
        }
    }
    let md = format!(
        r#"<?xml version="1.0"?>
<fmiModelDescription fmiVersion="2.0" modelName="{name}" guid="{{0}}">
  <CoSimulation modelIdentifier="{name}" canHandleVariableCommunicationStepSize="true"/>
  <DefaultExperiment stepSize="0.001"/>
  <ModelVariables>
    <ScalarVariable name="y" valueReference="0" causality="output"><Real/></ScalarVariable>
  </ModelVariables>
</fmiModelDescription>"#
    );
    let fmu = dir.join(format!("{name}.fmu"));
    write_zip(
        &fmu,
        &[
            ("modelDescription.xml", md.into_bytes()),
            (
                &format!("binaries/linux64/{name}.so"),
                std::fs::read(&so).unwrap(),
            ),
        ],
    );
    Some(fmu)
}

#[test]
fn check_reports_a_crash_and_a_fatal_status_as_findings() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    let Some(crashing) = build_c_fmu(d, "crashing", true) else {
        return;
    };
    let (code, stdout, stderr) = cli_check(d, &crashing, &["--json"]);
    assert_eq!(code, 1, "{stdout}{stderr}");
    let report: serde_json::Value = serde_json::from_str(&stdout).unwrap();
    let findings = report["findings"].to_string();
    assert!(
        findings.contains("SIGSEGV") && findings.contains("during `call sequence`"),
        "{findings}"
    );
    let fatal = build_c_fmu(d, "fatal", false).unwrap();
    let (code, stdout, _) = cli_check(d, &fatal, &[]);
    assert_eq!(code, 1, "{stdout}");
    assert!(
        stdout.contains("fmi2DoStep returned Fatal") && stdout.contains("fatal.fmu"),
        "{stdout}"
    );
    // the library refuses the step with an error naming the model and the status
    let fmu = Fmu::load(&fatal).unwrap();
    let mut inst = fmu.instantiate("x").unwrap();
    inst.enter_initialization(None, 0.0, None).unwrap();
    inst.exit_initialization().unwrap();
    let e = inst.do_step(0.0, 1e-3).unwrap_err().to_string();
    assert!(e.contains("fatal") && e.contains("Fatal"), "{e}");
}

#[test]
fn check_passes_our_fmu_and_replays_its_traces() {
    // Traces from the built-in detailed model replayed through the same model exported as an FMU:
    // within the validation tolerances (IEC 61400-27-2 windows, validate::metrics), and close.
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    let (code, _, stderr) = common::run_cli(d, &["init", "study.toml"]);
    assert_eq!(code, 0, "{stderr}");
    let (code, _, stderr) = common::run_cli(d, &["export", "study.toml", "--out", "unit.fmu"]);
    assert_eq!(code, 0, "{stderr}");
    let (code, _, stderr) = common::run_cli(
        d,
        &[
            "simulate",
            "--study",
            "study.toml",
            "--cases",
            "6",
            "--out",
            "traces",
            "--quiet",
        ],
    );
    assert_eq!(code, 0, "{stderr}");
    // the design holds at least one grid fault (the terminal voltage set by the network, with a
    // clearing between two samples): the case the replay convention matters for
    let faults = (1..=6)
        .filter(|k| {
            let side: serde_json::Value = serde_json::from_slice(
                &std::fs::read(d.join("traces").join(format!("case_{k:04}.json"))).unwrap(),
            )
            .unwrap();
            side["case"]["disturbance"]["kind"] == "fault"
        })
        .count();
    assert!(faults >= 1, "no grid fault among the 6 cases");
    let (code, stdout, stderr) =
        cli_check(d, &d.join("unit.fmu"), &["--traces", "traces", "--json"]);
    let report: serde_json::Value = serde_json::from_str(&stdout).unwrap();
    let checks = report["checks"].as_array().unwrap();
    assert_eq!(checks.len(), 5, "{checks:?}");
    assert!(checks.iter().all(|c| c["outcome"] == "pass"), "{checks:?}");
    let traces = report["traces"].as_array().unwrap();
    assert_eq!(traces.len(), 6);
    // Replayed with each sample held over its step (FMI co-simulation inputs), the FMU of the
    // detailed model reproduces the detailed model's own traces: no finding, exit 0. Bound 2 %
    // NRMSE per signal (common practice for a replay of the same model; measured on the demo's
    // 24 traces: at most 1.2 % in Q; here 1.8 % in Q on case 6, from the sample in which a
    // fault clears).
    let findings = report["findings"].as_array().unwrap();
    assert!(findings.is_empty(), "{findings:?}");
    assert_eq!(code, 0, "{stderr}");
    for t in traces {
        for s in t["signals"].as_array().unwrap() {
            let nrmse = s["nrmse_percent"].as_f64().unwrap();
            eprintln!(
                "check replay {} {}: NRMSE {nrmse:.4} %",
                t["file"], s["signal"]
            );
            assert!(
                nrmse < 2.0,
                "{} {}: NRMSE {nrmse} %",
                t["file"],
                s["signal"]
            );
        }
    }
}

#[test]
fn fmu_source_reproduces_the_built_in_model() {
    // Our detailed full-converter exported as an FMU and run as a black box through the
    // scenario design gives the built-in model's traces: RMS difference below 2e-3 pu per channel
    // and case, and no sample further off than 0.1 pu (measured with seed 7: max 6.3e-2 pu in i_re, RMS 1.7e-3 pu). Source of the difference: the FMU holds
    // its terminal voltage over each 1 ms communication step (trapezoidal mean, fixed-point
    // iterated with FMU state), while the built-in model solves the grid at every 50 µs
    // integrator stage; the largest errors sit in the first sample after a fault is applied or
    // cleared (measured on seed 1: max 2.6e-2 pu in i_im at t = 0.201 s, RMS 6.9e-4 pu).
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    assert_eq!(common::run_cli(d, &["init", "study.toml"]).0, 0);
    assert_eq!(
        common::run_cli(d, &["export", "study.toml", "--out", "unit.fmu"]).0,
        0
    );
    let args = |out: &'static str| {
        vec![
            "simulate",
            "--study",
            "study.toml",
            "--cases",
            "3",
            "--seed",
            "7",
            "--out",
            out,
            "--quiet",
        ]
    };
    let (code, _, stderr) = common::run_cli(d, &args("builtin"));
    assert_eq!(code, 0, "{stderr}");
    let mut a = args("fmu");
    a.extend(["--unit", "fmu:unit.fmu"]);
    let (code, _, stderr) = common::run_cli(d, &a);
    assert_eq!(code, 0, "{stderr}");
    let manifest = |dir: &str| -> serde_json::Value {
        serde_json::from_slice(&std::fs::read(d.join(dir).join("manifest.json")).unwrap()).unwrap()
    };
    assert_eq!(manifest("builtin")["redrawn_design_points"], 0);
    assert_eq!(manifest("fmu")["redrawn_design_points"], 0);
    let (mut worst_all, mut rms_all) = (0.0f64, 0.0f64);
    for k in 1..=3 {
        let file = format!("case_{k:04}.csv");
        let a = Trace::read(&d.join("builtin").join(&file)).unwrap();
        let b = Trace::read(&d.join("fmu").join(&file)).unwrap();
        assert_eq!(a.meta.case, b.meta.case, "same case");
        assert_eq!(a.time_s, b.time_s);
        for name in ["v_re", "v_im", "i_re", "i_im", "p", "q", "f_grid"] {
            let (x, y) = (a.channel(name).unwrap(), b.channel(name).unwrap());
            let worst = x
                .iter()
                .zip(y)
                .map(|(p, q)| (p - q).abs())
                .fold(0.0, f64::max);
            let rms = (x.iter().zip(y).map(|(p, q)| (p - q).powi(2)).sum::<f64>() / x.len() as f64)
                .sqrt();
            eprintln!(
                "{file} [{}] {name}: max {worst:.2e}, rms {rms:.2e}",
                a.meta.case["disturbance"]["kind"]
            );
            worst_all = worst_all.max(worst);
            rms_all = rms_all.max(rms);
        }
    }
    assert!(rms_all < 2e-3, "RMS difference {rms_all:e}");
    assert!(worst_all < 0.1, "max difference {worst_all:e}");
}

#[test]
fn inspect_reads_the_description_without_loading() {
    let dir = tempfile::tempdir().unwrap();
    let path = export(dir.path(), FmiVersion::V2);
    let (md, warnings) = import::inspect(&path).unwrap();
    assert!(warnings.is_empty());
    assert_eq!(md.co_simulation.model_identifier, "import_test_unit");
    assert_eq!(md.variables.len(), 12);
}

#[test]
fn detailed_fmu_to_traces_to_fit_to_standin_fmu_round_trip() {
    // The black-box round trip end to end through the CLI: our detailed model exported as an FMU
    // → traces collected through it as a black box → physics fitted + correction → stand-in FMU
    // → the stand-in loaded back by our importer (in `check`'s child process), conformant, and
    // replaying the black box's traces. Bounds are our own (common practice for a stand-in on
    // its own training envelope): every conformance check passes and the median NRMSE of P and Q
    // over the traces stays under 3 % of rating (measured: P 1.9 %, Q 1.2 %; 8 cases, seed 3).
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    let run = |args: &[&str]| {
        let (code, stdout, stderr) = common::run_cli(d, args);
        assert!(code == 0, "{args:?} → {code}\n{stdout}\n{stderr}");
        stdout
    };
    run(&["init", "study.toml"]);
    run(&["export", "study.toml", "--out", "detailed.fmu"]);
    run(&[
        "simulate",
        "--study",
        "study.toml",
        "--cases",
        "8",
        "--seed",
        "3",
        "--unit",
        "fmu:detailed.fmu",
        "--out",
        "traces",
        "--quiet",
    ]);
    let manifest: serde_json::Value =
        serde_json::from_slice(&std::fs::read(d.join("traces").join("manifest.json")).unwrap())
            .unwrap();
    assert!(
        manifest["source"].as_str().unwrap().starts_with("fmu:") && manifest.get("unit").is_none(),
        "the traces name the FMU as their source: {manifest}"
    );
    std::fs::create_dir(d.join("out")).unwrap();
    let (code, stdout, stderr) = common::run_cli(
        d,
        &[
            "fit",
            "--quiet",
            "--no-reduce",
            "--traces",
            "traces",
            "--out",
            "out/standin.json",
        ],
    );
    eprintln!("{stdout}{stderr}");
    // exit 1 = the held-out validation failed its tolerance table (still writes the model)
    assert!(code == 0 || code == 1, "fit → {code}");
    run(&["export", "out/standin.json", "--out", "standin.fmu"]);
    let (code, stdout, stderr) =
        cli_check(d, &d.join("standin.fmu"), &["--traces", "traces", "--json"]);
    assert!(code == 0 || code == 1, "check → {code}\n{stderr}");
    let report: serde_json::Value = serde_json::from_str(&stdout).unwrap();
    let checks = report["checks"].as_array().unwrap();
    assert!(checks.iter().all(|c| c["outcome"] == "pass"), "{checks:?}");
    let traces = report["traces"].as_array().unwrap();
    assert_eq!(traces.len(), 8);
    let nrmse = |signal: &str| {
        let mut v: Vec<f64> = traces
            .iter()
            .flat_map(|t| t["signals"].as_array().unwrap().iter())
            .filter(|s| s["signal"] == signal)
            .map(|s| s["nrmse_percent"].as_f64().unwrap())
            .collect();
        v.sort_by(f64::total_cmp);
        eprintln!("stand-in vs black-box traces, {signal} NRMSE %: {v:.3?}");
        v[v.len() / 2]
    };
    let (p, q) = (nrmse("p"), nrmse("q"));
    assert!(p < 3.0 && q < 3.0, "median NRMSE P {p} %, Q {q} %");
}

//! Traces and the `simulate` / `init` / `demo` commands, driven through the real CLI.

use crate::common::run_cli;
use std::path::Path;
use understudy::scenario::{Case, ScenarioDesign};
use understudy::signal::trace::{read_folder, Trace};
use understudy::simulate::{simulate_case, SimulationSettings};
use understudy::study::Study;

fn small_study(dir: &Path, cases: usize, seed: u64) -> std::path::PathBuf {
    let text = understudy::demo::DEMO_STUDY
        .replace("cases = 24", &format!("cases = {cases}"))
        .replace("seed = 2026", &format!("seed = {seed}"))
        .replace("duration_s = 1.5 ", "duration_s = 0.6 ");
    let path = dir.join("study.toml");
    std::fs::write(&path, text).unwrap();
    path
}

#[test]
fn traces_round_trip_bit_for_bit() {
    let study = understudy::demo::demo_study();
    let design = ScenarioDesign {
        cases: 3,
        seed: 11,
        ..study.design.clone()
    };
    let (cases, _) = design.generate(|_| true).unwrap();
    let settings = SimulationSettings {
        duration_s: 0.5,
        ..SimulationSettings::default()
    };
    let dir = tempfile::tempdir().unwrap();
    for case in &cases {
        let Ok((trace, _)) = simulate_case(&study.unit, case, &settings) else {
            continue;
        };
        trace.write(dir.path(), &case.stem()).unwrap();
        let back = Trace::read(&dir.path().join(format!("{}.csv", case.stem()))).unwrap();
        assert_eq!(back.names, trace.names);
        assert_eq!(back.meta, trace.meta);
        let same_bits = |a: &[f64], b: &[f64]| {
            a.len() == b.len() && a.iter().zip(b).all(|(x, y)| x.to_bits() == y.to_bits())
        };
        assert!(same_bits(&back.time_s, &trace.time_s));
        for (a, b) in back.columns.iter().zip(&trace.columns) {
            assert!(same_bits(a, b));
        }
        // the sidecar carries the case exactly
        let case_back: Case = serde_json::from_value(back.meta.case.clone()).unwrap();
        assert_eq!(&case_back, case);
    }
    // awkward magnitudes survive too
    let mut t = Trace::new(cases_meta(), vec!["x".into()]);
    for (k, v) in [
        1e-300,
        -2.5e-7,
        123_456_789.123_456_78,
        1e22,
        f64::MIN_POSITIVE,
        0.1 + 0.2,
    ]
    .into_iter()
    .enumerate()
    {
        t.push(k as f64 * 1e-3, &[v]);
    }
    t.write(dir.path(), "odd").unwrap();
    let back = Trace::read(&dir.path().join("odd.csv")).unwrap();
    for (a, b) in back.columns[0].iter().zip(&t.columns[0]) {
        assert_eq!(a.to_bits(), b.to_bits());
    }
}

fn cases_meta() -> understudy::signal::trace::TraceMeta {
    understudy::signal::trace::TraceMeta {
        format: understudy::signal::trace::FORMAT.into(),
        source: "test".into(),
        s_base_mva: 1.0,
        v_base_kv: 1.0,
        f_nom_hz: 50.0,
        case: serde_json::Value::Null,
    }
}

#[test]
fn simulate_writes_reproducible_traces() {
    let dir = tempfile::tempdir().unwrap();
    let study = small_study(dir.path(), 4, 5);
    let s = study.to_str().unwrap();
    let (code, _, err) = run_cli(
        dir.path(),
        &["simulate", "--study", s, "--out", "a", "--quiet"],
    );
    assert_eq!(code, 0, "{err}");
    let (code, _, err) = run_cli(
        dir.path(),
        &["simulate", "--study", s, "--out", "b", "--quiet"],
    );
    assert_eq!(code, 0, "{err}");
    let (code, _, err) = run_cli(
        dir.path(),
        &[
            "simulate", "--study", s, "--seed", "6", "--cases", "2", "--out", "c", "--quiet",
        ],
    );
    assert_eq!(code, 0, "{err}");
    let a = read_folder(&dir.path().join("a")).unwrap();
    let b = read_folder(&dir.path().join("b")).unwrap();
    let c = read_folder(&dir.path().join("c")).unwrap();
    assert_eq!(a.len(), 4);
    assert_eq!(c.len(), 2);
    for ((_, ta), (_, tb)) in a.iter().zip(&b) {
        assert_eq!(ta, tb, "same seed, same traces");
    }
    assert_ne!(
        a[0].1.meta.case, c[0].1.meta.case,
        "another seed, other cases"
    );
    // standard channels present, uniform sampling, starts in steady state
    for (path, t) in &a {
        let dt = t.check_usable(path).unwrap();
        assert!((dt - 1e-3).abs() < 1e-12);
        for ch in understudy::signal::trace::STANDARD_CHANNELS {
            assert!(
                t.channel(ch).is_some(),
                "{ch} missing in {}",
                path.display()
            );
        }
    }
    let manifest: serde_json::Value =
        serde_json::from_str(&std::fs::read_to_string(dir.path().join("a/manifest.json")).unwrap())
            .unwrap();
    assert_eq!(manifest["cases"].as_array().unwrap().len(), 4);
    // no temporary files left behind
    for entry in std::fs::read_dir(dir.path().join("a")).unwrap() {
        let name = entry.unwrap().file_name().to_string_lossy().into_owned();
        assert!(!name.contains(".part"), "left behind: {name}");
    }
}

#[test]
fn scenario_design_is_space_filling_and_seeded() {
    let design = ScenarioDesign {
        cases: 50,
        seed: 3,
        ..ScenarioDesign::default()
    };
    let (cases, _) = design.generate(|_| true).unwrap();
    let (again, _) = design.generate(|_| true).unwrap();
    assert_eq!(cases, again);
    // Latin hypercube: each of the 50 strata of P holds exactly one case
    let mut strata = vec![0; 50];
    for c in &cases {
        let u = (c.operating_point.p - design.p.min) / (design.p.max - design.p.min);
        strata[((u * 50.0) as usize).min(49)] += 1;
    }
    assert!(strata.iter().all(|n| *n == 1), "{strata:?}");
}

#[test]
fn bad_study_files_name_the_key_and_line() {
    let dir = tempfile::tempdir().unwrap();
    let good = understudy::demo::DEMO_STUDY;
    let cases = [
        (good.replace("frt_k = 2.0", "frt_kk = 2.0"), "frt_kk"),
        (good.replace("i_max = 1.1", "i_max = -1.1"), "unit.i_max"),
        (good.replace("start_s = 0.2", "start_s = -0.2"), "start_s"),
        (good.replace("cases = 24", "cases = 0"), "design.cases"),
    ];
    for (k, (text, needle)) in cases.iter().enumerate() {
        let path = dir.path().join(format!("bad{k}.toml"));
        std::fs::write(&path, text).unwrap();
        let out = dir.path().join(format!("out{k}"));
        let (code, _, err) = run_cli(
            dir.path(),
            &[
                "simulate",
                "--study",
                path.to_str().unwrap(),
                "--out",
                out.to_str().unwrap(),
            ],
        );
        assert_eq!(code, 2, "{err}");
        assert!(err.contains(needle), "error should name `{needle}`: {err}");
        assert!(!out.exists(), "nothing written for bad input");
    }
    // the unknown key is located by line
    let (_, _, err) = run_cli(
        dir.path(),
        &[
            "simulate",
            "--study",
            dir.path().join("bad0.toml").to_str().unwrap(),
            "--out",
            "x",
        ],
    );
    let line = good.lines().position(|l| l.starts_with("frt_k")).unwrap() + 1;
    assert!(err.contains(&format!("line {line}")), "{err}");
    // usage errors exit 2
    let (code, _, _) = run_cli(
        dir.path(),
        &["simulate", "--unit", "steam-turbine", "--out", "y"],
    );
    assert_eq!(code, 2);
}

#[test]
fn init_writes_a_study_that_loads_and_refuses_to_overwrite() {
    let dir = tempfile::tempdir().unwrap();
    let (code, _, err) = run_cli(dir.path(), &["init", "mine.toml"]);
    assert_eq!(code, 0, "{err}");
    let study = Study::load(&dir.path().join("mine.toml")).unwrap();
    assert_eq!(study, understudy::demo::demo_study());
    let (code, _, err) = run_cli(dir.path(), &["init", "mine.toml"]);
    assert_eq!(code, 2);
    assert!(err.contains("--force"), "{err}");
}

#[test]
fn export_cli_writes_an_fmu_of_the_detailed_unit() {
    let dir = tempfile::tempdir().unwrap();
    let study = small_study(dir.path(), 1, 1);
    let s = study.to_str().unwrap();
    let (code, _, err) = run_cli(dir.path(), &["export", s, "--out", "unit.fmu"]);
    assert_eq!(code, 0, "{err}");
    let bytes = std::fs::read(dir.path().join("unit.fmu")).unwrap();
    assert_eq!(&bytes[..2], b"PK", "an FMU is a zip archive");
    // FMI 3.0 on request (checked against FMPy in fmi3.rs); an unknown version is bad usage
    // and leaves nothing behind
    let (code, _, err) = run_cli(dir.path(), &["export", s, "--out", "v3.fmu", "--fmi", "3"]);
    assert_eq!(code, 0, "{err}");
    assert_eq!(
        &std::fs::read(dir.path().join("v3.fmu")).unwrap()[..2],
        b"PK"
    );
    let (code, _, err) = run_cli(dir.path(), &["export", s, "--out", "v4.fmu", "--fmi", "4"]);
    assert_eq!(code, 2, "{err}");
    assert!(!dir.path().join("v4.fmu").exists());
    let (code, _, err) = run_cli(
        dir.path(),
        &["export", s, "--out", "w.fmu", "--platforms", "win64"],
    );
    assert_eq!(code, 2, "{err}");
    assert!(err.contains("--platforms"), "{err}");
}

#[test]
fn demo_runs_on_the_embedded_study() {
    let dir = tempfile::tempdir().unwrap();
    let (code, out, err) = run_cli(dir.path(), &["demo", "--out", "d", "--json"]);
    assert_eq!(code, 0, "{err}");
    let report: serde_json::Value = serde_json::from_str(&out).expect("--json prints JSON");
    assert_eq!(report["cases"], 24);
    assert!(report["failures"].as_array().unwrap().is_empty());
    assert_eq!(read_folder(&dir.path().join("d/traces")).unwrap().len(), 24);
    assert!(dir.path().join("d/tarn-moss-demo-detailed.fmu").exists());
}

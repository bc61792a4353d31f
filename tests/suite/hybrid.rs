//! The hybrid surrogate: fit on detailed full-converter traces, validate on held-out faults,
//! check the runtime's correction stepping against scipy, export and run through FMPy.

use crate::common;
use nalgebra::DMatrix;
use serde_json::json;
use std::sync::OnceLock;
use understudy::hybrid::{fit_hybrid, HybridConfig, HybridOutcome, Physics};
use understudy::residual::dmd::{LinearModel, RankSelection};
use understudy::runtime::correction::zoh;
use understudy::runtime::cosim::{CoSimModel, Inputs, ModelFile, Setpoints, HYBRID_MODEL_FORMAT};
use understudy::runtime::unit::C64;
use understudy::scenario::{DisturbanceMix, ScenarioDesign};
use understudy::signal::trace::Trace;
use understudy::simulate::{feasible, simulate_case, SimulationSettings};

/// A modest set of detailed full-converter fault responses (faults and dips only: the
/// correction is judged on faults), 0.8 s each at 1 ms.
fn traces() -> &'static Vec<(String, Trace)> {
    static TRACES: OnceLock<Vec<(String, Trace)>> = OnceLock::new();
    TRACES.get_or_init(|| {
        let study = understudy::demo::demo_study();
        let design = ScenarioDesign {
            cases: 16,
            seed: 7,
            disturbances: DisturbanceMix {
                fault_weight: 0.6,
                dip_weight: 0.4,
                phase_jump_weight: 0.0,
                frequency_ramp_weight: 0.0,
                swell_weight: 0.0,
                start_s: 0.1,
                ..DisturbanceMix::default()
            },
            ..study.design.clone()
        };
        let (cases, _) = design.generate(|c| feasible(&study.unit, c)).unwrap();
        let settings = SimulationSettings {
            duration_s: 0.8,
            internal_signals: false,
            ..SimulationSettings::default()
        };
        cases
            .iter()
            .filter_map(|c| {
                simulate_case(&study.unit, c, &settings)
                    .ok()
                    .map(|(t, _)| (c.stem(), t))
            })
            .collect()
    })
}

fn outcome() -> &'static HybridOutcome {
    static OUTCOME: OnceLock<HybridOutcome> = OnceLock::new();
    OUTCOME.get_or_init(|| {
        fit_hybrid(
            traces(),
            &Physics::FitTemplate(understudy::greybox::generic_converter()),
            &HybridConfig::default(),
            |line| eprintln!("{line}"),
        )
        .unwrap()
    })
}

#[test]
fn hybrid_improves_on_the_reduced_model_and_its_cross_validation_is_consistent() {
    // The correction is chosen by leave-one-trace-out cross-validation over its structure,
    // ridge and output shrink (measured: physics alone 3.85 %, chosen: the physics' current as
    // input and the dip map, ridge 1e-6, Δi_d shrunk by 0.5: 1.86 %); what it chose can never
    // be worse in cross-validation than the physics alone, because dropping the correction is
    // one of its candidates. The acceptance figures are in the next test.
    let o = outcome();
    let (mean_reduced, mean_hybrid) = o.mean_nrmse();
    assert!(
        mean_hybrid < 0.8 * mean_reduced,
        "{mean_hybrid} vs {mean_reduced}"
    );
    let cv = o.cross_validation.as_ref().expect("on by default");
    assert_eq!(cv.folds, o.training.len());
    // every ridge for every structure
    assert_eq!(
        cv.rows.len(),
        4 * understudy::hybrid::RIDGE_CANDIDATES.len()
    );
    for st in understudy::hybrid::Structure::ALL {
        assert_eq!(
            cv.rows.iter().filter(|r| r.structure == st).count(),
            understudy::hybrid::RIDGE_CANDIDATES.len()
        );
    }
    assert!(
        cv.hybrid_percent <= cv.reduced_percent,
        "{} vs {}",
        cv.hybrid_percent,
        cv.reduced_percent
    );
    let best = cv
        .rows
        .iter()
        .map(|r| r.shrunk_percent.min(r.fitted_percent))
        .fold(f64::INFINITY, f64::min);
    assert!(cv.hybrid_percent <= best, "{} vs {best}", cv.hybrid_percent);
    // the summary (printed by `fit` and the report) puts each figure beside its own label
    let summary = cv.summary();
    for r in &cv.rows {
        let row = format!(
            "ridge {:e} {} the physics' current, {} the dip map: {:.3} % as fitted, {:.3} % \
             with (Δi_d, Δi_q) shrunk by ({}, {})",
            r.ridge,
            if r.structure.physics_inputs {
                "with"
            } else {
                "without"
            },
            if r.structure.dip_map {
                "with"
            } else {
                "without"
            },
            r.fitted_percent,
            r.shrunk_percent,
            r.shrink[0],
            r.shrink[1]
        );
        assert!(summary.contains(&row), "{row} not in {summary}");
    }
}

#[test]
fn hybrid_halves_the_reduced_error_on_held_out_faults() {
    let o = outcome();
    let (mean_reduced, mean_hybrid) = o.mean_nrmse();
    let (p_red, p_hyb) = o.median_nrmse("p");
    let (q_red, q_hyb) = o.median_nrmse("q");
    eprintln!(
        "order {}, rank {}, moved {} (stability) + {} (negative real), compression error {:.4}",
        o.order,
        o.rank,
        o.stability.moved.len(),
        o.moved_to_real_axis.len(),
        o.compression.relative_error
    );
    if let Some(cv) = &o.cross_validation {
        eprintln!("{}", cv.summary());
    }
    eprintln!("mean NRMSE reduced {mean_reduced:.3} %, hybrid {mean_hybrid:.3} %");
    eprintln!("median NRMSE P: reduced {p_red:.3} %, hybrid {p_hyb:.3} %");
    eprintln!("median NRMSE Q: reduced {q_red:.3} %, hybrid {q_hyb:.3} %");
    for c in &o.validation {
        if let Some((_, t)) = traces().iter().find(|(n, _)| *n == c.name) {
            eprintln!(
                "  {}: {} {}",
                c.name, t.meta.case["disturbance"], t.meta.case["operating_point"]
            );
        }
        for (r, h) in c.reduced.iter().zip(&c.hybrid) {
            eprintln!(
                "  {} {}: {:.3} → {:.3}",
                c.name, r.signal, r.nrmse_percent, h.nrmse_percent
            );
        }
    }
    // acceptance of issue 4 (our own targets): error at most half the reduced model's, and
    // median NRMSE of P and Q ≤ 2 % of rating (measured: mean 3.444 % → 1.369 %, ratio 0.40;
    // median P 1.58 %, Q 0.57 %)
    assert!(
        mean_hybrid <= 0.5 * mean_reduced,
        "{mean_hybrid} vs {mean_reduced}"
    );
    assert!(p_hyb <= 2.0 && q_hyb <= 2.0, "P {p_hyb} %, Q {q_hyb} %");
}

fn rows_json(m: &DMatrix<f64>) -> serde_json::Value {
    json!((0..m.nrows())
        .map(|i| m.row(i).iter().copied().collect::<Vec<f64>>())
        .collect::<Vec<_>>())
}

fn matrix_from_json(v: &serde_json::Value) -> DMatrix<f64> {
    let rows: Vec<Vec<f64>> = serde_json::from_value(v.clone()).unwrap();
    DMatrix::from_fn(rows.len(), rows[0].len(), |i, j| rows[i][j])
}

/// A reproducible pseudo-random matrix (xorshift; common practice for test data).
fn pseudo_random(r: usize, c: usize, seed: u64) -> DMatrix<f64> {
    let mut x = seed.max(1);
    DMatrix::from_fn(r, c, |_, _| {
        x ^= x << 13;
        x ^= x >> 7;
        x ^= x << 17;
        (x % 2_000_001) as f64 / 1_000_000.0 - 1.0
    })
}

#[test]
fn runtime_zoh_matches_scipy_cont2discrete() {
    // Reference: scipy.signal.cont2discrete(method="zoh"), to 1e-10; a 6th-order system with
    // fast and slow modes (norm of A·h from 0.01 to ~60, so scaling and squaring is exercised)
    let a = pseudo_random(6, 6, 3) * 40.0 - DMatrix::identity(6, 6) * 50.0;
    let b = pseudo_random(6, 5, 5) * 10.0;
    for h in [1e-3, 0.013, 0.5] {
        let (phi, gamma) = zoh(&a, &b, h);
        if let Some(r) = common::run_reference(
            "residual_zoh.py",
            &json!({"a": rows_json(&a), "b": rows_json(&b), "dt": h}),
        ) {
            let (a_d, b_d) = (matrix_from_json(&r["a"]), matrix_from_json(&r["b"]));
            let ea = (&phi - &a_d).abs().max();
            let eb = (&gamma - &b_d).abs().max();
            eprintln!("h = {h}: |ΔΦ| = {ea:e}, |ΔΓ| = {eb:e}");
            assert!(ea < 1e-10 && eb < 1e-10, "h = {h}: {ea:e}, {eb:e}");
        }
    }
}

#[test]
fn continuous_time_round_trip_reproduces_the_discrete_correction() {
    // discrete (A, B) at dt → continuous (tool, ln λ/Δt) → runtime ZOH at dt → (A, B) again;
    // the identity holds exactly in exact arithmetic (Van Loan 1978 block exponential)
    let dt = 1e-3;
    let rotation = |r: f64, w: f64| {
        DMatrix::from_row_slice(2, 2, &[r * w.cos(), -r * w.sin(), r * w.sin(), r * w.cos()])
    };
    let mut a = DMatrix::zeros(5, 5);
    a.view_mut((0, 0), (2, 2)).copy_from(&rotation(0.98, 0.2));
    a.view_mut((2, 2), (2, 2)).copy_from(&rotation(0.9, 0.6));
    a[(4, 4)] = 0.5;
    let t = DMatrix::identity(5, 5) + pseudo_random(5, 5, 9) * 0.3;
    let a = &t * a * t.clone().try_inverse().unwrap();
    let b = pseudo_random(5, 5, 13);
    let discrete = LinearModel {
        a: a.clone(),
        b: b.clone(),
        c: DMatrix::identity(5, 5),
        dt_s: dt,
    };
    let continuous = discrete.to_continuous().unwrap();
    let (phi, gamma) = zoh(&continuous.a, &continuous.b, dt);
    let (ea, eb) = ((&phi - &a).abs().max(), (&gamma - &b).abs().max());
    eprintln!("round trip: |ΔA| = {ea:e}, |ΔB| = {eb:e}");
    assert!(ea < 1e-10 && eb < 1e-10);
}

#[test]
fn hybrid_model_file_has_the_hybrid_format_round_trips_and_starts_steady() {
    let o = outcome();
    let json_text = o.model.to_json();
    assert!(json_text.contains(HYBRID_MODEL_FORMAT) && json_text.contains("\"kind\": \"hybrid\""));
    let back = ModelFile::from_json(json_text.as_bytes()).unwrap();
    assert_eq!(back, o.model);
    // initialised at a rotated terminal voltage and a setpoint, it stays there with zero
    // correction (steady state): P, Q equal the setpoints over 100 steps of 1 ms
    let mut m = back.build().unwrap();
    let v = C64::from_polar(1.01, 0.7);
    let u = Inputs {
        v_re: v.re,
        v_im: v.im,
        f_grid: 1.0,
    };
    let sp = Setpoints {
        p_ref: 0.6,
        q_ref: 0.1,
    };
    m.initialise(&u, &sp).unwrap();
    for k in 0..100 {
        m.do_step(k as f64 * 1e-3, 1e-3, &u).unwrap();
    }
    let out = m.outputs(&u).unwrap();
    assert!(
        (out.p - 0.6).abs() < 1e-6 && (out.q - 0.1).abs() < 1e-6,
        "{out:?}"
    );
    // saved state restores the trajectory bit for bit, also through JSON
    let dip = Inputs {
        v_re: 0.4 * v.re,
        v_im: 0.4 * v.im,
        f_grid: 1.0,
    };
    m.do_step(0.1, 1e-3, &dip).unwrap();
    let saved = serde_json::to_string(&m.save_state()).unwrap();
    let mut a = Vec::new();
    for k in 0..20 {
        m.do_step(0.101 + k as f64 * 1e-3, 1e-3, &dip).unwrap();
        a.push(m.outputs(&dip).unwrap());
    }
    m.restore_state(&serde_json::from_str(&saved).unwrap())
        .unwrap();
    for (k, want) in a.iter().enumerate() {
        m.do_step(0.101 + k as f64 * 1e-3, 1e-3, &dip).unwrap();
        let got = m.outputs(&dip).unwrap();
        assert_eq!(got.p.to_bits(), want.p.to_bits());
        assert_eq!(got.q.to_bits(), want.q.to_bits());
    }
}

#[test]
fn exported_hybrid_in_fmpy_equals_the_runtime_evaluation() {
    // Reference: FMPy (fmpy.simulate_fmu, fmpy.validation.validate_fmu) as an independent FMI
    // importer; outputs equal our runtime's evaluation within 1e-9
    let o = outcome();
    let dir = tempfile::tempdir().unwrap();
    let model_path = dir.path().join("hybrid.json");
    std::fs::write(&model_path, o.model.to_json()).unwrap();
    let fmu = dir.path().join("hybrid.fmu");
    let status = std::process::Command::new(common::understudy_bin())
        .args(["export"])
        .arg(&model_path)
        .arg("--out")
        .arg(&fmu)
        .status()
        .unwrap();
    assert!(status.success());
    let sp = o.model.start.setpoints;
    let v0 = C64::new(o.model.start.inputs.v_re, o.model.start.inputs.v_im);
    let vd = v0 * 0.35;
    let input = json!([
        [0.0, v0.re, v0.im],
        [0.05, v0.re, v0.im],
        [0.05, vd.re, vd.im],
        [0.2, vd.re, vd.im],
        [0.2, v0.re, v0.im],
        [0.4, v0.re, v0.im],
    ]);
    let Some(r) = common::run_reference(
        "fmi_check.py",
        &json!({"fmu": fmu, "stop_time": 0.4, "step": 1e-3, "input": input,
                "start_values": {"p_ref": sp.p_ref, "q_ref": sp.q_ref}}),
    ) else {
        return;
    };
    let problems = r["problems"].as_array().unwrap();
    assert!(problems.is_empty(), "FMPy validation: {problems:?}");
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
    let inputs = |k: usize| Inputs {
        v_re: v_re[k],
        v_im: v_im[k],
        f_grid: 1.0,
    };
    let mut m = o.model.build().unwrap();
    m.initialise(&inputs(0), &sp).unwrap();
    let mut worst = 0.0f64;
    for k in 0..t.len() {
        if k > 0 {
            m.do_step(t[k - 1], t[k] - t[k - 1], &inputs(k)).unwrap();
        }
        let ours = m.outputs(&inputs(k)).unwrap();
        for (name, x) in [
            ("i_re", ours.i_re),
            ("i_im", ours.i_im),
            ("p", ours.p),
            ("q", ours.q),
        ] {
            worst = worst.max((col(name)[k] - x).abs());
        }
    }
    eprintln!(
        "FMPy vs runtime (hybrid): max |difference| = {worst:e} over {} rows",
        t.len()
    );
    assert!(worst <= 1e-9, "{worst:e}");
    // not trivial: the dip moved P
    let p = col("p");
    assert!(p.iter().cloned().fold(f64::INFINITY, f64::min) < sp.p_ref - 0.2);
}

#[test]
fn reading_outputs_between_steps_changes_nothing() {
    // the runtime answers a get between two steps from one probe evaluation and lets the next
    // doStep reuse it when the inputs are the same: the trajectory must be the same, bit for
    // bit, whether a host reads before every step (same inputs), reads at other inputs (no
    // reuse allowed), or never reads
    let o = outcome();
    let sp = Setpoints {
        p_ref: 0.6,
        q_ref: 0.0,
    };
    let dip = |k: usize| {
        let u = if (100..180).contains(&k) { 0.4 } else { 1.0 };
        Inputs {
            v_re: u * 0.3f64.cos(),
            v_im: u * 0.3f64.sin(),
            f_grid: 1.0,
        }
    };
    // what a host reads before step k, through the getter it is handed
    type Reads<'a> = &'a dyn Fn(&mut dyn FnMut(&Inputs), usize);
    let run = |read: Reads| {
        let mut m = o.model.build().unwrap();
        m.initialise(&dip(0), &sp).unwrap();
        let mut p = Vec::new();
        for k in 0..300 {
            read(&mut |i: &Inputs| p.push(m.outputs(i).unwrap().p), k);
            m.do_step(k as f64 * 1e-3, 1e-3, &dip(k)).unwrap();
        }
        (m.save_state(), m.outputs(&dip(300)).unwrap(), p)
    };
    let (never, last_never, _) = run(&|_, _| {});
    let (same, last_same, p_same) = run(&|get, k| get(&dip(k)));
    let (other, last_other, _) = run(&|get, k| {
        let mut i = dip(k);
        i.v_re *= 0.9;
        get(&i)
    });
    assert!(
        never == same && never == other,
        "the state depends on reads"
    );
    assert!(last_never == last_same && last_never == last_other);
    // not trivial: the dip moved P
    let p_min = p_same.iter().cloned().fold(f64::INFINITY, f64::min);
    assert!(p_min < sp.p_ref - 0.2, "{p_min}");
}

#[test]
fn bad_input_gives_clear_errors() {
    let physics = Physics::Reduced(understudy::greybox::generic_converter());
    // keep-fraction outside (0, 1]
    for bad in [0.0, 1.5, f64::NAN] {
        let e = HybridConfig::default().with_keep_fraction(bad).unwrap_err();
        assert!(e.to_string().contains("keep_fraction"), "{e}");
    }
    // a ridge weight outside [0, 1)
    for bad in [-1e-3, 1.0, f64::NAN] {
        let e = HybridConfig::default().with_ridge(bad).unwrap_err();
        assert!(e.to_string().contains("ridge"), "{e}");
    }
    // a rank larger than the data
    let few: Vec<(String, Trace)> = traces().iter().take(4).cloned().collect();
    let cfg = HybridConfig::default()
        .with_held_out_fraction(0.5)
        .unwrap()
        .with_rank(RankSelection::Fixed(100_000))
        .unwrap();
    let e = fit_hybrid(&few, &physics, &cfg, |_| {}).unwrap_err();
    assert!(
        e.to_string().contains("rank") && e.to_string().contains("100000"),
        "{e}"
    );
    // a NaN in a trace: the error names the trace and the channel
    let mut nan = few.clone();
    let k = nan[0].1.names.iter().position(|n| n == "i_re").unwrap();
    nan[0].1.columns[k][100] = f64::NAN;
    let e = fit_hybrid(
        &nan,
        &physics,
        &HybridConfig::default().with_held_out_fraction(0.5).unwrap(),
        |_| {},
    )
    .unwrap_err();
    assert!(
        e.to_string().contains(&nan[0].0) && e.to_string().contains("i_re"),
        "{e}"
    );
    assert!(e.is_bad_input());
    // the CLI: a bad keep fraction is exit 2 naming the flag
    let dir = tempfile::tempdir().unwrap();
    let out = std::process::Command::new(common::understudy_bin())
        .args(["fit", "--traces"])
        .arg(dir.path())
        .args(["--keep-fraction", "0", "--out"])
        .arg(dir.path().join("m.json"))
        .output()
        .unwrap();
    assert_eq!(out.status.code(), Some(2));
    assert!(String::from_utf8_lossy(&out.stderr).contains("--keep-fraction"));
}

#[test]
fn cli_fit_writes_the_model_file_and_report() {
    // physics given as a template file (--reduced), so no LM fit runs here
    let dir = tempfile::tempdir().unwrap();
    let traces_dir = dir.path().join("traces");
    std::fs::create_dir(&traces_dir).unwrap();
    for (name, t) in traces().iter().take(8) {
        t.write(&traces_dir, name).unwrap();
    }
    let template = dir.path().join("reduced.toml");
    std::fs::write(&template, understudy::greybox::GENERIC_CONVERTER_TOML).unwrap();
    let model = dir.path().join("out").join("hybrid.json");
    std::fs::create_dir(dir.path().join("out")).unwrap();
    let out = std::process::Command::new(common::understudy_bin())
        .args(["fit", "--quiet", "--traces"])
        .arg(&traces_dir)
        .arg("--reduced")
        .arg(&template)
        .arg("--out")
        .arg(&model)
        .output()
        .unwrap();
    let stdout = String::from_utf8_lossy(&out.stdout);
    eprintln!("{stdout}{}", String::from_utf8_lossy(&out.stderr));
    assert!(matches!(out.status.code(), Some(0 | 1)));
    if out.status.code() == Some(1) {
        assert!(stdout.contains("validation FAILED"));
    }
    let file = ModelFile::from_json(&std::fs::read(&model).unwrap()).unwrap();
    assert_eq!(file.format, HYBRID_MODEL_FORMAT);
    let html = std::fs::read_to_string(dir.path().join("out").join("report.html")).unwrap();
    for needle in [
        "Error table",
        "DMD eigenvalues",
        "Kept DCT",
        "Residual",
        "grid codes",
    ] {
        assert!(html.contains(needle), "report lacks {needle}");
    }
}

#[test]
fn a_hybrid_file_of_format_2_runs_as_the_same_model() {
    // a file written before the physics' current became a correction input (format 2: B and D
    // of six columns, no dip map, no input range) runs exactly as the same correction written
    // in format 3 with explicit zero columns for inputs 7 and 8 (our own compatibility rule)
    use understudy::runtime::cosim::{ModelKind, HYBRID_MODEL_FORMAT_2};
    let o = outcome();
    let ModelKind::Hybrid { correction, .. } = &o.model.model else {
        panic!("a hybrid")
    };
    let six =
        |rows: &Vec<Vec<f64>>| -> Vec<Vec<f64>> { rows.iter().map(|r| r[..6].to_vec()).collect() };
    let eight = |rows: &Vec<Vec<f64>>| -> Vec<Vec<f64>> {
        rows.iter()
            .map(|r| r[..6].iter().copied().chain([0.0, 0.0]).collect())
            .collect()
    };
    let with = |format: &str, b: Vec<Vec<f64>>, d: Vec<Vec<f64>>| {
        let mut file = o.model.clone();
        file.format = format.into();
        if let ModelKind::Hybrid { correction: c, .. } = &mut file.model {
            c.b = b;
            c.d = d;
            c.c_dip.clear();
            c.d_dip.clear();
            c.input_range.clear();
        }
        ModelFile::from_json(file.to_json().as_bytes()).unwrap()
    };
    let old = with(
        HYBRID_MODEL_FORMAT_2,
        six(&correction.b),
        six(&correction.d),
    );
    let new = with(
        HYBRID_MODEL_FORMAT,
        eight(&correction.b),
        eight(&correction.d),
    );
    let case = &o.held_out_cases[0];
    let (a, b) = (
        understudy::hybrid::evaluate(&old, case).unwrap(),
        understudy::hybrid::evaluate(&new, case).unwrap(),
    );
    assert_eq!(a.p, b.p);
    assert_eq!(a.q, b.q);
    // and the correction acts: the legacy file is not the physics alone
    let physics = understudy::hybrid::evaluate(&o.reduced_model, case).unwrap();
    assert!(a
        .p
        .iter()
        .zip(&physics.p)
        .any(|(x, y)| (x - y).abs() > 1e-4));
}

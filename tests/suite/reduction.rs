//! The template reduction loop (`understudy::reduce::reduction`) and `understudy reduce`:
//! MBAM (Transtrum & Qiu, Phys. Rev. Lett. 113, 098701, 2014) repeated with refits and a
//! held-out check, on traces of the built-in detailed full-converter model; the output file and
//! its log; the CLI on a small trace folder and on bad input.

use crate::common::run_cli;
use std::path::Path;
use understudy::greybox::{generic_converter, FitTrace};
use understudy::reduce::reduction::{
    decimate, fisher_spectrum_svg, geodesic_path_svg, log_path, split_traces,
};
use understudy::reduce::{
    read_reduced, reduce_template, write_reduced, ReducedFile, ReductionConfig, ReductionEvent,
    REDUCED_FORMAT,
};
use understudy::scenario::ScenarioDesign;
use understudy::signal::trace::Trace;
use understudy::simulate::{feasible, simulate_case, SimulationSettings};

/// `n` demo-design cases of the detailed full-converter model, `duration_s` long, as traces.
fn detailed(n: usize, seed: u64, duration_s: f64) -> Vec<(String, Trace)> {
    let study = understudy::demo::demo_study();
    let design = ScenarioDesign {
        cases: n,
        seed,
        ..study.design.clone()
    };
    let unit = study.unit.clone();
    let (cases, _) = design.generate(|c| feasible(&unit, c)).unwrap();
    let settings = SimulationSettings {
        duration_s,
        internal_signals: false,
        ..SimulationSettings::default()
    };
    cases
        .iter()
        .map(|case| {
            let (trace, _) = simulate_case(&study.unit, case, &settings).unwrap();
            (case.stem(), trace)
        })
        .collect()
}

fn fit_traces(traces: &[(String, Trace)]) -> Vec<FitTrace> {
    traces
        .iter()
        .map(|(name, t)| FitTrace::from_trace(t, name).unwrap())
        .collect()
}

#[test]
fn reduction_of_the_generic_template_keeps_at_most_half_within_the_held_out_tolerance() {
    let traces = fit_traces(&detailed(8, 7, 0.6));
    let (training, held_out, split) = split_traces(traces, 0.25).unwrap();
    assert_eq!((training.len(), held_out.len()), (6, 2));
    let template = generic_converter();
    let free_full = template.parameters.iter().filter(|p| !p.fixed).count();
    // the floor at half the parameters keeps the test short (the loop would go on)
    let config = ReductionConfig::default()
        .with_iterations(30, 15)
        .and_then(|c| c.with_min_parameters(free_full / 2))
        .unwrap();
    let mut events = 0;
    let outcome = reduce_template(&template, &training, &held_out, &config, |e| {
        events += 1;
        if let ReductionEvent::Step(s) = e {
            eprintln!(
                "step {}: {} [{}] held-out P {:.4} Q {:.4}",
                s.index,
                s.sentence,
                if s.accepted { "kept" } else { "not kept" },
                s.errors_after.held_out.p,
                s.errors_after.held_out.q
            );
        }
    })
    .unwrap();
    let file = ReducedFile::new(outcome, split, &config);
    eprintln!("{}", file.log_text());
    assert!(events >= 2, "the observer saw the full fit and the steps");

    let free_reduced = file.template.parameters.iter().filter(|p| !p.fixed).count();
    assert!(
        2 * free_reduced <= free_full,
        "{free_reduced} of {free_full} parameters remain"
    );
    // a limit the template does not declare did not end the loop: a later limit was kept in the
    // same step, and the refused one is logged with its parameter's physical meaning (on this
    // set: p_ki → ∞ at step 4; the steps past the sloppiest direction come after the floor)
    assert!(
        file.steps.iter().any(|s| s.accepted
            && s.refused
                .iter()
                .any(|(what, why)| what.contains("sloppiest direction")
                    && what.contains(": ")
                    && (why.contains("does not declare") || why.contains("has no such limit")))),
        "no step went on past an undeclared limit"
    );
    // the held-out tolerance, checked on the (decimated) traces the loop judged by, for every
    // kept step, and the reported errors of the final model on the full-rate traces
    let (factor, margin) = config.tolerance();
    let full = file.steps[0].errors_before.held_out;
    for s in file.steps.iter().filter(|s| s.accepted) {
        assert!(s.errors_after.held_out.p <= factor * full.p + margin);
        assert!(s.errors_after.held_out.q <= factor * full.q + margin);
        assert_eq!(s.parameters_after + 1, s.parameters_before);
        assert!(!s.fisher_eigenvalues.is_empty() && !s.geodesic_log_params.is_empty());
    }
    let (f, r) = (file.errors.full.held_out, file.errors.reduced.held_out);
    assert!(
        r.p <= factor * f.p + margin,
        "held-out P {} vs full {}",
        r.p,
        f.p
    );
    assert!(
        r.q <= factor * f.q + margin,
        "held-out Q {} vs full {}",
        r.q,
        f.q
    );
    // a reduced template is a valid template again, and the steps' plots render
    understudy_runtime::block::BlockModel::compile(&file.template).unwrap();
    assert!(fisher_spectrum_svg(&file.steps[0]).contains("<svg"));
    assert!(geodesic_path_svg(&file.steps[0]).contains("<svg"));

    // the file round-trips, the log sits beside it
    let dir = tempfile::tempdir().unwrap();
    let path = dir.path().join("reduced.json");
    let log = write_reduced(&path, &file).unwrap();
    assert_eq!(log, log_path(&path));
    let back = read_reduced(&path).unwrap();
    assert_eq!(back.format, REDUCED_FORMAT);
    assert_eq!(back.template, file.template);
    assert_eq!(back.steps.len(), file.steps.len());
    let text = std::fs::read_to_string(&log).unwrap();
    assert!(text.contains("step 1:") && text.contains("stopped:"));
    let json: serde_json::Value =
        serde_json::from_str(&std::fs::read_to_string(&path).unwrap()).unwrap();
    for field in [
        "format",
        "template",
        "full_template",
        "steps",
        "split",
        "errors",
    ] {
        assert!(json.get(field).is_some(), "field `{field}`");
    }
}

#[test]
fn decimation_keeps_every_kth_sample_and_scales_the_step() {
    let t = FitTrace {
        name: "x".into(),
        step_s: 1e-3,
        v_re: (0..7).map(f64::from).collect(),
        v_im: vec![0.0; 7],
        f_grid: None,
        i_re: vec![1.0; 7],
        i_im: vec![0.0; 7],
        p: vec![1.0; 7],
        q: vec![0.0; 7],
    };
    let d = decimate(&t, 3);
    assert_eq!(d.v_re, vec![0.0, 3.0, 6.0]);
    assert!((d.step_s - 3e-3).abs() < 1e-15);
}

#[test]
fn reduction_settings_are_checked() {
    let c = ReductionConfig::default();
    assert!(c.clone().with_tolerance(0.9, 0.0).is_err());
    assert!(c.clone().with_tolerance(1.5, -1.0).is_err());
    assert!(c.clone().with_min_parameters(0).is_err());
    assert!(c.clone().with_max_steps(0).is_err());
    assert!(c.clone().with_decimation(0).is_err());
    assert!(c.clone().with_attempts_per_step(0).is_err());
    assert!(c.clone().with_iterations(0, 3).is_err());
    let msg = c.with_tolerance(f64::NAN, 0.0).unwrap_err().to_string();
    assert!(msg.contains("tolerance"), "{msg}");
}

fn write_traces(dir: &Path, traces: &[(String, Trace)]) {
    std::fs::create_dir_all(dir).unwrap();
    for (name, t) in traces {
        t.write(dir, name).unwrap();
    }
}

#[test]
fn cli_reduce_writes_the_reduced_model_and_its_log() {
    let dir = tempfile::tempdir().unwrap();
    let traces = dir.path().join("traces");
    write_traces(&traces, &detailed(4, 3, 0.4));
    let (code, stdout, stderr) = run_cli(
        dir.path(),
        &[
            "reduce",
            "--traces",
            "traces",
            "--out",
            "reduced.json",
            "--held-out",
            "0.25",
            "--max-steps",
            "2",
            "--decimation",
            "4",
        ],
    );
    assert_eq!(code, 0, "stdout {stdout}\nstderr {stderr}");
    assert!(stdout.contains("reduced `generic-converter`"), "{stdout}");
    assert!(stderr.contains("full template fitted"), "{stderr}");
    let file = read_reduced(&dir.path().join("reduced.json")).unwrap();
    assert_eq!(file.split.held_out.len(), 1);
    assert_eq!(file.split.training.len(), 3);
    assert!(dir.path().join("reduced.log.txt").exists());
}

#[test]
fn cli_reduce_bad_input_names_the_file_block_or_parameter() {
    let dir = tempfile::tempdir().unwrap();
    let traces = dir.path().join("traces");
    let cases = detailed(2, 5, 0.2);
    write_traces(&traces, &cases);
    let args = |template: &str| {
        vec![
            "reduce".to_string(),
            "--traces".into(),
            "traces".into(),
            "--out".into(),
            "r.json".into(),
            "--held-out".into(),
            "0.5".into(),
            "--template".into(),
            template.into(),
        ]
    };
    let run = |a: Vec<String>| {
        let refs: Vec<&str> = a.iter().map(String::as_str).collect();
        run_cli(dir.path(), &refs)
    };
    let toml = understudy::greybox::GENERIC_CONVERTER_TOML;

    // an unknown port of a block, a parameter outside its bounds, an unbroken algebraic loop
    // (the same rewrites as the library-level check in `blocks.rs`)
    let broken = [
        (
            "port.toml",
            toml.replace(
                "inputs = { u = \"drop_beyond\" }",
                "inputs = { x = \"drop_beyond\" }",
            ),
            vec!["i_r_extra", "unknown input port `x`"],
        ),
        (
            "bounds.toml",
            toml.replace("value = 1.1\n", "value = 9.0\n"),
            vec!["parameter `i_max` = 9", "bounds"],
        ),
        (
            "loop.toml",
            toml.replace(
                "terms = [\"+i_p0\", \"+p_pi\"]",
                "terms = [\"+i_p0\", \"+p_pi\", \"+i_d_ref\"]",
            ),
            vec!["algebraic loop", "i_p_cmd"],
        ),
        (
            "kind.toml",
            toml.replace("kind = \"dead-band\"", "kind = \"deadband\""),
            vec!["drop_beyond", "deadband"],
        ),
    ];
    for (file, text, expected) in broken {
        assert_ne!(text, toml, "{file}: the rewrite changed nothing");
        std::fs::write(dir.path().join(file), text).unwrap();
        let (code, _, err) = run(args(file));
        assert_eq!(code, 2, "{file}: {err}");
        assert!(err.contains(file), "{err}");
        for e in expected {
            assert!(err.contains(e), "{file}: expected `{e}` in {err}");
        }
    }

    // a trace with NaN, then one with uneven sample times
    let (name, trace) = &cases[0];
    let csv = traces.join(format!("{name}.csv"));
    let mut t = trace.clone();
    let col = t.names.iter().position(|n| n == "p").unwrap();
    t.columns[col][5] = f64::NAN;
    t.write(&traces, name).unwrap();
    let (code, _, err) = run_cli(
        dir.path(),
        &[
            "reduce",
            "--traces",
            "traces",
            "--out",
            "r.json",
            "--held-out",
            "0.5",
        ],
    );
    assert_eq!(code, 2, "{err}");
    assert!(
        err.contains(&csv.file_name().unwrap().to_string_lossy().into_owned()),
        "{err}"
    );
    assert!(err.contains("not finite") || err.contains("NaN"), "{err}");

    let mut t = trace.clone();
    t.time_s[3] += 0.3 * (t.time_s[1] - t.time_s[0]);
    t.write(&traces, name).unwrap();
    let (code, _, err) = run_cli(
        dir.path(),
        &[
            "reduce",
            "--traces",
            "traces",
            "--out",
            "r.json",
            "--held-out",
            "0.5",
        ],
    );
    assert_eq!(code, 2, "{err}");
    assert!(err.contains("uniform"), "{err}");
    assert!(!dir.path().join("r.json").exists());
}

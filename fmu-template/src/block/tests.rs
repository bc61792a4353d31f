//! Unit tests of the block engine on small hand-built templates.

use super::*;

fn param(name: &str, value: f64, bounds: [f64; 2], limits: &[LimitKind]) -> ParameterSpec {
    ParameterSpec {
        name: name.into(),
        unit: "s".into(),
        meaning: format!("{name} meaning"),
        value,
        bounds,
        fixed: false,
        limits: limits.to_vec(),
    }
}

fn name(s: &str) -> ParamRef {
    ParamRef::Name(s.into())
}

/// v_re → lag(T) → every output.
fn lag_template(t: f64) -> Template {
    Template {
        name: "lag".into(),
        description: String::new(),
        f_nom_hz: 50.0,
        outputs: OutputMap {
            i_re: "y".into(),
            i_im: "y".into(),
            p: "y".into(),
            q: "y".into(),
        },
        parameters: vec![param(
            "t",
            t,
            [1e-15, 10.0],
            &[LimitKind::ToZero, LimitKind::ToInfinity],
        )],
        blocks: vec![BlockSpec::new("y", "lag")
            .input("u", "v_re")
            .param("t", name("t"))],
    }
}

fn run(model: &BlockModel, free: &[f64], v_re: &[f64], step_s: f64) -> Vec<f64> {
    let v_im = vec![0.0; v_re.len()];
    let input = InputSeries {
        step_s,
        v_re,
        v_im: &v_im,
        f_grid: None,
        initial: InitialOutputs::from_power(v_re[0], 0.0, 0.0, 0.0),
    };
    model.simulate(free, &input, &EvalConfig::default()).i_re
}

#[test]
fn lag_step_response_is_the_exact_exponential_at_the_samples() {
    // first-order lag y' = (u − y)/T from y(0) = 0 under a unit step applied at sample 1 and
    // held (zero-order hold): y(t) = 1 − e^{−(t − t₁)/T} (textbook; common practice)
    let (t_const, h) = (0.013, 1e-3);
    let model = BlockModel::compile(&lag_template(t_const)).unwrap();
    let mut u = vec![1.0; 60];
    u[0] = 0.0;
    let y = run(&model, &[t_const], &u, h);
    assert!(y[0].abs() < 1e-15 && y[1].abs() < 1e-15);
    for (k, yk) in y.iter().enumerate().skip(1) {
        let t = (k - 1) as f64 * h;
        let exact = 1.0 - (-t / t_const).exp();
        assert!((yk - exact).abs() < 1e-14, "sample {k}: {yk} vs {exact}");
    }
}

#[test]
fn lag_limits_are_smooth() {
    let u: Vec<f64> = (0..20).map(|k| (k as f64 * 0.3).sin()).collect();
    // T → 0: a one-step delay
    let model = BlockModel::compile(&lag_template(1e-14)).unwrap();
    let y = run(&model, &[1e-14], &u, 1e-3);
    for k in 1..u.len() {
        assert!((y[k] - u[k - 1]).abs() < 1e-12);
    }
    // T → ∞: frozen at the first sample
    let model = BlockModel::compile(&lag_template(10.0)).unwrap();
    let y = run(&model, &[1e12], &u, 1e-3);
    for yk in &y {
        assert!((yk - u[0]).abs() < 1e-12);
    }
}

#[test]
fn apply_limit_lag_to_zero_matches_tiny_time_constant() {
    let template = lag_template(0.01);
    let r = apply_limit(&template, "t", &Limit::ToZero).unwrap();
    assert_eq!((r.states_before, r.states_after), (1, 0));
    assert_eq!(r.removed_parameters, vec!["t".to_string()]);
    assert!(r.sentence.contains("one-step delay"), "{}", r.sentence);
    let u: Vec<f64> = (0..50)
        .map(|k| (k as f64 * 0.21).cos() + 0.1 * k as f64)
        .collect();
    let reduced = BlockModel::compile(&r.template).unwrap();
    let full = BlockModel::compile(&lag_template(1e-12)).unwrap();
    let a = run(&reduced, &[], &u, 1e-3);
    let b = run(&full, &[1e-12], &u, 1e-3);
    for (x, y) in a.iter().zip(&b) {
        assert!((x - y).abs() < 1e-12);
    }
}

#[test]
fn undeclared_or_meaningless_limits_are_refused() {
    let mut template = lag_template(0.01);
    template.parameters[0].limits = vec![LimitKind::ToZero];
    match apply_limit(&template, "t", &Limit::ToInfinity) {
        Err(LimitError::NotDeclared { parameter, .. }) => assert_eq!(parameter, "t"),
        other => panic!("unexpected {other:?}"),
    }
    match apply_limit(&template, "nope", &Limit::ToZero) {
        Err(LimitError::UnknownParameter { parameter }) => assert_eq!(parameter, "nope"),
        other => panic!("unexpected {other:?}"),
    }
}

#[test]
fn algebraic_loop_is_reported_with_its_blocks() {
    let mut t = lag_template(0.01);
    t.blocks = vec![
        BlockSpec::new("a", "sum").terms(&["+v_re", "-b"]),
        BlockSpec::new("b", "gain")
            .input("u", "a")
            .param("k", ParamRef::Value(0.5)),
        BlockSpec::new("y", "lag")
            .input("u", "b")
            .param("t", name("t")),
    ];
    match BlockModel::compile(&t) {
        Err(TemplateError::AlgebraicLoop { mut blocks }) => {
            blocks.sort();
            assert_eq!(blocks, vec!["a".to_string(), "b".to_string()]);
        }
        other => panic!("unexpected {other:?}"),
    }
    // broken by a lag, the loop runs but has no explicit steady state: the initialisation
    // (lags start at their inputs) names the loop
    t.blocks[1] = BlockSpec::new("b", "lag")
        .input("u", "a")
        .param("t", ParamRef::Value(0.01));
    match BlockModel::compile(&t) {
        Err(TemplateError::InitialisationLoop { mut blocks }) => {
            blocks.sort();
            assert_eq!(blocks, vec!["a".to_string(), "b".to_string()]);
        }
        other => panic!("unexpected {other:?}"),
    }
    // broken by an integrator that starts from a given signal, it compiles and starts at rest
    t.blocks[1] = BlockSpec::new("b", "integrator")
        .input("u", "a")
        .input("init", "v_re")
        .param("k", ParamRef::Value(20.0));
    let model = BlockModel::compile(&t).unwrap();
    let y = run(&model, &[0.01], &[0.7; 10], 1e-3);
    for yk in y {
        assert!((yk - 0.7).abs() < 1e-14);
    }
}

#[test]
fn bad_inputs_name_the_block_or_parameter() {
    let mut t = lag_template(0.01);
    t.blocks[0].kind = "lagg".into();
    assert!(matches!(BlockModel::compile(&t),
        Err(TemplateError::UnknownKind { block, kind, .. }) if block == "y" && kind == "lagg"));

    let mut t = lag_template(0.01);
    t.blocks[0].inputs.insert("x".into(), "v_re".into());
    assert!(matches!(BlockModel::compile(&t),
        Err(TemplateError::UnknownPort { block, port, .. }) if block == "y" && port == "x"));

    let mut t = lag_template(0.01);
    t.blocks[0].inputs.insert("u".into(), "nowhere".into());
    assert!(matches!(BlockModel::compile(&t),
        Err(TemplateError::UnknownSignal { block, signal, .. }) if block == "y" && signal == "nowhere"));

    let t = lag_template(20.0);
    let err = BlockModel::compile(&t).unwrap_err();
    assert!(matches!(&err,
        TemplateError::ParameterOutOfBounds { parameter, value, .. } if parameter == "t" && (*value - 20.0).abs() < 1e-12));
    assert!(err.to_string().contains("`t` = 20"), "{err}");

    let mut t = lag_template(0.01);
    t.blocks[0].params.insert("t".into(), name("tau"));
    assert!(matches!(BlockModel::compile(&t),
        Err(TemplateError::UnknownParameter { block, parameter, .. }) if block == "y" && parameter == "tau"));

    let mut t = lag_template(0.01);
    t.blocks[0].inputs.clear();
    assert!(matches!(BlockModel::compile(&t),
        Err(TemplateError::MissingPort { block, port, .. }) if block == "y" && port == "u"));
}

#[test]
fn dual_jacobian_of_the_lag_matches_the_derivative_of_the_closed_form() {
    // y_k = 1 − e^{−(k−1)h/T} for the step above; ∂y/∂T = −(k−1)h/T²·e^{−(k−1)h/T}
    let (t_const, h) = (0.02, 1e-3);
    let model = BlockModel::compile(&lag_template(t_const)).unwrap();
    let mut u = vec![1.0; 30];
    u[0] = 0.0;
    let v_im = vec![0.0; u.len()];
    let input = InputSeries {
        step_s: h,
        v_re: &u,
        v_im: &v_im,
        f_grid: None,
        initial: InitialOutputs::from_power(0.0, 0.0, 0.0, 0.0),
    };
    let y = model.simulate(
        &[Dual::<1>::seeded(t_const, 0, 1.0)],
        &input,
        &EvalConfig::default(),
    );
    for (k, yk) in y.i_re.iter().enumerate().skip(1) {
        let t = (k - 1) as f64 * h;
        let exact = -t / (t_const * t_const) * (-t / t_const).exp();
        assert!((yk.d[0] - exact).abs() < 1e-10, "sample {k}");
    }
}

#[test]
fn substeps_refine_the_integrator_and_zero_is_rejected() {
    assert!(matches!(
        EvalConfig::default().with_substeps(0),
        Err(TemplateError::BadSetting {
            setting: "substeps",
            ..
        })
    ));
    // integrator y' = k·u from 0 under u = 1: exact at any step; a lag under a held step too
    let t = lag_template(0.004);
    let model = BlockModel::compile(&t).unwrap();
    let u = vec![0.0, 1.0, 1.0, 1.0, 1.0];
    let v_im = vec![0.0; u.len()];
    let input = InputSeries {
        step_s: 1e-3,
        v_re: &u,
        v_im: &v_im,
        f_grid: None,
        initial: InitialOutputs::from_power(0.0, 0.0, 0.0, 0.0),
    };
    let one = model.simulate(&[0.004], &input, &EvalConfig::default());
    let four = model.simulate(
        &[0.004],
        &input,
        &EvalConfig::default().with_substeps(4).unwrap(),
    );
    for (a, b) in one.i_re.iter().zip(&four.i_re) {
        // exact ZOH: the same samples whatever the internal step
        assert!((a - b).abs() < 1e-14);
    }
}

/// A reactive-current loop in the ideal-tracking pattern: a voltage droop sets the reference
/// i_ref = 0.1 + k_v·(u_ref − |v|); a PI (kp, ki) drives the command through a gain 0.8 into the
/// converter's current lag t_i; the PI compares i_ref with the lag's output.
fn tracking_template(kp: f64, ki: f64) -> Template {
    let limits = [LimitKind::ToZero, LimitKind::IdealTracking];
    Template {
        name: "tracking".into(),
        description: String::new(),
        f_nom_hz: 50.0,
        outputs: OutputMap {
            i_re: "i_r".into(),
            i_im: "e".into(),
            p: "u".into(),
            q: "i_ref".into(),
        },
        parameters: vec![
            param("kp", kp, [1e-6, 1e6], &limits),
            param("ki", ki, [1e-6, 1e8], &limits),
            param("t_i", 0.02, [1e-6, 1.0], &[LimitKind::ToZero]),
            param("k_v", 2.0, [1e-3, 10.0], &[LimitKind::ToZero]),
        ],
        blocks: vec![
            BlockSpec::new("u", "magnitude")
                .input("re", "v_re")
                .input("im", "v_im"),
            BlockSpec::new("u_ref", "setpoint").option("initial", "u"),
            BlockSpec::new("drop", "sum").terms(&["+u_ref", "-u"]),
            BlockSpec::new("extra", "gain")
                .input("u", "drop")
                .param("k", name("k_v")),
            BlockSpec::new("i_0", "constant").param("value", ParamRef::Value(0.1)),
            BlockSpec::new("i_ref", "sum").terms(&["+i_0", "+extra"]),
            BlockSpec::new("e", "sum").terms(&["+i_ref", "-i_r"]),
            // the PI starts where the lag's input equals the reference (at rest)
            BlockSpec::new("ctrl_0", "gain")
                .input("u", "i_ref")
                .param("k", ParamRef::Value(1.25)),
            BlockSpec::new("ctrl", "pi")
                .input("u", "e")
                .input("init", "ctrl_0")
                .param("kp", name("kp"))
                .param("ki", name("ki")),
            BlockSpec::new("cmd", "gain")
                .input("u", "ctrl")
                .param("k", ParamRef::Value(0.8)),
            BlockSpec::new("i_r", "lag")
                .input("u", "cmd")
                .param("t", name("t_i")),
        ],
    }
}

/// Outputs [i_r, e, u, i_ref] of `t` at its own values on a smooth 30 % dip sampled at `step_s`.
fn tracking_run(t: &Template, step_s: f64, n: usize) -> [Vec<f64>; 4] {
    let m = BlockModel::compile(t).unwrap();
    let depth = |k: usize| {
        let x = (k as f64 / n as f64 * 4.0 - 1.0).clamp(0.0, 1.0);
        0.3 * (std::f64::consts::PI * x).sin().powi(2)
    };
    let v_re: Vec<f64> = (0..n).map(|k| 1.0 - depth(k)).collect();
    let v_im = vec![0.0; n];
    let input = InputSeries {
        step_s,
        v_re: &v_re,
        v_im: &v_im,
        f_grid: None,
        initial: InitialOutputs::from_power(1.0, 0.0, 0.0, 0.1),
    };
    let o = m.simulate(&m.free_parameter_values(), &input, &EvalConfig::default());
    [o.i_re, o.i_im, o.p, o.q]
}

#[test]
fn ideal_tracking_rewrite_matches_the_loop_with_very_large_gains() {
    // closed loop ≈ first order with τ = t_i/(0.8·kp) when ki/kp = 1/t_i (pole-zero
    // cancellation, common practice); kp = 1000 gives τ = 25 µs against a 25 ms dip, sampled at
    // 10 µs (the engine's explicit PI update needs the loop to stay slower than the step); the
    // loop then lags the reference by about τ·di_ref/dt ≈ 0.3 % of the swing
    let (kp, step_s, n) = (1000.0, 1e-5, 10_000);
    let fast = tracking_template(kp, kp / 0.02);
    let r = apply_limit(&fast, "kp", &Limit::IdealTracking).unwrap();
    eprintln!("{}", r.sentence);
    assert_eq!((r.states_before, r.states_after), (2, 0));
    let mut removed = r.removed_parameters.clone();
    removed.sort();
    assert_eq!(removed, vec!["ki", "kp", "t_i"]);
    assert!(r
        .sentence
        .contains("`i_r` (lag `i_r`) follows its reference `i_ref` exactly"));
    // nothing but the reference is left for the controlled current
    assert!(r.template.blocks.iter().all(|b| b.name != "i_r"));
    assert_eq!(r.template.outputs.i_re, "i_ref");

    let original = tracking_run(&fast, step_s, n);
    let rewritten = tracking_run(&r.template, step_s, n);
    let swing = original[3].iter().fold(f64::MIN, |a, &b| a.max(b))
        - original[3].iter().fold(f64::MAX, |a, &b| a.min(b));
    assert!(swing > 0.5, "the dip moves the reference by {swing}");
    let max_diff = |a: &[f64], b: &[f64]| {
        a.iter()
            .zip(b)
            .map(|(x, y)| (x - y).abs())
            .fold(0.0, f64::max)
    };
    let diff_current = max_diff(&original[0], &rewritten[0]);
    let diff_error = max_diff(&original[1], &rewritten[1]);
    eprintln!("swing {swing:.3}: max |Δi_r| {diff_current:.2e}, max |Δe| {diff_error:.2e}");
    assert!(diff_current < 0.01 * swing, "{diff_current}");
    assert!(diff_error < 0.01 * swing, "{diff_error}");
    assert!(max_diff(&original[3], &rewritten[3]) < 1e-12);
    // a slow PI is visibly not ideal tracking: the rewrite is not trivially close
    let slow = tracking_run(&tracking_template(1.0, 50.0), step_s, n);
    let diff_slow = max_diff(&slow[0], &rewritten[0]);
    assert!(
        diff_slow > 10.0 * diff_current,
        "slow {diff_slow} vs fast {diff_current}"
    );
}

#[test]
fn ideal_tracking_outside_its_pattern_names_the_block() {
    // the chain's command read outside the loop while the reference varies: y = r + T·ṙ
    let mut t = tracking_template(100.0, 5000.0);
    t.outputs.p = "cmd".into();
    match apply_limit(&t, "kp", &Limit::IdealTracking) {
        Err(LimitError::Unsupported { block, reason, .. }) => {
            assert_eq!(block, "i_r (lag)");
            assert!(reason.contains("would need its derivative"), "{reason}");
        }
        other => panic!("{other:?}"),
    }
    // ... which is fine for a constant reference
    let mut t = tracking_template(100.0, 5000.0);
    t.outputs.p = "cmd".into();
    t.blocks.retain(|b| b.name != "i_ref");
    t.blocks
        .push(BlockSpec::new("i_ref", "sum").terms(&["+i_0"]));
    let r = apply_limit(&t, "kp", &Limit::IdealTracking).unwrap();
    // the command holds i_ref / 0.8 so that the lag's input is the reference
    let o = tracking_run(&r.template, 1e-3, 20);
    assert!(o[2].iter().all(|c| (c - 0.1).abs() < 1e-12), "{:?}", o[2]);
    // a second lag in the loop: relative degree two, refused at that block
    let mut t = tracking_template(100.0, 5000.0);
    t.blocks.push(
        BlockSpec::new("cmd_filter", "lag")
            .input("u", "ctrl")
            .param("t", name("t_i")),
    );
    t.blocks
        .iter_mut()
        .find(|b| b.name == "cmd")
        .unwrap()
        .inputs
        .insert("u".into(), "cmd_filter".into());
    match apply_limit(&t, "kp", &Limit::IdealTracking) {
        Err(LimitError::Unsupported { block, reason, .. }) => {
            assert_eq!(block, "cmd_filter (lag)", "{reason}");
        }
        other => panic!("{other:?}"),
    }
    // not a PI gain
    assert!(matches!(
        apply_limit(&tracking_template(1.0, 1.0), "k_v", &Limit::IdealTracking),
        Err(LimitError::NotDeclared { .. })
    ));
}

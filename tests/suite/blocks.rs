//! The block-model engine (`understudy_runtime::block`) and its fitting adapter
//! (`understudy::greybox`): exact sensitivities of every block against central differences,
//! template checks, limits, and the generic template fitted to the detailed model.

use proptest::prelude::*;
use understudy::fit::{LevenbergMarquardt, LmConfig};
use understudy::greybox::{generic_converter, FitTrace, SignalWeights, TemplateFit};
use understudy::scenario::Case;
use understudy::simulate::{simulate_case, SimulationSettings};
use understudy_runtime::block::{
    apply_limit, BlockModel, BlockSpec, Dual, EvalConfig, InitialOutputs, InputSeries, Limit,
    LimitKind, OutputMap, ParamRef, ParameterSpec, Scalar, Template, TemplateError,
};
use understudy_runtime::unit::{Disturbance, GridEquivalent, OperatingPoint};

// ------------------------------------------------------------------ helpers

fn parameter(name: &str, value: f64) -> ParameterSpec {
    ParameterSpec {
        name: name.into(),
        unit: "pu".into(),
        meaning: format!("test parameter {name}"),
        value,
        bounds: [1e-9, 1e9],
        fixed: false,
        limits: vec![LimitKind::ToZero, LimitKind::ToInfinity, LimitKind::Merge],
    }
}

fn p(name: &str) -> ParamRef {
    ParamRef::Name(name.into())
}

/// A template around `blocks` whose four outputs are the given signals.
fn wrap(params: &[(&str, f64)], blocks: Vec<BlockSpec>, outputs: [&str; 4]) -> Template {
    Template {
        name: "test".into(),
        description: String::new(),
        f_nom_hz: 50.0,
        outputs: OutputMap {
            i_re: outputs[0].into(),
            i_im: outputs[1].into(),
            p: outputs[2].into(),
            q: outputs[3].into(),
        },
        parameters: params.iter().map(|(n, v)| parameter(n, *v)).collect(),
        blocks,
    }
}

/// A smooth-plus-step voltage phasor series: magnitude dips at sample 12, angle drifts.
fn voltage(n: usize, depth: f64, drift: f64) -> (Vec<f64>, Vec<f64>) {
    let mut re = Vec::with_capacity(n);
    let mut im = Vec::with_capacity(n);
    for k in 0..n {
        let t = k as f64;
        let mag = if (12..30).contains(&k) {
            1.0 - depth
        } else {
            1.0
        } + 0.02 * (0.37 * t).sin();
        let ang = 0.1 + drift * t + 0.05 * (0.21 * t).cos();
        re.push(mag * ang.cos());
        im.push(mag * ang.sin());
    }
    (re, im)
}

/// Every output of `template` at `free`, flattened.
fn outputs_f64(model: &BlockModel, free: &[f64], v: &(Vec<f64>, Vec<f64>)) -> Vec<f64> {
    let input = InputSeries {
        step_s: 1e-3,
        v_re: &v.0,
        v_im: &v.1,
        f_grid: None,
        initial: InitialOutputs::from_power(v.0[0], v.1[0], 0.6, 0.1),
    };
    let o = model.simulate(free, &input, &EvalConfig::default());
    [o.i_re, o.i_im, o.p, o.q].concat()
}

/// Compare the dual-number derivatives of every output with central differences in each
/// parameter (relative step 1e-6; relative agreement 1e-5 of the column's scale).
fn check_sensitivities(template: &Template, v: &(Vec<f64>, Vec<f64>)) -> Result<(), TestCaseError> {
    let model = BlockModel::compile(template).map_err(|e| TestCaseError::fail(e.to_string()))?;
    let free = model.free_parameter_values();
    let input = InputSeries {
        step_s: 1e-3,
        v_re: &v.0,
        v_im: &v.1,
        f_grid: None,
        initial: InitialOutputs::from_power(v.0[0], v.1[0], 0.6, 0.1),
    };
    for j in 0..free.len() {
        let duals: Vec<Dual<1>> = free
            .iter()
            .enumerate()
            .map(|(k, &x)| {
                if k == j {
                    Dual::seeded(x, 0, 1.0)
                } else {
                    Dual::cst(x)
                }
            })
            .collect();
        let o = model.simulate(&duals, &input, &EvalConfig::default());
        let exact: Vec<f64> = [o.i_re, o.i_im, o.p, o.q]
            .concat()
            .iter()
            .map(|d| d.d[0])
            .collect();
        let central = |h: f64| -> Vec<f64> {
            let mut plus = free.clone();
            let mut minus = free.clone();
            plus[j] += h;
            minus[j] -= h;
            let (a, b) = (
                outputs_f64(&model, &plus, v),
                outputs_f64(&model, &minus, v),
            );
            a.iter()
                .zip(&b)
                .map(|(x, y)| (x - y) / (plus[j] - minus[j]))
                .collect()
        };
        let fd = central(1e-6 * free[j]);
        // a switch (limiter, detector) flipping within the stencil makes the discrete model
        // non-differentiable there: the difference quotient then changes with the step.
        // Such draws are discarded, not compared (the dual gives the taken branch's derivative).
        let fd_half = central(0.5e-6 * free[j]);
        let scale_fd = fd.iter().fold(0.0_f64, |m, x| m.max(x.abs())).max(1e-8);
        prop_assume!(fd
            .iter()
            .zip(&fd_half)
            .all(|(a, b)| (a - b).abs() <= 1e-6 * scale_fd.max(1.0)));
        let scale = fd.iter().fold(0.0_f64, |m, x| m.max(x.abs())).max(1e-8);
        for (k, (e, f)) in exact.iter().zip(&fd).enumerate() {
            prop_assert!(
                (e - f).abs() <= 1e-5 * scale,
                "{}: parameter {} output entry {k}: dual {e}, central difference {f} (scale {scale})",
                template.blocks.iter().map(|b| b.kind.as_str()).collect::<Vec<_>>().join("+"),
                model.free_parameter_names()[j]
            );
        }
    }
    Ok(())
}

// ------------------------------------------------------------------ sensitivities, block by block

fn mag() -> BlockSpec {
    BlockSpec::new("u", "magnitude")
        .input("re", "v_re")
        .input("im", "v_im")
}

proptest! {
    #![proptest_config(ProptestConfig::with_cases(12))]

    #[test]
    fn lag_lead_lag_washout_gain_sensitivities(t1 in 1e-4f64..0.05, t2 in 1e-4f64..0.05,
                                               k in 0.1f64..5.0, depth in 0.1f64..0.6) {
        let tpl = wrap(&[("t1", t1), ("t2", t2), ("k", k)], vec![
            mag(),
            BlockSpec::new("a", "lag").input("u", "u").param("t", p("t1")),
            BlockSpec::new("b", "lead-lag").input("u", "a").param("t_lead", p("t1")).param("t_lag", p("t2")),
            BlockSpec::new("c", "washout").input("u", "u").param("t", p("t2")),
            BlockSpec::new("d", "gain").input("u", "c").param("k", p("k")),
        ], ["a", "b", "c", "d"]);
        check_sensitivities(&tpl, &voltage(50, depth, 0.0))?;
    }

    #[test]
    fn pi_integrator_sum_product_sensitivities(kp in 0.05f64..3.0, ki in 0.5f64..50.0,
                                               k in 0.5f64..20.0, depth in 0.1f64..0.6) {
        let tpl = wrap(&[("kp", kp), ("ki", ki), ("k", k)], vec![
            mag(),
            BlockSpec::new("ref", "setpoint").option("initial", "u"),
            BlockSpec::new("e", "sum").terms(&["+ref", "-u"]),
            BlockSpec::new("pi", "pi").input("u", "e").input("init", "ref").param("kp", p("kp")).param("ki", p("ki")),
            BlockSpec::new("int", "integrator").input("u", "e").param("k", p("k")),
            BlockSpec::new("ratio", "product").terms(&["pi", "/u", "int"]),
        ], ["pi", "int", "ratio", "e"]);
        check_sensitivities(&tpl, &voltage(50, depth, 0.0))?;
    }

    #[test]
    fn proportional_delay_hold_sensitivities(kp in 0.05f64..3.0, t in 1e-4f64..0.05,
                                             depth in 0.1f64..0.6) {
        let tpl = wrap(&[("kp", kp), ("t", t)], vec![
            mag(),
            BlockSpec::new("ref", "setpoint").option("initial", "u"),
            BlockSpec::new("f", "lag").input("u", "u").param("t", p("t")),
            BlockSpec::new("e", "sum").terms(&["+ref", "-f"]),
            BlockSpec::new("prop", "proportional").input("u", "e").input("init", "ref").param("kp", p("kp")),
            BlockSpec::new("late", "delay").input("u", "prop"),
            BlockSpec::new("held", "hold").input("u", "prop"),
            BlockSpec::new("mix", "product").terms(&["held", "late"]),
        ], ["prop", "late", "mix", "e"]);
        check_sensitivities(&tpl, &voltage(50, depth, 0.0))?;
    }

    #[test]
    fn limiters_dead_band_rate_limiter_sensitivities(lo in 0.3f64..0.6, hi in 0.9f64..1.1,
                                                     w in 0.05f64..0.3, rate in 5.0f64..200.0,
                                                     k in 0.5f64..3.0, depth in 0.1f64..0.6) {
        let tpl = wrap(&[("lo", lo), ("hi", hi), ("w", w), ("rate", rate), ("k", k)], vec![
            mag(),
            BlockSpec::new("g", "gain").input("u", "u").param("k", p("k")),
            BlockSpec::new("lim", "limiter").input("u", "g").param("min", p("lo")).param("max", p("hi")),
            BlockSpec::new("hi_s", "gain").input("u", "u").param("k", p("hi")),
            BlockSpec::new("vlim", "variable-limiter").input("u", "g").input("min", "lim").input("max", "hi_s"),
            BlockSpec::new("one", "constant").param("value", ParamRef::Value(1.0)),
            BlockSpec::new("drop", "sum").terms(&["+one", "-g"]),
            BlockSpec::new("db", "dead-band").input("u", "drop").param("width", p("w")),
            BlockSpec::new("rl", "rate-limiter").input("u", "g").param("rise", p("rate")).param("fall", p("rate")),
        ], ["lim", "vlim", "db", "rl"]);
        check_sensitivities(&tpl, &voltage(50, depth, 0.0))?;
    }

    #[test]
    fn detector_select_current_limit_sensitivities(th in 0.8f64..0.9, hy in 0.01f64..0.05,
                                                   imax in 0.9f64..1.3, k in 1.0f64..3.0,
                                                   depth in 0.2f64..0.6) {
        let tpl = wrap(&[("th", th), ("hy", hy), ("imax", imax), ("k", k)], vec![
            mag(),
            BlockSpec::new("dip", "detector").input("u", "u").param("threshold", p("th")).param("hysteresis", p("hy")),
            BlockSpec::new("ip", "product").terms(&["v_re", "/u"]),
            BlockSpec::new("one", "constant").param("value", ParamRef::Value(1.0)),
            BlockSpec::new("drop", "sum").terms(&["+one", "-u"]),
            BlockSpec::new("iq", "gain").input("u", "drop").param("k", p("k")),
            BlockSpec::new("lim", "current-limit").input("p", "ip").input("q", "iq")
                .input("reactive_priority", "dip").param("i_max", p("imax")),
            BlockSpec::new("sel", "select").input("condition", "dip").input("when_true", "lim.q").input("when_false", "ip"),
        ], ["lim.p", "lim.q", "sel", "dip"]);
        check_sensitivities(&tpl, &voltage(50, depth, 0.0))?;
    }

    #[test]
    fn pll_dq_power_sensitivities(kp in 0.1f64..1.0, ki in 5.0f64..60.0, t in 1e-4f64..0.02,
                                  drift in -0.01f64..0.01, depth in 0.1f64..0.5) {
        let tpl = wrap(&[("kp", kp), ("ki", ki), ("t", t)], vec![
            BlockSpec::new("pll", "pll").input("re", "v_re").input("im", "v_im").param("kp", p("kp")).param("ki", p("ki")),
            BlockSpec::new("vdq", "to-dq").input("re", "v_re").input("im", "v_im").input("angle", "pll.angle"),
            BlockSpec::new("id", "lag").input("u", "vdq.d").param("t", p("t")),
            BlockSpec::new("i", "from-dq").input("d", "id").input("q", "vdq.q").input("angle", "pll.angle"),
            BlockSpec::new("s", "power").input("v_re", "v_re").input("v_im", "v_im").input("i_re", "i.re").input("i_im", "i.im"),
        ], ["i.re", "i.im", "s.p", "pll.freq"]);
        check_sensitivities(&tpl, &voltage(60, depth, drift))?;
    }
}

// ------------------------------------------------------------------ the generic template

#[test]
fn generic_template_parses_from_toml_and_json_and_starts_at_rest() {
    let t = generic_converter();
    let model = BlockModel::compile(&t).unwrap();
    let free = model.free_parameter_names();
    assert!(
        (15..=25).contains(&t.parameters.len()),
        "{} parameters",
        t.parameters.len()
    );
    assert!(free.len() >= 12);
    // JSON round trip gives the same template
    let json = serde_json::to_string_pretty(&t).unwrap();
    let back = understudy::greybox::parse_template(&json, true, "round trip").unwrap();
    assert_eq!(back, t);
    // a flat voltage keeps the first sample's P, Q and current
    let n = 200;
    let (re, im) = (vec![0.98 * 0.3f64.cos(); n], vec![0.98 * 0.3f64.sin(); n]);
    let initial = InitialOutputs::from_power(re[0], im[0], 0.7, -0.12);
    let input = InputSeries {
        step_s: 1e-3,
        v_re: &re,
        v_im: &im,
        f_grid: None,
        initial,
    };
    let o = model.simulate(
        &model.free_parameter_values(),
        &input,
        &EvalConfig::default(),
    );
    for k in 0..n {
        assert!(
            (o.p[k] - 0.7).abs() < 1e-12 && (o.q[k] + 0.12).abs() < 1e-12,
            "sample {k}"
        );
        assert!((o.i_re[k] - initial.i_re).abs() < 1e-12);
    }
}

fn detailed_cases() -> Vec<Case> {
    let op = |p: f64, q: f64| OperatingPoint::new(p, q);
    let grid = |scr: f64| GridEquivalent { scr, x_over_r: 8.0 };
    vec![
        Case {
            index: 1,
            operating_point: op(0.8, 0.0),
            grid: grid(5.0),
            disturbance: Disturbance::Fault {
                start_s: 0.1,
                duration_s: 0.15,
                retained_voltage: 0.3,
            },
            profile_hour: None,
        },
        Case {
            index: 2,
            operating_point: op(0.5, 0.1),
            grid: grid(8.0),
            disturbance: Disturbance::VoltageDip {
                start_s: 0.1,
                duration_s: 0.2,
                residual_voltage: 0.6,
                phase_jump_deg: 0.0,
            },
            profile_hour: None,
        },
        Case {
            index: 3,
            operating_point: op(1.0, -0.1),
            grid: grid(4.0),
            disturbance: Disturbance::Fault {
                start_s: 0.1,
                duration_s: 0.1,
                retained_voltage: 0.55,
            },
            profile_hour: None,
        },
        Case {
            index: 4,
            operating_point: op(0.6, 0.0),
            grid: grid(6.0),
            disturbance: Disturbance::PhaseJump {
                start_s: 0.1,
                angle_deg: 15.0,
            },
            profile_hour: None,
        },
        Case {
            index: 5,
            operating_point: op(0.7, 0.05),
            grid: grid(5.0),
            disturbance: Disturbance::Swell {
                start_s: 0.1,
                duration_s: 0.2,
                magnitude: 1.1,
            },
            profile_hour: None,
        },
    ]
}

fn detailed_traces(duration_s: f64) -> Vec<FitTrace> {
    let study = understudy::demo::demo_study();
    let settings = SimulationSettings {
        duration_s,
        internal_signals: false,
        ..SimulationSettings::default()
    };
    detailed_cases()
        .iter()
        .map(|case| {
            let (trace, _) = simulate_case(&study.unit, case, &settings).unwrap();
            FitTrace::from_trace(&trace, &case.stem()).unwrap()
        })
        .collect()
}

#[test]
fn generic_template_fits_the_detailed_full_converter() {
    let traces = detailed_traces(0.6);
    let problem = TemplateFit::new(
        &generic_converter(),
        traces,
        SignalWeights::default(),
        EvalConfig::default(),
    )
    .unwrap();
    let start = problem.start_log_params();
    let before = problem.nrmse(&start);
    // the residuals are piecewise smooth (switches act on samples), so a fixed iteration
    // budget is used and the best point taken, rather than waiting for tight tolerances
    let lm = LevenbergMarquardt::new(
        LmConfig::default()
            .with_max_iterations(40)
            .unwrap()
            .with_tolerances(1e-6, 1e-8, 1e-8)
            .unwrap(),
    );
    let mut state = lm.init(&problem, &start).unwrap();
    let cost_start = state.cost;
    while state.termination.is_none() && state.iteration < 40 {
        if lm.next_iter(&problem, &mut state).is_err() {
            break;
        }
    }
    let fitted: Vec<f64> = state.log_params.iter().copied().collect();
    let after = problem.nrmse(&fitted);
    eprintln!("NRMSE (i_re, i_im, p, q) at the start {before:?}, fitted {after:?}");
    eprintln!(
        "fit: {:?} after {} iterations, cost {cost_start} → {}",
        state.termination, state.iteration, state.cost
    );
    for (n, v) in problem.model().free_parameter_names().iter().zip(&fitted) {
        eprintln!("  {n} = {:.4e}", v.exp());
    }
    assert!(
        after[2] < 0.05 && after[3] < 0.05,
        "NRMSE of P and Q: {after:?}"
    );
}

#[test]
fn generic_template_voltage_filter_to_zero_equals_a_vanishing_time_constant() {
    let traces = detailed_traces(0.4);
    let full = generic_converter();
    let reduction = apply_limit(&full, "t_u_filter", &Limit::ToZero).unwrap();
    eprintln!("{}", reduction.sentence);
    assert_eq!(reduction.states_after + 1, reduction.states_before);
    assert_eq!(reduction.removed_parameters, vec!["t_u_filter".to_string()]);
    assert!(reduction
        .sentence
        .starts_with("voltage measurement filter time constant (t_u_filter) → 0"));
    let mut tiny = full.clone();
    let spec = tiny.parameter_mut("t_u_filter").unwrap();
    spec.bounds[0] = 1e-13;
    spec.value = 1e-12;
    let (reduced, tiny) = (
        BlockModel::compile(&reduction.template).unwrap(),
        BlockModel::compile(&tiny).unwrap(),
    );
    for t in &traces {
        let input = InputSeries {
            step_s: t.step_s,
            v_re: &t.v_re,
            v_im: &t.v_im,
            f_grid: None,
            initial: InitialOutputs::from_power(t.v_re[0], t.v_im[0], t.p[0], t.q[0]),
        };
        let a = reduced.simulate(
            &reduced.free_parameter_values(),
            &input,
            &EvalConfig::default(),
        );
        let b = tiny.simulate(
            &tiny.free_parameter_values(),
            &input,
            &EvalConfig::default(),
        );
        for (x, y) in [
            (&a.p, &b.p),
            (&a.q, &b.q),
            (&a.i_re, &b.i_re),
            (&a.i_im, &b.i_im),
        ] {
            let worst = x
                .iter()
                .zip(y.iter())
                .map(|(x, y)| (x - y).abs())
                .fold(0.0, f64::max);
            assert!(worst < 1e-9, "{}: largest difference {worst}", t.name);
        }
    }
    // the reduced template is data again: it survives JSON
    let json = serde_json::to_string(&reduction.template).unwrap();
    assert_eq!(
        serde_json::from_str::<Template>(&json).unwrap(),
        reduction.template
    );
}

#[test]
fn template_file_errors_name_the_block_port_and_parameter() {
    let text = understudy::greybox::GENERIC_CONVERTER_TOML;
    let bad_kind = text.replace("kind = \"dead-band\"", "kind = \"deadband\"");
    let template_error = |r: Result<Template, understudy::greybox::GreyboxError>| match r {
        Err(understudy::greybox::GreyboxError::Invalid { source, .. }) => *source,
        other => panic!("unexpected {other:?}"),
    };
    match template_error(understudy::greybox::parse_template(&bad_kind, false, "t")) {
        TemplateError::UnknownKind { block, .. } => assert_eq!(block, "drop_beyond"),
        other => panic!("unexpected {other:?}"),
    }
    let bad_port = text.replace(
        "inputs = { u = \"drop_beyond\" }",
        "inputs = { x = \"drop_beyond\" }",
    );
    let err = understudy::greybox::parse_template(&bad_port, false, "t").unwrap_err();
    assert!(
        err.to_string()
            .contains("block `i_r_extra` (gain): unknown input port `x`"),
        "{err}"
    );
    let out_of_bounds = text.replace("value = 1.1\n", "value = 9.0\n");
    let err = understudy::greybox::parse_template(&out_of_bounds, false, "t").unwrap_err();
    assert!(err.to_string().contains("parameter `i_max` = 9"), "{err}");
    // a loop of direct-feedthrough blocks
    let looped = text.replace(
        "terms = [\"+i_p0\", \"+p_pi\"]",
        "terms = [\"+i_p0\", \"+p_pi\", \"+i_d_ref\"]",
    );
    match template_error(understudy::greybox::parse_template(&looped, false, "t")) {
        TemplateError::AlgebraicLoop { blocks } => {
            for b in ["i_p_cmd", "lim", "i_d_ref"] {
                assert!(blocks.iter().any(|x| x == b), "{blocks:?}");
            }
        }
        other => panic!("unexpected {other:?}"),
    }
}

/// A designed template whose voltage measurement filter (10 µs) is 100× faster than the
/// 1 ms sampling, ahead of a PI voltage controller and a 20 ms current lag.
fn fast_filter_template() -> Template {
    let mut t = wrap(
        &[("t_meas", 1e-5), ("kp", 0.5), ("ki", 20.0), ("t_i", 0.02)],
        vec![
            mag(),
            BlockSpec::new("u_meas", "lag")
                .input("u", "u")
                .param("t", p("t_meas")),
            BlockSpec::new("u_ref", "setpoint").option("initial", "u"),
            BlockSpec::new("e", "sum").terms(&["+u_ref", "-u_meas"]),
            BlockSpec::new("ctrl", "pi")
                .input("u", "e")
                .input("init", "u_ref")
                .param("kp", p("kp"))
                .param("ki", p("ki")),
            BlockSpec::new("i_r", "lag")
                .input("u", "ctrl")
                .param("t", p("t_i")),
        ],
        ["i_r", "ctrl", "e", "u_meas"],
    );
    t.parameters[0].meaning = "voltage measurement filter time constant".into();
    for q in &mut t.parameters {
        q.bounds = [1e-8, 1e4];
    }
    t
}

#[test]
fn mbam_first_reduction_removes_a_filter_much_faster_than_the_sampling() {
    use understudy::greybox::TemplateReducer;
    use understudy::reduce::{mbam_step, GeodesicConfig, MbamConfig, SpeedNormalisation};
    let template = fast_filter_template();
    let model = BlockModel::compile(&template).unwrap();
    let truth = model.free_parameter_values();
    // synthetic traces of the designed template itself: three dips of different depth
    let traces: Vec<FitTrace> = [0.2, 0.35, 0.5]
        .iter()
        .enumerate()
        .map(|(k, depth)| {
            let (v_re, v_im) = voltage(120, *depth, 0.0);
            let input = InputSeries {
                step_s: 1e-3,
                v_re: &v_re,
                v_im: &v_im,
                f_grid: None,
                initial: InitialOutputs::from_power(v_re[0], v_im[0], 0.0, 0.0),
            };
            let o = model.simulate(&truth, &input, &EvalConfig::default());
            FitTrace {
                name: format!("designed_{k}"),
                step_s: 1e-3,
                v_re: v_re.clone(),
                v_im: v_im.clone(),
                f_grid: None,
                i_re: o.i_re,
                i_im: o.i_im,
                p: o.p,
                q: o.q,
            }
        })
        .collect();
    let problem = TemplateFit::new(
        &template,
        traces.clone(),
        SignalWeights::default(),
        EvalConfig::default(),
    )
    .unwrap();
    let fitted = problem.start_log_params();
    let reducer = TemplateReducer {
        template: template.clone(),
        traces,
        weights: SignalWeights::default(),
        eval: EvalConfig::default(),
    };
    // |v| = 1 in log-parameters: the filter direction moves the data by ~e^{−100}, so a unit
    // speed on the model manifold would need an astronomically long parameter step
    let config = MbamConfig {
        geodesic: GeodesicConfig::default()
            .with_speed_normalisation(SpeedNormalisation::ParameterSpace),
        ..MbamConfig::default()
    };
    let (record, reduced) = mbam_step(&problem, &fitted, &reducer, &config).unwrap();
    eprintln!("{}\n{}", record.reading.sentence, record.reduction);
    eprintln!(
        "cost {} → {}; names after {:?}",
        record.cost_before, record.cost_after, record.names_after
    );
    assert!(
        record
            .reduction
            .starts_with("voltage measurement filter time constant (t_meas) → 0"),
        "{}",
        record.reduction
    );
    assert_eq!(record.names_after, vec!["kp", "ki", "t_i"]);
    assert_eq!(reduced.model.parameter_names(), vec!["kp", "ki", "t_i"]);
    assert!(
        reduced.description.contains("1 state") || reduced.description.contains("3 → 2 states")
    );
    // the reduced model reproduces the designed one: the filter was invisible at 1 ms
    assert!(
        record.cost_after < 1e-12,
        "cost after refit {}",
        record.cost_after
    );
}

/// A designed template whose reactive-current PI is about 100× faster than the data need: a
/// voltage droop sets the reference i_ref = 0.1 + k_v·(u_ref − |v|) (edges of ~25 ms); the PI
/// drives a 20 ms current lag through a gain 0.8 with kp = 100, ki = kp/t_i, so the closed loop's
/// time constant t_i/(0.8·kp) = 0.25 ms (pole-zero cancellation, common practice).
fn fast_pi_template() -> Template {
    let mut t = wrap(
        &[("kp", 100.0), ("ki", 5000.0), ("t_i", 0.02), ("k_v", 2.0)],
        vec![
            mag(),
            BlockSpec::new("u_ref", "setpoint").option("initial", "u"),
            BlockSpec::new("drop", "sum").terms(&["+u_ref", "-u"]),
            BlockSpec::new("extra", "gain")
                .input("u", "drop")
                .param("k", p("k_v")),
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
                .param("kp", p("kp"))
                .param("ki", p("ki")),
            BlockSpec::new("cmd", "gain")
                .input("u", "ctrl")
                .param("k", ParamRef::Value(0.8)),
            BlockSpec::new("i_r", "lag")
                .input("u", "cmd")
                .param("t", p("t_i")),
        ],
        ["i_r", "u", "u", "i_ref"],
    );
    for q in &mut t.parameters {
        q.limits = match q.name.as_str() {
            "kp" | "ki" => vec![LimitKind::ToZero, LimitKind::IdealTracking],
            _ => vec![LimitKind::ToZero],
        };
        q.bounds = [1e-6, 1e8];
    }
    t.parameters[0].meaning = "reactive current control proportional gain".into();
    t.parameters[1].meaning = "reactive current control integral gain".into();
    t
}

#[test]
fn mbam_first_reduction_of_a_needlessly_fast_pi_is_ideal_tracking() {
    use understudy::greybox::TemplateReducer;
    use understudy::reduce::{mbam_step, GeodesicConfig, MbamConfig, SpeedNormalisation};
    let template = fast_pi_template();
    let model = BlockModel::compile(&template).unwrap();
    let truth = model.free_parameter_values();
    // the engine's explicit PI update needs internal steps below the loop's time constant
    let eval = EvalConfig::default().with_substeps(20).unwrap();
    let dip = |n: usize, depth: f64| -> Vec<f64> {
        (0..n)
            .map(|k| {
                let x = ((k as f64 - 20.0) / 25.0).clamp(0.0, 1.0);
                let y = ((k as f64 - 80.0) / 25.0).clamp(0.0, 1.0);
                1.0 - depth
                    * ((std::f64::consts::FRAC_PI_2 * x).sin().powi(2)
                        - (std::f64::consts::FRAC_PI_2 * y).sin().powi(2))
            })
            .collect()
    };
    let traces: Vec<FitTrace> = [0.2, 0.35, 0.5]
        .iter()
        .enumerate()
        .map(|(k, depth)| {
            let v_re = dip(140, *depth);
            let v_im = vec![0.0; v_re.len()];
            let input = InputSeries {
                step_s: 1e-3,
                v_re: &v_re,
                v_im: &v_im,
                f_grid: None,
                initial: InitialOutputs::from_power(v_re[0], v_im[0], 0.0, 0.1),
            };
            let o = model.simulate(&truth, &input, &eval);
            FitTrace {
                name: format!("fast_pi_{k}"),
                step_s: 1e-3,
                v_re: v_re.clone(),
                v_im,
                f_grid: None,
                i_re: o.i_re,
                i_im: o.i_im,
                p: o.p,
                q: o.q,
            }
        })
        .collect();
    let problem =
        TemplateFit::new(&template, traces.clone(), SignalWeights::default(), eval).unwrap();
    let fitted = problem.start_log_params();
    let reducer = TemplateReducer {
        template: template.clone(),
        traces,
        weights: SignalWeights::default(),
        eval,
    };
    let config = MbamConfig {
        geodesic: GeodesicConfig::default()
            .with_speed_normalisation(SpeedNormalisation::ParameterSpace),
        ..MbamConfig::default()
    };
    let (record, reduced) = mbam_step(&problem, &fitted, &reducer, &config).unwrap();
    eprintln!(
        "eigenvalues {:?}\nboundary: {}\n{}",
        record.fisher.eigenvalues, record.reading.sentence, record.reduction
    );
    eprintln!(
        "cost {} → {}; names after {:?}",
        record.cost_before, record.cost_after, record.names_after
    );
    assert!(
        record.reduction.contains("PI `ctrl` tracks ideally"),
        "{}",
        record.reduction
    );
    assert_eq!(record.names_after, vec!["k_v"]);
    assert_eq!(reduced.model.parameter_names(), vec!["k_v"]);
    assert!(
        record.reduction.contains("2 → 0 states"),
        "{}",
        record.reduction
    );
    // the reduced model reproduces the designed one within the loop's residual lag
    // τ·di_ref/dt (τ = 0.25 ms, di_ref/dt up to ~60 pu/s on the 0.5 pu dip: ≈ 1.5 % of the
    // current's range at the steepest sample; measured RMS 1.0 %); residuals are per signal
    // range (SignalWeights)
    let samples = 3.0 * 140.0 * 4.0;
    let rms = (2.0 * record.cost_after / samples).sqrt();
    eprintln!("RMS residual after the refit {rms:.2e} of the signal range");
    assert!(rms < 2e-2, "RMS residual after the refit {rms}");
    // the fast PI's own parameters could not move the predictions: the full fit sits at ~0
    assert!(record.cost_before < 1e-20);
}

#[test]
fn every_declared_limit_of_the_generic_template_rewrites_it_or_says_why_not() {
    let t = generic_converter();
    let before = t.state_count();
    let mut applied = 0;
    for spec in &t.parameters {
        for kind in &spec.limits {
            let limit = match kind {
                LimitKind::ToZero => Limit::ToZero,
                LimitKind::ToInfinity => Limit::ToInfinity,
                LimitKind::IdealTracking => Limit::IdealTracking,
                LimitKind::Merge => continue,
            };
            match apply_limit(&t, &spec.name, &limit) {
                Ok(r) => {
                    eprintln!("{}", r.sentence);
                    assert_eq!(r.states_before, before);
                    assert!(r.states_after <= before);
                    assert!(r.sentence.contains(&spec.name));
                    assert!(r.removed_parameters.contains(&spec.name), "{}", r.sentence);
                    // the reduced template runs and starts at rest
                    let m = BlockModel::compile(&r.template).unwrap();
                    let (re, im) = (vec![0.97; 50], vec![0.1; 50]);
                    let initial = InitialOutputs::from_power(0.97, 0.1, 0.6, 0.05);
                    let input = InputSeries {
                        step_s: 1e-3,
                        v_re: &re,
                        v_im: &im,
                        f_grid: None,
                        initial,
                    };
                    let o = m.simulate(&m.free_parameter_values(), &input, &EvalConfig::default());
                    assert!(
                        (o.p[49] - 0.6).abs() < 1e-9 && (o.q[49] - 0.05).abs() < 1e-9,
                        "{}",
                        r.sentence
                    );
                    applied += 1;
                }
                Err(e) => eprintln!("refused: {e}"),
            }
        }
    }
    assert!(applied >= 10, "only {applied} limits applied");
    // specific physical readings
    let r = apply_limit(&t, "i_max", &Limit::ToInfinity).unwrap();
    assert!(r.template.blocks.iter().all(|b| b.name != "lim"));
    let r = apply_limit(&t, "t_current", &Limit::ToZero).unwrap();
    assert_eq!(r.states_after, before - 2, "{}", r.sentence);
    let r = apply_limit(&t, "q_kp", &Limit::ToZero).unwrap();
    assert!(r.sentence.contains("pure integrator"));
    let r = apply_limit(&t, "q_ki", &Limit::ToZero).unwrap();
    assert_eq!(r.states_after, before - 1, "{}", r.sentence);
    // the generic template's PIs close their loops through the power calculation, the current
    // limit and two lags: no ideal-tracking pattern, a typed refusal naming the block in the way
    for gain in ["q_kp", "p_ki"] {
        match apply_limit(&t, gain, &Limit::IdealTracking) {
            Err(understudy_runtime::block::LimitError::Unsupported { block, reason, .. }) => {
                assert_eq!(block, "power (power)", "{reason}");
                assert!(
                    reason.contains("a `power` block is in the loop"),
                    "{reason}"
                );
            }
            other => panic!("{gain}: expected a refusal, got {other:?}"),
        }
    }
    assert!(matches!(
        apply_limit(&t, "pll_kp", &Limit::ToInfinity),
        Err(understudy_runtime::block::LimitError::NotDeclared { .. })
    ));
    // a merge: both filters take their geometric mean, one parameter fewer, no state fewer
    let t2 = t
        .clone()
        .with_value("t_p_filter", 0.01)
        .with_value("t_q_filter", 0.04);
    let r = apply_limit(&t2, "t_p_filter", &Limit::MergeWith("t_q_filter".into())).unwrap();
    assert_eq!(r.removed_parameters, vec!["t_q_filter".to_string()]);
    assert_eq!(r.states_after, before);
    let merged = r.template.parameter("t_p_filter").unwrap().value;
    assert!((merged - 0.02).abs() < 1e-15);
}

#[test]
fn template_fit_exact_jacobian_and_second_derivative_match_finite_differences() {
    use understudy::fit::{
        central_difference_jacobian, finite_difference_second_directional, LeastSquaresModel,
    };
    let traces = detailed_traces(0.3);
    let problem = TemplateFit::new(
        &generic_converter(),
        traces,
        SignalWeights {
            i_re: 1.0,
            i_im: 1.0,
            p: 2.0,
            q: 2.0,
        },
        EvalConfig::default(),
    )
    .unwrap();
    let theta = problem.start_log_params();
    let exact = problem.jacobian(&theta).unwrap().unwrap();
    // central differences with a step of 1e-6 in each log-parameter (common practice). The
    // core's ε^(1/3)-relative step (~2e-5 here) sits close to a switch of the active-power
    // loop in one trace, where the third derivative is large: its truncation error reaches
    // ~1e-5 of the column there, and it converges to the dual-number value as the step shrinks
    // (checked by hand: steps 1e-4, 1e-5, 1e-6 → errors 1.7e-3, 1.7e-5, 1.7e-7 relative), so
    // the check uses 1e-7 (measured agreement: 1.1e-6 of the column at worst).
    let fd = {
        let h = 1e-7;
        let mut m = nalgebra::DMatrix::zeros(exact.nrows(), exact.ncols());
        for j in 0..theta.len() {
            let (mut a, mut b) = (theta.clone(), theta.clone());
            a[j] += h;
            b[j] -= h;
            let col = (understudy::fit::evaluate_residuals(&problem, &a).unwrap()
                - understudy::fit::evaluate_residuals(&problem, &b).unwrap())
                / (a[j] - b[j]);
            m.set_column(j, &col);
        }
        m
    };
    // and the core's own finite-difference Jacobian agrees to 1e-3 of each column (measured:
    // 4e-4 at worst, the current-limit column, next to a switch; 1e-8 typically)
    let core = central_difference_jacobian(&problem, &theta).unwrap();
    for j in 0..exact.ncols() {
        let scale = core.column(j).amax().max(1e-6);
        assert!((exact.column(j) - core.column(j)).amax() <= 1e-3 * scale);
    }
    for j in 0..exact.ncols() {
        let scale = fd.column(j).amax().max(1e-6);
        let worst = (exact.column(j) - fd.column(j)).amax();
        assert!(
            worst <= 1e-5 * scale,
            "column {} ({}): worst difference {worst}, scale {scale}",
            j,
            problem.parameter_names()[j]
        );
    }
    // A_vv: differences of the exact J·v against the core's second difference of r, on a
    // template without switches (next to a switch both are dominated by the kink)
    let mut template = fast_filter_template();
    template.parameters[0].value = 5e-3;
    let model = BlockModel::compile(&template).unwrap();
    let truth = model.free_parameter_values();
    let (v_re, v_im) = voltage(120, 0.3, 0.002);
    let input = InputSeries {
        step_s: 1e-3,
        v_re: &v_re,
        v_im: &v_im,
        f_grid: None,
        initial: InitialOutputs::from_power(v_re[0], v_im[0], 0.0, 0.0),
    };
    let o = model.simulate(&truth, &input, &EvalConfig::default());
    let trace = FitTrace {
        name: "smooth".into(),
        step_s: 1e-3,
        v_re: v_re.clone(),
        v_im: v_im.clone(),
        f_grid: None,
        i_re: o.i_re.iter().map(|x| x * 1.01).collect(),
        i_im: o.i_im,
        p: o.p,
        q: o.q,
    };
    let smooth = TemplateFit::new(
        &template,
        vec![trace],
        SignalWeights::default(),
        EvalConfig::default(),
    )
    .unwrap();
    let theta: Vec<f64> = smooth.start_log_params().iter().map(|x| x + 0.1).collect();
    let v = [0.3, -0.5, 0.8, 0.2];
    let avv = smooth.second_directional(&theta, &v).unwrap().unwrap();
    let reference = finite_difference_second_directional(&smooth, &theta, &v, None).unwrap();
    let scale = reference.amax();
    let worst = (&avv - &reference).amax();
    eprintln!("A_vv: worst difference {worst:.3e}, scale {scale:.3e}");
    assert!(
        worst <= 1e-4 * scale,
        "A_vv: worst difference {worst}, scale {scale}"
    );
}

//! Unit tests of the integrators against analytic solutions (common practice: exact solutions of
//! linear and piecewise-polynomial problems, no external reference needed).

use super::*;

/// x' = −k x, x(t) = x0 e^{−k t}.
struct Decay {
    k: f64,
}

impl HybridSystem for Decay {
    fn dim(&self) -> usize {
        1
    }
    fn derivatives(&self, _t: f64, x: &[f64], dx: &mut [f64]) {
        dx[0] = -self.k * x[0];
    }
}

/// x'' = −ω² x written as (x, v); energy E = (ω² x² + v²)/2 is conserved.
struct Oscillator {
    omega: f64,
}

impl HybridSystem for Oscillator {
    fn dim(&self) -> usize {
        2
    }
    fn derivatives(&self, _t: f64, x: &[f64], dx: &mut [f64]) {
        dx[0] = x[1];
        dx[1] = -self.omega * self.omega * x[0];
    }
}

/// x' = 1 with one guard x − level; records the firing times and their guard indices.
struct Ramp {
    level: f64,
    fired: Vec<(f64, usize)>,
    /// Value the state is reset to at each firing (None: no reset, the guard disarms itself).
    reset_to: Option<f64>,
}

impl HybridSystem for Ramp {
    fn dim(&self) -> usize {
        1
    }
    fn derivatives(&self, _t: f64, _x: &[f64], dx: &mut [f64]) {
        dx[0] = 1.0;
    }
    fn guard_count(&self) -> usize {
        1
    }
    fn guards(&self, _t: f64, x: &[f64], g: &mut [f64]) {
        g[0] = x[0] - self.level;
    }
    fn on_guard(&mut self, t: f64, x: &mut [f64], index: usize) {
        self.fired.push((t, index));
        if let Some(r) = self.reset_to {
            x[0] = r;
        }
    }
}

/// Ball falling under gravity `g` onto the floor at height 0, bouncing with restitution `e`.
/// State (height, velocity). Guard: −height (fires when the ball reaches the floor while falling).
struct Ball {
    gravity: f64,
    restitution: f64,
    impacts: Vec<f64>,
}

impl HybridSystem for Ball {
    fn dim(&self) -> usize {
        2
    }
    fn derivatives(&self, _t: f64, x: &[f64], dx: &mut [f64]) {
        dx[0] = x[1];
        dx[1] = -self.gravity;
    }
    fn guard_count(&self) -> usize {
        1
    }
    fn guards(&self, _t: f64, x: &[f64], g: &mut [f64]) {
        g[0] = -x[0];
    }
    fn on_guard(&mut self, t: f64, x: &mut [f64], _index: usize) {
        self.impacts.push(t);
        x[1] *= -self.restitution;
    }
}

/// x' = −x + u with the input u switched by breakpoints: u = 1 before the first breakpoint,
/// then 0. `settle_calls` counts calls of settle_modes.
struct Switched {
    input: f64,
    settle_calls: Vec<f64>,
}

impl HybridSystem for Switched {
    fn dim(&self) -> usize {
        1
    }
    fn derivatives(&self, _t: f64, x: &[f64], dx: &mut [f64]) {
        dx[0] = -x[0] + self.input;
    }
    fn on_breakpoint(&mut self, _t: f64, _x: &mut [f64]) {
        self.input = 0.0;
    }
    fn settle_modes(&mut self, t: f64, _x: &mut [f64]) {
        self.settle_calls.push(t);
    }
}

/// Analytic solution of [`Switched`] from x(0) = 0 with the switch at `t_switch`.
fn switched_exact(t: f64, t_switch: f64) -> f64 {
    if t < t_switch {
        1.0 - (-t).exp()
    } else {
        (1.0 - (-t_switch).exp()) * (-(t - t_switch)).exp()
    }
}

fn all_methods(tight: bool) -> Vec<Method> {
    let (rtol, atol) = if tight { (1e-10, 1e-12) } else { (1e-6, 1e-9) };
    vec![
        Method::Rk4 { step_s: 1e-3 },
        Method::DormandPrince {
            rtol,
            atol,
            max_step_s: 0.1,
        },
        Method::TrBdf2 {
            rtol,
            atol,
            max_step_s: 0.1,
        },
    ]
}

fn decay_error(method: &Method, k: f64, t_end: f64) -> f64 {
    let mut sys = Decay { k };
    let mut x = [1.0];
    integrate(
        &mut sys,
        &mut x,
        0.0,
        t_end,
        t_end,
        &[],
        method,
        |_, _, _| {},
    )
    .unwrap();
    (x[0] - (-k * t_end).exp()).abs()
}

#[test]
fn rk4_decay_converges_with_order_four() {
    // x' = −2x on [0, 1]: global error of RK4 scales as h⁴ (analytic e^{−2t}).
    let coarse = decay_error(&Method::Rk4 { step_s: 0.02 }, 2.0, 1.0);
    let fine = decay_error(&Method::Rk4 { step_s: 0.01 }, 2.0, 1.0);
    let order = (coarse / fine).log2();
    assert!((order - 4.0).abs() < 0.05, "measured order {order}");
    // leading global error t·k⁵h⁴/120·e^{−kt} ≈ 3.6e-10 at h = 0.01 (analytic)
    assert!(fine < 5e-10, "error at h = 0.01: {fine:e}");
}

#[test]
fn rk4_oscillator_energy_drift_is_bounded() {
    // ω = 2π, 100 periods with 100 steps per period. On this linear system one RK4 step
    // multiplies ω·x + i·v by the stability polynomial R(iy), y = ωh,
    // R(z) = 1 + z + z²/2 + z³/6 + z⁴/24 (Hairer, Nørsett & Wanner, Solving ODEs I, §IV.2),
    // so E_N = |R(iy)|^{2N} E_0 exactly: the drift is bounded and predicted analytically.
    let omega = 2.0 * std::f64::consts::PI;
    let h = 0.01;
    let mut sys = Oscillator { omega };
    let mut x = [1.0, 0.0];
    let energy = |x: &[f64]| 0.5 * (omega * omega * x[0] * x[0] + x[1] * x[1]);
    let e0 = energy(&x);
    integrate(
        &mut sys,
        &mut x,
        0.0,
        100.0,
        1.0,
        &[],
        &Method::Rk4 { step_s: h },
        |_, _, _| {},
    )
    .unwrap();
    let drift = (e0 - energy(&x)) / e0;
    let y: f64 = omega * h;
    let (re, im) = (1.0 - y * y / 2.0 + y.powi(4) / 24.0, y - y.powi(3) / 6.0);
    let predicted = 1.0 - (re * re + im * im).powi(10_000);
    assert!(
        (drift - predicted).abs() < 1e-3 * predicted,
        "drift {drift:e}, predicted {predicted:e}"
    );
    assert!(drift < 1e-5, "energy drift {drift:e} over 100 periods");
    // Phase: after 100 whole periods x returns to 1 (phase error ~ (ωh)⁴/120 per step).
    assert!((x[0] - 1.0).abs() < 1e-4, "x(100) = {}", x[0]);
}

#[test]
fn observations_at_t0_every_sample_and_t_end() {
    let mut sys = Decay { k: 1.0 };
    let mut x = [1.0];
    let mut times = Vec::new();
    integrate(
        &mut sys,
        &mut x,
        0.5,
        1.23,
        0.1,
        &[],
        &Method::Rk4 { step_s: 0.03 },
        |t, _, _| times.push(t),
    )
    .unwrap();
    assert_eq!(times.len(), 9, "{times:?}");
    for (k, &t) in times.iter().take(8).enumerate() {
        assert!((t - (0.5 + 0.1 * k as f64)).abs() < 1e-14, "{times:?}");
    }
    assert_eq!(times[8].to_bits(), 1.23f64.to_bits());
    // t_end == t0: one observation only.
    let mut count = 0;
    integrate(
        &mut sys,
        &mut x,
        2.0,
        2.0,
        0.1,
        &[],
        &Method::Rk4 { step_s: 0.03 },
        |_, _, _| count += 1,
    )
    .unwrap();
    assert_eq!(count, 1);
}

#[test]
fn guard_on_ramp_fires_at_analytic_time_for_every_method() {
    // x' = 1 from x(0) = 0, guard x − 0.3: crossing at t = 0.3 exactly (analytic).
    for method in all_methods(false) {
        let mut sys = Ramp {
            level: 0.3,
            fired: vec![],
            reset_to: None,
        };
        let mut x = [0.0];
        let stats =
            integrate(&mut sys, &mut x, 0.0, 1.0, 0.07, &[], &method, |_, _, _| {}).unwrap();
        assert_eq!(sys.fired.len(), 1, "{method:?}: {:?}", sys.fired);
        let (t, k) = sys.fired[0];
        assert_eq!(k, 0);
        assert!((t - 0.3).abs() < 1e-10, "{method:?}: fired at {t}");
        assert_eq!(stats.guard_events, 1);
        assert!((x[0] - 1.0).abs() < 1e-9, "{method:?}: x(1) = {}", x[0]);
    }
}

#[test]
fn bouncing_ball_impacts_at_analytic_times() {
    // h0 = 1 m, g = 9.81 m/s², e = 0.8: first impact at t1 = sqrt(2 h0 / g) with speed g t1,
    // the next ones after flights of 2 e^k g t1 / g = 2 e^k t1 (analytic, ballistic flight).
    let (h0, g, e): (f64, f64, f64) = (1.0, 9.81, 0.8);
    let t1 = (2.0 * h0 / g).sqrt();
    let mut expected = vec![t1];
    let mut flight = 2.0 * e * t1;
    for _ in 0..3 {
        expected.push(expected.last().unwrap() + flight);
        flight *= e;
    }
    for method in all_methods(true) {
        let mut sys = Ball {
            gravity: g,
            restitution: e,
            impacts: vec![],
        };
        let mut x = [h0, 0.0];
        integrate(&mut sys, &mut x, 0.0, 3.0, 0.01, &[], &method, |_, _, _| {}).unwrap();
        assert!(sys.impacts.len() >= 4, "{method:?}: {:?}", sys.impacts);
        // TR-BDF2 is second order, so at rtol 1e-10 its positions carry ~1e-10-level errors
        // that shift later impacts slightly; RK4 and DP5 integrate a parabola exactly.
        let tol = if matches!(method, Method::TrBdf2 { .. }) {
            1e-7
        } else {
            1e-10
        };
        for (i, (&got, &want)) in sys.impacts.iter().zip(&expected).enumerate() {
            assert!(
                (got - want).abs() < tol,
                "{method:?}: impact {i} at {got}, expected {want}"
            );
        }
    }
}

#[test]
fn breakpoint_is_hit_exactly_and_samples_are_right_continuous() {
    // x' = −x + u, u: 1 → 0 at t = 0.25 (analytic piecewise exponential). The sample at
    // 0.25 must see the new input (right-continuous).
    for method in all_methods(true) {
        let mut sys = Switched {
            input: 1.0,
            settle_calls: vec![],
        };
        let mut x = [0.0];
        let mut worst: f64 = 0.0;
        let mut input_at_quarter = None;
        let stats = integrate(
            &mut sys,
            &mut x,
            0.0,
            1.0,
            0.05,
            &[0.25, 7.0, -1.0],
            &method,
            |t, x, s| {
                worst = worst.max((x[0] - switched_exact(t, 0.25)).abs());
                if (t - 0.25).abs() < 1e-12 {
                    input_at_quarter = Some(s.input);
                }
            },
        )
        .unwrap();
        assert_eq!(stats.breakpoints, 1);
        assert_eq!(input_at_quarter, Some(0.0), "{method:?}");
        assert_eq!(sys.settle_calls, vec![0.0, 0.25], "{method:?}");
        let tol = match method {
            Method::Rk4 { .. } => 1e-12,
            _ => 1e-8,
        };
        assert!(worst < tol, "{method:?}: worst sample error {worst:e}");
    }
}

#[test]
fn bad_settings_are_rejected_by_name() {
    let rk4 = Method::Rk4 { step_s: 0.01 };
    let name_of = |r: Result<Stats, OdeError>| match r {
        Err(OdeError::BadSetting { name, .. }) => name,
        other => panic!("expected BadSetting, got {other:?}"),
    };
    let mut sys = Decay { k: 1.0 };
    let mut run = |t0: f64, t_end: f64, sample: f64, bps: &[f64], m: &Method| {
        let mut x = [1.0];
        name_of(integrate(
            &mut sys,
            &mut x,
            t0,
            t_end,
            sample,
            bps,
            m,
            |_, _, _| {},
        ))
    };
    assert_eq!(
        run(0.0, 1.0, 0.1, &[], &Method::Rk4 { step_s: 0.0 }),
        "step_s"
    );
    assert_eq!(
        run(0.0, 1.0, 0.1, &[], &Method::Rk4 { step_s: f64::NAN }),
        "step_s"
    );
    assert_eq!(run(1.0, 0.0, 0.1, &[], &rk4), "t_end_s");
    assert_eq!(run(f64::INFINITY, 1.0, 0.1, &[], &rk4), "t0_s");
    assert_eq!(run(0.0, 1.0, -0.1, &[], &rk4), "sample_step_s");
    assert_eq!(run(0.0, 1.0, 0.1, &[f64::NAN], &rk4), "breakpoints_s");
    let dp = |rtol, atol, max_step_s| Method::DormandPrince {
        rtol,
        atol,
        max_step_s,
    };
    let tb = |rtol, atol, max_step_s| Method::TrBdf2 {
        rtol,
        atol,
        max_step_s,
    };
    assert_eq!(run(0.0, 1.0, 0.1, &[], &dp(0.0, 1e-6, 0.1)), "rtol");
    assert_eq!(run(0.0, 1.0, 0.1, &[], &tb(1e-6, -1.0, 0.1)), "atol");
    assert_eq!(
        run(0.0, 1.0, 0.1, &[], &tb(1e-6, 1e-6, f64::INFINITY)),
        "max_step_s"
    );
}

#[test]
fn chattering_guard_is_detected() {
    // On each firing the state is put back 1e-14 below the guard level, so the guard re-fires
    // ~1e-14 s later, forever: time does not advance.
    for method in all_methods(false) {
        let mut sys = Ramp {
            level: 0.5,
            fired: vec![],
            reset_to: Some(0.5 - 1e-14),
        };
        let mut x = [0.0];
        let r = integrate(&mut sys, &mut x, 0.0, 1.0, 0.1, &[], &method, |_, _, _| {});
        match r {
            Err(OdeError::Chattering { t_s, guard, count }) => {
                assert_eq!(guard, 0);
                assert!(count > MAX_CHATTER_EVENTS);
                assert!((t_s - 0.5).abs() < 1e-9, "{method:?}: t = {t_s}");
            }
            other => panic!("{method:?}: expected Chattering, got {other:?}"),
        }
    }
}

/// x' = x², x(0) = 1: x = 1/(1 − t) blows up at t = 1.
struct BlowUp;

impl HybridSystem for BlowUp {
    fn dim(&self) -> usize {
        1
    }
    fn derivatives(&self, _t: f64, x: &[f64], dx: &mut [f64]) {
        dx[0] = x[0] * x[0];
    }
}

#[test]
fn blow_up_is_reported_as_non_finite_or_too_small_step() {
    // x = 1/(1 − t) (analytic): RK4 overflows to a non-finite state after t = 1; the adaptive
    // methods cut their steps towards the singularity until the step is too small or the state
    // overflows. Either way: a typed error near t = 1, never an answer past it.
    for method in all_methods(false) {
        let mut x = [1.0];
        let r = integrate(
            &mut BlowUp,
            &mut x,
            0.0,
            2.0,
            0.1,
            &[],
            &method,
            |_, _, _| {},
        );
        let t_s = match r {
            Err(OdeError::NonFinite { t_s }) | Err(OdeError::StepTooSmall { t_s, .. }) => t_s,
            Err(OdeError::NewtonFailed { t_s, .. }) if matches!(method, Method::TrBdf2 { .. }) => {
                t_s
            }
            other => panic!("{method:?}: expected a blow-up error, got {other:?}"),
        };
        eprintln!("{method:?}: blow-up reported at t = {t_s}");
        assert!(t_s > 0.99 && t_s < 1.1, "{method:?}: t = {t_s}");
    }
}

/// Error at t = 1 of x' = −2x when an adaptive method is forced to fixed steps: tolerances so
/// loose the controller never cuts, so every step is `max_step` (1/max_step is an integer).
fn fixed_step_error(method: fn(f64) -> Method, max_step: f64) -> f64 {
    decay_error(&method(max_step), 2.0, 1.0)
}

#[test]
fn dormand_prince_and_tr_bdf2_have_their_classical_orders() {
    // Forced equal steps on x' = −2x (analytic e^{−2t}): halving h divides the global error by
    // 2^p, p = 5 for Dormand–Prince's propagated solution and p = 2 for TR-BDF2.
    let dp = |h| Method::DormandPrince {
        rtol: 1e3,
        atol: 1e3,
        max_step_s: h,
    };
    let tb = |h| Method::TrBdf2 {
        rtol: 1e3,
        atol: 1e3,
        max_step_s: h,
    };
    let dp_order = (fixed_step_error(dp, 0.05) / fixed_step_error(dp, 0.025)).log2();
    let tb_order = (fixed_step_error(tb, 0.02) / fixed_step_error(tb, 0.01)).log2();
    eprintln!("measured orders: DP {dp_order:.3}, TR-BDF2 {tb_order:.3}");
    assert!(
        (dp_order - 5.0).abs() < 0.15,
        "Dormand–Prince order {dp_order}"
    );
    assert!((tb_order - 2.0).abs() < 0.05, "TR-BDF2 order {tb_order}");
}

#[test]
fn adaptive_methods_meet_tolerance_on_decay() {
    // x' = −5x on [0, 2] from 1 (analytic e^{−5t}); the global error of a tolerance-controlled
    // run stays within a small multiple of the tolerance scale (common practice).
    for (method, bound) in [
        (
            Method::DormandPrince {
                rtol: 1e-8,
                atol: 1e-12,
                max_step_s: 1.0,
            },
            1e-8,
        ),
        (
            Method::TrBdf2 {
                rtol: 1e-8,
                atol: 1e-12,
                max_step_s: 1.0,
            },
            1e-8,
        ),
    ] {
        let err = decay_error(&method, 5.0, 2.0);
        eprintln!("{method:?}: |x(2) − e^(−10)| = {err:e}");
        assert!(err < bound, "{method:?}: error {err:e}");
    }
}

#[test]
fn dormand_prince_oscillator_energy_drift_is_bounded() {
    // ω = 2π over 100 periods at rtol 1e-10: energy (ω²x² + v²)/2 is conserved exactly by the
    // flow (analytic); the integrator's drift must stay below 1e-7 relative.
    let omega = 2.0 * std::f64::consts::PI;
    let mut sys = Oscillator { omega };
    let mut x = [1.0, 0.0];
    let energy = |x: &[f64]| 0.5 * (omega * omega * x[0] * x[0] + x[1] * x[1]);
    let e0 = energy(&x);
    let method = Method::DormandPrince {
        rtol: 1e-10,
        atol: 1e-12,
        max_step_s: 0.1,
    };
    let stats = integrate(
        &mut sys,
        &mut x,
        0.0,
        100.0,
        0.5,
        &[],
        &method,
        |_, _, _| {},
    )
    .unwrap();
    let drift = (energy(&x) - e0).abs() / e0;
    eprintln!(
        "DP5 energy drift {drift:e} in {} steps ({} rejected)",
        stats.steps, stats.rejected_steps
    );
    assert!(drift < 1e-7, "energy drift {drift:e}");
    assert!((x[0] - 1.0).abs() < 1e-6, "x(100) = {}", x[0]);
}

/// Prothero–Robinson problem x' = −λ(x − cos t) − sin t, solution cos t for x(0) = 1 (Hairer &
/// Wanner, Solving ODEs II, §IV.15): stiff for large λ.
struct ProtheroRobinson {
    lambda: f64,
}

impl HybridSystem for ProtheroRobinson {
    fn dim(&self) -> usize {
        1
    }
    fn derivatives(&self, t: f64, x: &[f64], dx: &mut [f64]) {
        dx[0] = -self.lambda * (x[0] - t.cos()) - t.sin();
    }
}

#[test]
fn tr_bdf2_is_not_step_limited_on_a_stiff_problem() {
    // λ = 1e6 on [0, 10]: an explicit method needs h < 2.8e-6 (≥ 3.5e6 steps); TR-BDF2 is
    // L-stable, so its steps follow the smooth solution cos t (analytic).
    let mut sys = ProtheroRobinson { lambda: 1e6 };
    let mut x = [1.0];
    let mut worst: f64 = 0.0;
    let method = Method::TrBdf2 {
        rtol: 1e-6,
        atol: 1e-9,
        max_step_s: 1.0,
    };
    let stats = integrate(&mut sys, &mut x, 0.0, 10.0, 0.5, &[], &method, |t, x, _| {
        worst = worst.max((x[0] - t.cos()).abs());
    })
    .unwrap();
    eprintln!("Prothero–Robinson: worst error {worst:e}, {stats:?}");
    assert!(worst < 1e-6, "worst sample error {worst:e}");
    assert!(stats.steps < 2000, "{} steps", stats.steps);
}

/// x' = −x³, solution x(t) = 1/√(2t + 1/x0²) (analytic).
struct Cubic;

impl HybridSystem for Cubic {
    fn dim(&self) -> usize {
        1
    }
    fn derivatives(&self, _t: f64, x: &[f64], dx: &mut [f64]) {
        dx[0] = -x[0] * x[0] * x[0];
    }
}

#[test]
fn tr_bdf2_newton_failure_rejects_the_step() {
    // From x = 10 (Jacobian −300) a step of 10 s puts the Euler predictor at −5848 and the
    // simplified Newton iteration diverges even with a fresh Jacobian: the attempt must be
    // rejected with the step cut by 4, never accepted.
    let mut stepper = trbdf2::TrBdf2::new(1e-6, 1e-9, 100.0, 1);
    let mut stats = Stats::default();
    let mut x_new = [0.0];
    let accepted = Stepper::<Cubic>::attempt(
        &mut stepper,
        &Cubic,
        0.0,
        &[10.0],
        10.0,
        &mut x_new,
        &mut stats,
    )
    .unwrap();
    assert!(!accepted);
    assert_eq!(stats.newton_failures, 1);
    assert_eq!(stats.jacobian_evaluations, 1);
    let (h, lands) =
        Stepper::<Cubic>::choose_step(&mut stepper, &Cubic, 0.0, &[10.0], 100.0, &mut stats);
    assert!((h - 2.5).abs() < 1e-15 && !lands, "next step {h}");
}

#[test]
fn tr_bdf2_global_error_scales_as_rtol_to_the_two_thirds() {
    // x' = −x³ from 10 on [0, 5] (analytic 1/√(2t + 0.01)). With local error per step ≤ tol
    // and order 2, h ∝ tol^{1/3} and the global error ∝ tol^{2/3} (Hairer, Nørsett & Wanner I,
    // §II.4, "tolerance proportionality"): 100× tighter rtol → ≈ 21.5× smaller error.
    let exact = 1.0 / (2.0 * 5.0 + 0.01_f64).sqrt();
    let rel_err = |rtol: f64| {
        let mut x = [10.0];
        let method = Method::TrBdf2 {
            rtol,
            atol: 1e-3 * rtol,
            max_step_s: 1.0,
        };
        let stats = integrate(
            &mut Cubic,
            &mut x,
            0.0,
            5.0,
            5.0,
            &[],
            &method,
            |_, _, _| {},
        )
        .unwrap();
        let e = (x[0] - exact).abs() / exact;
        eprintln!("cubic decay rtol {rtol:e}: relative error {e:e}, {stats:?}");
        e
    };
    let (loose, tight) = (rel_err(1e-8), rel_err(1e-10));
    let ratio = loose / tight;
    assert!(ratio > 15.0 && ratio < 30.0, "error ratio {ratio}");
    assert!(tight < 2e-7, "relative error at rtol 1e-10: {tight:e}");
}

/// x' = −x from 1 with guard 0.5 − x: crossing at t = ln 2 (analytic), a non-polynomial solution.
struct HalfLife {
    fired_at: Vec<f64>,
}

impl HybridSystem for HalfLife {
    fn dim(&self) -> usize {
        1
    }
    fn derivatives(&self, _t: f64, x: &[f64], dx: &mut [f64]) {
        dx[0] = -x[0];
    }
    fn guard_count(&self) -> usize {
        1
    }
    fn guards(&self, _t: f64, x: &[f64], g: &mut [f64]) {
        g[0] = 0.5 - x[0];
    }
    fn on_guard(&mut self, t: f64, _x: &mut [f64], _index: usize) {
        self.fired_at.push(t);
    }
}

#[test]
fn guard_on_exponential_fires_at_ln_2() {
    // The located time differs from ln 2 by (state error at ln 2)/|x'| = 2·(state error) plus
    // the 1e-12 s bracket; RK4 at h = 1e-3 and DP5 at rtol 1e-12 keep that below 1e-10.
    let methods = [
        Method::Rk4 { step_s: 1e-3 },
        Method::DormandPrince {
            rtol: 1e-12,
            atol: 1e-14,
            max_step_s: 0.1,
        },
        Method::TrBdf2 {
            rtol: 1e-12,
            atol: 1e-14,
            max_step_s: 0.1,
        },
    ];
    for method in methods {
        let mut sys = HalfLife { fired_at: vec![] };
        let mut x = [1.0];
        integrate(&mut sys, &mut x, 0.0, 1.0, 0.1, &[], &method, |_, _, _| {}).unwrap();
        assert_eq!(sys.fired_at.len(), 1, "{method:?}");
        let err = (sys.fired_at[0] - std::f64::consts::LN_2).abs();
        eprintln!("{method:?}: event time error {err:e}");
        // TR-BDF2 is second order: its state error at rtol 1e-12 is ~1e-9 (rtol^{2/3} scaling).
        let tol = if matches!(method, Method::TrBdf2 { .. }) {
            1e-8
        } else {
            1e-10
        };
        assert!(
            err < tol,
            "{method:?}: fired at {}, error {err:e}",
            sys.fired_at[0]
        );
    }
}

/// Two timers (guards t − 0.4 and 2(t − 0.4), so both cross at exactly the same instant, which
/// state-based guards cannot guarantee in floating point) plus a breakpoint at the same time.
struct Twins {
    log: Vec<(f64, &'static str)>,
}

impl HybridSystem for Twins {
    fn dim(&self) -> usize {
        2
    }
    fn derivatives(&self, _t: f64, _x: &[f64], dx: &mut [f64]) {
        dx[0] = 1.0;
        dx[1] = 1.0;
    }
    fn guard_count(&self) -> usize {
        2
    }
    fn guards(&self, t: f64, _x: &[f64], g: &mut [f64]) {
        g[0] = t - 0.4;
        g[1] = 2.0 * (t - 0.4);
    }
    fn on_guard(&mut self, t: f64, _x: &mut [f64], index: usize) {
        self.log
            .push((t, if index == 0 { "guard 0" } else { "guard 1" }));
    }
    fn on_breakpoint(&mut self, t: f64, _x: &mut [f64]) {
        self.log.push((t, "breakpoint"));
    }
}

#[test]
fn simultaneous_guards_both_fire_before_the_breakpoint_at_the_same_time() {
    // Documented order at one instant: guards (earliest estimate first, ties by index), then
    // the breakpoint; each exactly once, at 0.4 (analytic).
    for method in all_methods(false) {
        let mut sys = Twins { log: vec![] };
        let mut x = [0.0, 0.0];
        integrate(
            &mut sys,
            &mut x,
            0.0,
            1.0,
            0.3,
            &[0.4],
            &method,
            |_, _, _| {},
        )
        .unwrap();
        let names: Vec<&str> = sys.log.iter().map(|e| e.1).collect();
        assert_eq!(names, ["guard 0", "guard 1", "breakpoint"], "{method:?}");
        for &(t, what) in &sys.log {
            assert_eq!(t.to_bits(), 0.4f64.to_bits(), "{method:?}: {what} at {t}");
        }
    }
}

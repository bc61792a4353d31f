//! Checks of the detailed full-converter model against analytic and textbook results.

use std::f64::consts::PI;
use understudy::runtime::ode::{integrate, HybridSystem, Method};
use understudy::runtime::unit::full_converter::{ix, FullConverter, FullConverterParams};
use understudy::runtime::unit::{Disturbance, GridEquivalent, OperatingPoint, UnitError, C64};

const IDEAL: GridEquivalent = GridEquivalent {
    scr: f64::INFINITY,
    x_over_r: 10.0,
};

fn rk4(step_s: f64) -> Method {
    Method::Rk4 { step_s }
}

/// Simulate and return (t, x, signals-derived rows) at every sample.
fn run(
    unit: &mut FullConverter,
    x: &mut [f64],
    t_end: f64,
    dt: f64,
    method: &Method,
) -> Vec<(
    f64,
    Vec<f64>,
    understudy::runtime::unit::full_converter::Signals,
)> {
    let mut out = Vec::new();
    let bp = unit.breakpoints_s();
    integrate(unit, x, 0.0, t_end, dt, &bp, method, |t, x, m| {
        out.push((t, x.to_vec(), m.signals(t, x)));
    })
    .expect("integration succeeds");
    out
}

#[test]
fn initialisation_is_a_true_steady_state() {
    // Requirement: every derivative <= 1e-9 at t = 0 and terminal P, Q equal the setpoints to
    // 1e-6 pu, over strong and weak grids, both power-factor signs, with U given or solved.
    let cases = [
        (
            OperatingPoint::new(1.0, 0.0),
            GridEquivalent {
                scr: 10.0,
                x_over_r: 10.0,
            },
        ),
        (
            OperatingPoint::new(0.8, 0.3),
            GridEquivalent {
                scr: 3.0,
                x_over_r: 6.0,
            },
        ),
        (
            OperatingPoint::new(0.5, -0.1),
            GridEquivalent {
                scr: 6.0,
                x_over_r: 15.0,
            },
        ),
        (
            OperatingPoint::new(0.5, 0.0),
            GridEquivalent {
                scr: 2.0,
                x_over_r: 15.0,
            },
        ),
        (
            OperatingPoint {
                p: 0.9,
                q: 0.1,
                u: Some(1.03),
                grid_voltage: 1.0,
            },
            GridEquivalent {
                scr: 5.0,
                x_over_r: 8.0,
            },
        ),
        (OperatingPoint::new(0.3, 0.0), IDEAL),
    ];
    for (op, grid) in cases {
        let (unit, x) = FullConverter::initialise(
            FullConverterParams::default(),
            &op,
            &grid,
            &Disturbance::None,
        )
        .unwrap();
        let mut dx = vec![0.0; unit.dim()];
        unit.derivatives(0.0, &x, &mut dx);
        for (k, d) in dx.iter().enumerate() {
            assert!(
                d.abs() <= 1e-9,
                "{op:?} on {grid:?}: d{}/dt = {d:e}",
                ix::NAMES[k]
            );
        }
        let s = unit.signals(0.0, &x);
        assert!((s.p - op.p).abs() <= 1e-6, "P = {} vs {}", s.p, op.p);
        assert!((s.q - op.q).abs() <= 1e-6, "Q = {} vs {}", s.q, op.q);
        if let Some(u) = op.u {
            assert!((s.terminal_voltage.norm() - u).abs() <= 1e-9);
        }
        let mut g = vec![0.0; unit.guard_count()];
        unit.guards(0.0, &x, &mut g);
        assert!(
            g.iter().all(|v| *v < 0.0),
            "a guard is active at t = 0: {g:?}"
        );
    }
}

#[test]
fn steady_state_holds_without_disturbance() {
    let (mut unit, mut x) = FullConverter::initialise(
        FullConverterParams::default(),
        &OperatingPoint::new(0.7, 0.1),
        &GridEquivalent {
            scr: 4.0,
            x_over_r: 8.0,
        },
        &Disturbance::None,
    )
    .unwrap();
    let x0 = x.clone();
    run(&mut unit, &mut x, 1.0, 1e-2, &rk4(5e-5));
    for k in 0..x.len() {
        assert!(
            (x[k] - x0[k]).abs() < 1e-9,
            "{} drifted by {:e}",
            ix::NAMES[k],
            x[k] - x0[k]
        );
    }
}

#[test]
fn current_loop_is_first_order_with_bandwidth_alpha() {
    // Internal model control tuning k_p = α·L/ω_b, k_i = α·R makes the closed current loop
    // α/(s + α) (Harnefors & Nee, IEEE Trans. Ind. Appl. 34(1), 1998). On an ideal source the PLL
    // stays locked, so a step of the d-axis reference must rise with time constant 1/α.
    for bandwidth_hz in [200.0, 400.0] {
        let params = FullConverterParams {
            current_bandwidth_hz: bandwidth_hz,
            ..FullConverterParams::default()
        };
        let alpha = params.alpha();
        let (mut unit, mut x) = FullConverter::initialise(
            params,
            &OperatingPoint::new(0.5, 0.0),
            &IDEAL,
            &Disturbance::None,
        )
        .unwrap();
        let t_step = 0.01;
        let i0 = unit.signals(0.0, &x).i_dq;
        let target = C64::new(0.7, i0.im);
        unit.current_ref_step = Some((t_step, target));
        let rows = run(&mut unit, &mut x, t_step + 10.0 / alpha, 1e-6, &rk4(1e-6));
        // time to 1 − e^{-1} of the step
        let level = i0.re + (target.re - i0.re) * (1.0 - (-1.0f64).exp());
        let k = rows
            .iter()
            .position(|(t, _, s)| *t > t_step && s.i_dq.re >= level)
            .unwrap();
        let (t1, _, s1) = &rows[k - 1];
        let (t2, _, s2) = &rows[k];
        let t_cross = t1 + (level - s1.i_dq.re) / (s2.i_dq.re - s1.i_dq.re) * (t2 - t1);
        let tau = t_cross - t_step;
        let rel = (tau * alpha - 1.0).abs();
        assert!(
            rel < 0.02,
            "bandwidth {bandwidth_hz} Hz: τ·α = {} (2 % allowed)",
            tau * alpha
        );
        // and the q-axis is not disturbed (decoupling)
        let worst_q = rows
            .iter()
            .map(|(_, _, s)| (s.i_dq.im - i0.im).abs())
            .fold(0.0, f64::max);
        assert!(worst_q < 1e-3, "q-axis moved by {worst_q}");
    }
}

#[test]
fn pll_matches_its_linearised_second_order_loop() {
    // Linearised SRF-PLL: θ_pll/θ_grid = (2ζω_n s + ω_n²)/(s² + 2ζω_n s + ω_n²) with
    // ω_n² = ω_b·k_i·U and 2ζω_n = ω_b·k_p·U (standard second-order PLL analysis, e.g.
    // Kaura & Blasko, IEEE Trans. Ind. Appl. 33(1), 1997). The angle error after a phase jump Δ is
    // e(t) = Δ·e^{-σt}[cos ω_d t − (σ/ω_d) sin ω_d t]; its zero crossings give ω_d (spacing π/ω_d)
    // and σ (first crossing at atan(ω_d/σ)/ω_d).
    for (wn_hz, zeta) in [(15.0, 0.7), (25.0, 0.4)] {
        let omega_b = 2.0 * PI * 50.0;
        let wn = 2.0 * PI * wn_hz;
        let params = FullConverterParams {
            pll_kp: 2.0 * zeta * wn / omega_b,
            pll_ki: wn * wn / omega_b,
            ..FullConverterParams::default()
        };
        let (wn_pred, zeta_pred) = params.pll_natural_frequency_and_damping(1.0);
        assert!((wn_pred - wn).abs() < 1e-9 && (zeta_pred - zeta).abs() < 1e-12);
        let jump_deg = 1.0;
        let t0 = 0.01;
        let (mut unit, mut x) = FullConverter::initialise(
            params,
            &OperatingPoint::new(0.5, 0.0),
            &IDEAL,
            &Disturbance::PhaseJump {
                start_s: t0,
                angle_deg: jump_deg,
            },
        )
        .unwrap();
        let rows = run(&mut unit, &mut x, t0 + 0.3, 2e-6, &rk4(2e-6));
        let delta = jump_deg.to_radians();
        let err: Vec<(f64, f64)> = rows
            .iter()
            .filter(|(t, _, _)| *t >= t0)
            .map(|(t, x, _)| (t - t0, delta - x[ix::PLL_ANGLE]))
            .collect();
        let mut crossings = Vec::new();
        for w in err.windows(2) {
            if w[0].1 > 0.0 && w[1].1 <= 0.0 || w[0].1 < 0.0 && w[1].1 >= 0.0 {
                let (ta, ea) = w[0];
                let (tb, eb) = w[1];
                crossings.push(ta + ea / (ea - eb) * (tb - ta));
            }
        }
        assert!(
            crossings.len() >= 2,
            "need two zero crossings, got {crossings:?}"
        );
        let wd = PI / (crossings[1] - crossings[0]);
        let sigma = wd / (wd * crossings[0]).tan();
        let wn_sim = (sigma * sigma + wd * wd).sqrt();
        let zeta_sim = sigma / wn_sim;
        assert!(
            (wn_sim / wn - 1.0).abs() < 0.05,
            "ω_n: simulated {wn_sim}, predicted {wn}"
        );
        assert!(
            (zeta_sim / zeta - 1.0).abs() < 0.05,
            "ζ: simulated {zeta_sim}, predicted {zeta}"
        );
    }
}

/// Settle through a 0.5 pu dip of an ideal source and return (i_reactive, i_active, cap) at the
/// end of the dip.
fn frt_settled(subtract_dead_band: bool) -> (f64, f64, f64) {
    let params = FullConverterParams {
        frt_k: 2.0,
        frt_dead_band: 0.1,
        frt_subtract_dead_band: subtract_dead_band,
        i_max: 1.1,
        ..FullConverterParams::default()
    };
    let (start, duration) = (0.05, 0.3);
    let (mut unit, mut x) = FullConverter::initialise(
        params,
        &OperatingPoint::new(1.0, 0.0),
        &IDEAL,
        &Disturbance::VoltageDip {
            start_s: start,
            duration_s: duration,
            residual_voltage: 0.5,
            phase_jump_deg: 0.0,
        },
    )
    .unwrap();
    let rows = run(&mut unit, &mut x, start + duration - 1e-3, 1e-3, &rk4(5e-5));
    let (_, _, s) = rows.last().unwrap();
    assert!((s.terminal_voltage.norm() - 0.5).abs() < 1e-12);
    (-s.i_dq.im, s.i_dq.re, s.active_cap)
}

#[test]
fn fault_ride_through_arithmetic() {
    // Common practice (reactive-current injection with K = 2, dead band 0.1 pu, reactive
    // priority): a dip to 0.5 pu with K = 2 and I_max = 1.1 pu settles at I_q = 1.0 pu and
    // I_p <= sqrt(1.1² − 1.0²) = 0.458 pu; with dead-band subtraction I_q = 2·(0.5 − 0.1) = 0.8 pu
    // and I_p <= sqrt(1.1² − 0.8²) = 0.755 pu.
    let (iq, ip, cap) = frt_settled(false);
    assert!((iq - 1.0).abs() < 1e-4, "I_q = {iq}");
    assert!((cap - 0.458).abs() < 1e-3, "cap = {cap}");
    assert!(ip <= 0.458 + 1e-3, "I_p = {ip}");
    let (iq, ip, cap) = frt_settled(true);
    assert!((iq - 0.8).abs() < 1e-4, "I_q = {iq}");
    assert!((cap - 0.755).abs() < 1e-3, "cap = {cap}");
    assert!(ip <= 0.755 + 1e-3, "I_p = {ip}");
}

#[test]
fn active_power_recovers_at_the_rate_limit() {
    // After a deep fault the active current may only rise at recovery_rate (pu/s).
    let rate = 5.0;
    let params = FullConverterParams {
        recovery_rate_pu_per_s: rate,
        ..FullConverterParams::default()
    };
    let (mut unit, mut x) = FullConverter::initialise(
        params,
        &OperatingPoint::new(1.0, 0.0),
        &GridEquivalent {
            scr: 5.0,
            x_over_r: 10.0,
        },
        &Disturbance::Fault {
            start_s: 0.05,
            duration_s: 0.15,
            retained_voltage: 0.05,
        },
    )
    .unwrap();
    let rows = run(&mut unit, &mut x, 0.6, 1e-4, &rk4(5e-5));
    let mut worst = 0.0f64;
    for w in rows.windows(2) {
        let (ta, _, sa) = &w[0];
        let (tb, _, sb) = &w[1];
        if *ta > 0.2 + 1e-3 && unit.params.i_max > sa.active_cap {
            worst = worst.max((sb.active_current_ref - sa.active_current_ref) / (tb - ta));
        }
    }
    assert!(
        worst <= rate * (1.0 + 1e-6),
        "active current rose at {worst} pu/s"
    );
    assert!(
        worst >= 0.5 * rate,
        "the ramp was not exercised: {worst} pu/s"
    );
}

/// The unit plus four accumulators: ∫p_source, ∫p_terminal, ∫R·|i|², ∫p_chopper.
struct EnergyAudit(FullConverter);

impl HybridSystem for EnergyAudit {
    fn dim(&self) -> usize {
        self.0.dim() + 4
    }
    fn derivatives(&self, t: f64, x: &[f64], dx: &mut [f64]) {
        let n = self.0.dim();
        self.0.derivatives(t, &x[..n], &mut dx[..n]);
        let s = self.0.signals(t, &x[..n]);
        dx[n] = s.source_power;
        dx[n + 1] = s.p;
        dx[n + 2] = self.0.params.filter_r * s.current.norm_sqr();
        dx[n + 3] = s.chopper_power;
    }
    fn guard_count(&self) -> usize {
        self.0.guard_count()
    }
    fn guards(&self, t: f64, x: &[f64], g: &mut [f64]) {
        self.0.guards(t, &x[..self.0.dim()], g)
    }
    fn on_guard(&mut self, t: f64, x: &mut [f64], k: usize) {
        let n = self.0.dim();
        self.0.on_guard(t, &mut x[..n], k)
    }
    fn on_breakpoint(&mut self, t: f64, x: &mut [f64]) {
        let n = self.0.dim();
        self.0.on_breakpoint(t, &mut x[..n])
    }
    fn settle_modes(&mut self, t: f64, x: &mut [f64]) {
        let n = self.0.dim();
        self.0.settle_modes(t, &mut x[..n])
    }
}

#[test]
fn dc_link_energy_balance_holds_through_a_fault() {
    // Energy conservation from source to grid: ∫p_source = ∫p_terminal + ∫R|i|² + ∫p_chopper
    // + H_c·Δ(v_dc²) + Δ(½·(L/ω_b)·|i|²). This ties the DC side to the AC filter dynamics:
    // the converter power Re(v_c·i*) is never integrated directly.
    let (unit, x0) = FullConverter::initialise(
        FullConverterParams::default(),
        &OperatingPoint::new(0.9, 0.1),
        &GridEquivalent {
            scr: 4.0,
            x_over_r: 10.0,
        },
        &Disturbance::Fault {
            start_s: 0.1,
            duration_s: 0.2,
            retained_voltage: 0.2,
        },
    )
    .unwrap();
    let n = x0.len();
    let mut audit = EnergyAudit(unit);
    let mut x = x0.clone();
    x.extend([0.0; 4]);
    let bp = audit.0.breakpoints_s();
    let mut chopper_seen = false;
    let stats = integrate(
        &mut audit,
        &mut x,
        0.0,
        1.0,
        1e-3,
        &bp,
        &rk4(2e-5),
        |_, _, m| chopper_seen |= m.0.modes.chopper_on,
    )
    .unwrap();
    assert!(
        chopper_seen && stats.guard_events > 0,
        "the fault must exercise the chopper"
    );
    let p = &audit.0.params;
    let stored = |x: &[f64]| {
        p.dc_energy_s * x[ix::DC_W]
            + 0.5 * p.filter_l / p.omega_b() * (x[ix::I_RE].powi(2) + x[ix::I_IM].powi(2))
    };
    let e_in = x[n];
    let e_out = x[n + 1] + x[n + 2] + x[n + 3] + stored(&x) - stored(&x0);
    let mismatch = (e_in - e_out).abs();
    assert!(
        mismatch < 1e-8 * e_in,
        "energy in {e_in} pu·s, out {e_out} pu·s, mismatch {mismatch:e}"
    );
}

#[test]
fn bad_settings_and_infeasible_points_name_the_field() {
    let err = FullConverter::initialise(
        FullConverterParams {
            u_filter_s: -0.01,
            ..FullConverterParams::default()
        },
        &OperatingPoint::new(0.5, 0.0),
        &IDEAL,
        &Disturbance::None,
    )
    .unwrap_err();
    assert!(err.to_string().contains("unit.u_filter_s"), "{err}");
    assert!(err.to_string().contains("-0.01"), "{err}");

    let err = FullConverter::initialise(
        FullConverterParams::default(),
        &OperatingPoint::new(0.5, 0.0),
        &GridEquivalent {
            scr: 3.0,
            x_over_r: 10.0,
        },
        &Disturbance::VoltageDip {
            start_s: 0.1,
            duration_s: 0.1,
            residual_voltage: -0.2,
            phase_jump_deg: 0.0,
        },
    )
    .unwrap_err();
    assert!(
        err.to_string().contains("disturbance.residual_voltage"),
        "{err}"
    );

    // P = 1 pu through SCR 1.2 with X/R 10 lies beyond the nose of the P–V curve
    let err = FullConverter::initialise(
        FullConverterParams::default(),
        &OperatingPoint::new(1.0, 0.0),
        &GridEquivalent {
            scr: 0.9,
            x_over_r: 10.0,
        },
        &Disturbance::None,
    )
    .unwrap_err();
    assert!(matches!(err, UnitError::NoSteadyState { .. }), "{err}");
    assert!(err.to_string().contains("SCR"), "{err}");
}

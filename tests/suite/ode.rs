//! Stiff reference problems: TR-BDF2 (and Dormand–Prince where it is not stiffness-limited)
//! against scipy.integrate.solve_ivp(method="Radau") at rtol 1e-10 (tests/reference/stiff_radau.py).
//! Problems from Hairer & Wanner, Solving Ordinary Differential Equations II, §IV.1 and §IV.10.

use serde_json::json;
use understudy_runtime::ode::{integrate, HybridSystem, Method, Stats};

use crate::common;

/// Robertson's chemical kinetics (Hairer & Wanner II, §IV.1): k1 = 0.04, k2 = 3e7, k3 = 1e4.
struct Robertson;

impl HybridSystem for Robertson {
    fn dim(&self) -> usize {
        3
    }
    fn derivatives(&self, _t: f64, y: &[f64], dy: &mut [f64]) {
        let (k1, k2, k3) = (0.04, 3e7, 1e4);
        dy[0] = -k1 * y[0] + k3 * y[1] * y[2];
        dy[1] = k1 * y[0] - k3 * y[1] * y[2] - k2 * y[1] * y[1];
        dy[2] = k2 * y[1] * y[1];
    }
}

/// Van der Pol y'' − μ(1 − y²)y' + y = 0 as a first-order system (Hairer & Wanner II, §IV.1).
struct VanDerPol {
    mu: f64,
}

impl HybridSystem for VanDerPol {
    fn dim(&self) -> usize {
        2
    }
    fn derivatives(&self, _t: f64, y: &[f64], dy: &mut [f64]) {
        dy[0] = y[1];
        dy[1] = self.mu * (1.0 - y[0] * y[0]) * y[1] - y[0];
    }
}

/// Integrate and keep the observations at the requested times (which must be samples).
fn solve_at<S: HybridSystem>(
    sys: &mut S,
    y0: &[f64],
    sample_step_s: f64,
    times: &[f64],
    method: &Method,
) -> (Vec<Vec<f64>>, Stats) {
    let mut y = y0.to_vec();
    let mut kept = Vec::new();
    let t_end = *times.last().unwrap();
    let stats = integrate(
        sys,
        &mut y,
        0.0,
        t_end,
        sample_step_s,
        &[],
        method,
        |t, y, _| {
            if times
                .iter()
                .any(|&want| (t - want).abs() <= 1e-9 * want.max(1.0))
            {
                kept.push(y.to_vec());
            }
        },
    )
    .unwrap();
    assert_eq!(
        kept.len(),
        times.len(),
        "not every comparison time was a sample"
    );
    (kept, stats)
}

fn reference(problem: serde_json::Value) -> Option<Vec<Vec<f64>>> {
    let r = common::run_reference("stiff_radau.py", &problem)?;
    eprintln!("reference: {} ({} f evaluations)", r["solver"], r["nfev"]);
    Some(
        r["y"]
            .as_array()
            .unwrap()
            .iter()
            .map(|row| {
                row.as_array()
                    .unwrap()
                    .iter()
                    .map(|v| v.as_f64().unwrap())
                    .collect()
            })
            .collect(),
    )
}

/// Largest |ours − ref| / (rel·|ref| + abs_floor) over all times and components.
fn worst_ratio(ours: &[Vec<f64>], reference: &[Vec<f64>], abs_floor: &[f64]) -> (f64, f64) {
    let mut worst_rel: f64 = 0.0;
    for (a, b) in ours.iter().zip(reference) {
        for ((&x, &r), &floor) in a.iter().zip(b).zip(abs_floor) {
            worst_rel = worst_rel.max((x - r).abs() / (r.abs() + floor));
        }
    }
    let worst_abs = ours
        .iter()
        .zip(reference)
        .flat_map(|(a, b)| a.iter().zip(b).map(|(x, r)| (x - r).abs()))
        .fold(0.0, f64::max);
    (worst_rel, worst_abs)
}

#[test]
fn tr_bdf2_matches_radau_on_robertson() {
    // Robertson on [0, 40], compared at t = 0.04, 0.4, 4, 40 (y2 ≈ 1e-5 is checked relative to
    // itself: its absolute floor 1e-12 is far below its size). TR-BDF2 at rtol 1e-10 controls
    // the local error per step; the global error of this second-order method grows like
    // rtol^{2/3} (tolerance proportionality, Hairer, Nørsett & Wanner I, §II.4), i.e. ~1e-7
    // relative here, so 1e-6 relative is the stated agreement. The Radau reference at rtol 1e-10
    // with atol (1e-14, 1e-18, 1e-14) is two orders more accurate than that.
    let times = [0.04, 0.4, 4.0, 40.0];
    let method = Method::TrBdf2 {
        rtol: 1e-10,
        atol: 1e-14,
        max_step_s: 10.0,
    };
    let (ours, stats) = solve_at(&mut Robertson, &[1.0, 0.0, 0.0], 0.04, &times, &method);
    eprintln!("TR-BDF2 Robertson: {stats:?}");
    let Some(reference) = reference(json!({
        "problem": "robertson", "y0": [1.0, 0.0, 0.0], "t_eval": times,
        "rtol": 1e-10, "atol": [1e-14, 1e-18, 1e-14],
    })) else {
        return;
    };
    let (rel, abs) = worst_ratio(&ours, &reference, &[1e-12, 1e-12, 1e-12]);
    eprintln!("Robertson vs Radau: worst relative deviation {rel:e}, worst absolute {abs:e}");
    assert!(rel < 1e-6, "worst relative deviation {rel:e}");
    // Mass conservation y1 + y2 + y3 = 1 holds for the exact flow (analytic) and, being a
    // linear invariant, for every Runge–Kutta method up to the Newton tolerance.
    let last = ours.last().unwrap();
    assert!(
        (last.iter().sum::<f64>() - 1.0).abs() < 1e-9,
        "mass {}",
        last.iter().sum::<f64>()
    );
}

#[test]
fn tr_bdf2_matches_radau_on_van_der_pol_slow_branch() {
    // μ = 1000 from (2, 0): the slow branch until the first fast jump near t ≈ 807
    // (Hairer & Wanner II, §IV.1); compared at t = 100, 300, 500, 700. Same stated agreement
    // 1e-6 relative as for Robertson (rtol^{2/3} global error of TR-BDF2 at rtol 1e-10).
    let times = [100.0, 300.0, 500.0, 700.0];
    let method = Method::TrBdf2 {
        rtol: 1e-10,
        atol: 1e-14,
        max_step_s: 50.0,
    };
    let (ours, stats) = solve_at(
        &mut VanDerPol { mu: 1000.0 },
        &[2.0, 0.0],
        100.0,
        &times,
        &method,
    );
    eprintln!("TR-BDF2 van der Pol: {stats:?}");
    let Some(reference) = reference(json!({
        "problem": "van_der_pol", "mu": 1000.0, "y0": [2.0, 0.0], "t_eval": times,
        "rtol": 1e-10, "atol": [1e-12, 1e-15],
    })) else {
        return;
    };
    let (rel, abs) = worst_ratio(&ours, &reference, &[1e-12, 1e-12]);
    eprintln!("van der Pol vs Radau: worst relative deviation {rel:e}, worst absolute {abs:e}");
    assert!(rel < 1e-6, "worst relative deviation {rel:e}");
}

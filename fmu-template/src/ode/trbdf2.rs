//! TR-BDF2: a trapezoidal stage to t + γh followed by a BDF2 stage to t + h, γ = 2 − √2, which
//! makes it L-stable and lets both stages share the iteration matrix I − d·h·J, d = γ/2 (Hosea &
//! Shampine, Appl. Numer. Math. 20, 1996, "Analysis and implementation of TR-BDF2"). Written as
//! the stiffly accurate ESDIRK with c = (0, γ, 1), A = [[0], [d, d], [w, w, d]], w = √2/4.
//!
//! Simplified Newton on a finite-difference Jacobian, reused across steps until Newton converges
//! slowly or fails; a failed Newton iteration with a fresh Jacobian rejects the step.

// Stage formulas read as the textbook writes them: one index over several vectors.
#![allow(clippy::needless_range_loop)]

use nalgebra::{DMatrix, DVector, Dyn, LU};

use super::dopri::land;
use super::{initial_step, min_step, weighted_rms, HybridSystem, OdeError, Stats, Stepper};

const GAMMA: f64 = 2.0 - std::f64::consts::SQRT_2;
const D: f64 = GAMMA / 2.0;
const W: f64 = std::f64::consts::SQRT_2 / 4.0;
// b − b̂ with b̂ = ((1 − w)/3, (3w + 1)/3, d/3), the third-order companion weights of
// Hosea & Shampine 1996 (the unique third-order weights on these stages).
const E1: f64 = (4.0 * W - 1.0) / 3.0;
const E2: f64 = -1.0 / 3.0;
const E3: f64 = 2.0 * D / 3.0;

const SAFETY: f64 = 0.9;
const FAC_MIN: f64 = 0.2;
const FAC_MAX: f64 = 5.0;
const MAX_NEWTON: usize = 7;
/// Newton contraction above which the iteration is declared divergent.
const THETA_DIVERGENT: f64 = 0.9;
/// Newton contraction above which the Jacobian is refreshed before the next step.
const THETA_REFRESH: f64 = 0.3;

pub(super) struct TrBdf2 {
    rtol: f64,
    atol: f64,
    max_step: f64,
    /// Newton stopping level in units of the error tolerance (RADAU5's rule, Hairer & Wanner,
    /// Solving ODEs II, §IV.8: max(10·eps/rtol, min(0.03, √rtol))).
    kappa: f64,
    h: Option<f64>,
    h_wanted: f64,
    h_after: f64,
    f0: Vec<f64>,
    f0_valid: bool,
    jac: DMatrix<f64>,
    jac_valid: bool,
    /// The Jacobian was evaluated at the current step start.
    jac_fresh: bool,
    lu: Option<LU<f64, Dyn, Dyn>>,
    lu_h: f64,
    /// Newton convergence-rate memory η (Hairer & Wanner II, §IV.8, eq. 8.10).
    eta: f64,
    theta_max: f64,
    z: Vec<f64>,
    base: Vec<f64>,
    fu: Vec<f64>,
    xp: Vec<f64>,
    res: DVector<f64>,
    last_rejected: bool,
}

impl TrBdf2 {
    pub(super) fn new(rtol: f64, atol: f64, max_step: f64, n: usize) -> Self {
        TrBdf2 {
            rtol,
            atol,
            max_step,
            kappa: (10.0 * f64::EPSILON / rtol).max(0.03_f64.min(rtol.sqrt())),
            h: None,
            h_wanted: 0.0,
            h_after: 0.0,
            f0: vec![0.0; n],
            f0_valid: false,
            jac: DMatrix::zeros(n, n),
            jac_valid: false,
            jac_fresh: false,
            lu: None,
            lu_h: f64::NAN,
            eta: 1.0,
            theta_max: 0.0,
            z: vec![0.0; n],
            base: vec![0.0; n],
            fu: vec![0.0; n],
            xp: vec![0.0; n],
            res: DVector::zeros(n),
            last_rejected: false,
        }
    }

    fn ensure_f0<S: HybridSystem>(&mut self, sys: &S, t: f64, x: &[f64], stats: &mut Stats) {
        if !self.f0_valid {
            sys.derivatives(t, x, &mut self.f0);
            stats.derivative_evaluations += 1;
            self.f0_valid = true;
        }
    }

    /// Forward-difference Jacobian at (t, x); increments as in RADAU5 (Hairer & Wanner II):
    /// δ_j = √(eps · max(1e-5, |x_j|)).
    fn jacobian<S: HybridSystem>(&mut self, sys: &S, t: f64, x: &[f64], stats: &mut Stats) {
        self.xp.copy_from_slice(x);
        for j in 0..x.len() {
            let delta = (f64::EPSILON * x[j].abs().max(1e-5)).sqrt();
            self.xp[j] = x[j] + delta;
            sys.derivatives(t, &self.xp, &mut self.fu);
            self.xp[j] = x[j];
            for i in 0..x.len() {
                self.jac[(i, j)] = (self.fu[i] - self.f0[i]) / delta;
            }
        }
        stats.derivative_evaluations += x.len();
        stats.jacobian_evaluations += 1;
        self.jac_valid = true;
        self.jac_fresh = true;
        self.lu = None;
    }

    /// LU of I − d·h·J for this h; false when singular.
    fn factor(&mut self, h: f64, stats: &mut Stats) -> bool {
        if self.lu.is_none() || self.lu_h.to_bits() != h.to_bits() {
            let n = self.jac.nrows();
            let m = DMatrix::identity(n, n) - (D * h) * &self.jac;
            self.lu = Some(m.lu());
            self.lu_h = h;
            stats.lu_decompositions += 1;
        }
        self.lu.as_ref().is_some_and(|lu| lu.is_invertible())
    }

    /// Simplified Newton for u = base + dh·f(tc, u), starting from the guess in `u`.
    #[allow(clippy::too_many_arguments)]
    fn newton<S: HybridSystem>(
        &mut self,
        sys: &S,
        tc: f64,
        dh: f64,
        x_ref: &[f64],
        u: &mut [f64],
        stats: &mut Stats,
    ) -> bool {
        let lu = self.lu.as_ref().expect("factorised before Newton");
        let mut norm_prev = 0.0;
        for iteration in 0..MAX_NEWTON {
            sys.derivatives(tc, u, &mut self.fu);
            stats.derivative_evaluations += 1;
            for i in 0..u.len() {
                self.res[i] = self.base[i] + dh * self.fu[i] - u[i];
            }
            if !self.res.iter().all(|r| r.is_finite()) || !lu.solve_mut(&mut self.res) {
                return false;
            }
            for i in 0..u.len() {
                u[i] += self.res[i];
            }
            let norm = weighted_rms(self.res.as_slice(), x_ref, u, self.rtol, self.atol);
            if !norm.is_finite() {
                return false;
            }
            if norm == 0.0 {
                return true;
            }
            let eta = if iteration == 0 {
                // Hairer & Wanner II, §IV.8: reuse the previous rate, floored so that a stale
                // Jacobian cannot pass on the first correction alone.
                self.eta.max(0.05).powf(0.8)
            } else {
                let theta = norm / norm_prev;
                self.theta_max = self.theta_max.max(theta);
                if theta >= THETA_DIVERGENT {
                    return false;
                }
                theta / (1.0 - theta)
            };
            if eta * norm <= self.kappa {
                self.eta = eta;
                return true;
            }
            norm_prev = norm;
        }
        false
    }

    /// Both stages of a step of size h; the stage value at t + γh is left in `z`. False when
    /// Newton failed with a Jacobian evaluated at this step's start.
    fn stages<S: HybridSystem>(
        &mut self,
        sys: &S,
        t: f64,
        x: &[f64],
        h: f64,
        x_new: &mut [f64],
        stats: &mut Stats,
    ) -> bool {
        self.ensure_f0(sys, t, x, stats);
        loop {
            if !self.jac_valid {
                self.jacobian(sys, t, x, stats);
            }
            self.theta_max = 0.0;
            if self.factor(h, stats) && self.newton_stages(sys, t, x, h, x_new, stats) {
                return true;
            }
            if self.jac_fresh {
                return false;
            }
            self.jac_valid = false;
        }
    }

    fn newton_stages<S: HybridSystem>(
        &mut self,
        sys: &S,
        t: f64,
        x: &[f64],
        h: f64,
        x_new: &mut [f64],
        stats: &mut Stats,
    ) -> bool {
        let dh = D * h;
        // Trapezoidal stage: z = x + d·h·(f(t, x) + f(t + γh, z)); Euler predictor.
        let mut z = std::mem::take(&mut self.z);
        for i in 0..x.len() {
            self.base[i] = x[i] + dh * self.f0[i];
            z[i] = x[i] + GAMMA * h * self.f0[i];
        }
        let ok = self.newton(sys, t + GAMMA * h, dh, x, &mut z, stats);
        self.z = z;
        if !ok {
            return false;
        }
        // BDF2 stage: y = x + (w/d)(z − x) + d·h·f(t + h, y); linear extrapolation predictor.
        for i in 0..x.len() {
            self.base[i] = x[i] + W / D * (self.z[i] - x[i]);
            x_new[i] = x[i] + (self.z[i] - x[i]) / GAMMA;
        }
        self.newton(sys, t + h, dh, x, x_new, stats)
    }
}

impl<S: HybridSystem> Stepper<S> for TrBdf2 {
    fn choose_step(
        &mut self,
        sys: &S,
        t: f64,
        x: &[f64],
        remaining: f64,
        stats: &mut Stats,
    ) -> (f64, bool) {
        let h = match self.h {
            Some(h) => h,
            None => {
                self.ensure_f0(sys, t, x, stats);
                let h = initial_step(
                    sys,
                    t,
                    x,
                    &self.f0,
                    2,
                    self.rtol,
                    self.atol,
                    self.max_step,
                    stats,
                );
                self.h = Some(h);
                h
            }
        };
        let h = h.min(self.max_step);
        self.h_wanted = h;
        land(h, remaining)
    }

    fn attempt(
        &mut self,
        sys: &S,
        t: f64,
        x: &[f64],
        h: f64,
        x_new: &mut [f64],
        stats: &mut Stats,
    ) -> Result<bool, OdeError> {
        if !self.stages(sys, t, x, h, x_new, stats) {
            stats.newton_failures += 1;
            let h_next = 0.25 * h;
            if h_next < min_step(t) {
                return Err(OdeError::NewtonFailed { t_s: t, step_s: h });
            }
            self.h = Some(h_next);
            self.last_rejected = true;
            return Ok(false);
        }
        // Local error estimate h·Σ(b − b̂)k with the stage derivatives implied by the converged
        // stage equations, filtered through (I − d·h·J)⁻¹ so it stays bounded on stiff
        // components (Shampine's filtering, as in Hairer & Wanner II, §IV.8, eq. 8.20).
        let dh = D * h;
        for i in 0..x.len() {
            let k1 = self.f0[i];
            let k2 = (self.z[i] - x[i]) / dh - k1;
            let k3 = (x_new[i] - x[i] - W / D * (self.z[i] - x[i])) / dh;
            self.res[i] = h * (E1 * k1 + E2 * k2 + E3 * k3);
        }
        let lu = self.lu.as_ref().expect("factorised in stages");
        let err = if lu.solve_mut(&mut self.res) {
            weighted_rms(self.res.as_slice(), x, x_new, self.rtol, self.atol)
        } else {
            f64::INFINITY
        };
        if !err.is_finite() {
            let h_next = FAC_MIN * h;
            if h_next < min_step(t) {
                return Err(OdeError::NonFinite { t_s: t + h });
            }
            self.h = Some(h_next);
            self.last_rejected = true;
            return Ok(false);
        }
        // Local error is O(h³): standard controller with exponent 1/3 (Hairer, Nørsett & Wanner
        // I, §II.4, eq. 4.13).
        let fac = if err > 0.0 {
            (SAFETY * err.powf(-1.0 / 3.0)).clamp(FAC_MIN, FAC_MAX)
        } else {
            FAC_MAX
        };
        if err <= 1.0 {
            let mut h_next = h * fac;
            if self.last_rejected {
                h_next = h_next.min(h);
            }
            if h < self.h_wanted {
                h_next = h_next.max(self.h_wanted);
            }
            // Keep h (and so the LU of I − d·h·J) when it would grow by less than 20 %
            // (RADAU5's quot1/quot2 rule, Hairer & Wanner II, §IV.8).
            if (1.0..=1.2).contains(&(h_next / h)) {
                h_next = h;
            }
            self.h_after = h_next;
            self.last_rejected = false;
            Ok(true)
        } else {
            let h_next = h * fac.min(SAFETY);
            if h_next < min_step(t) {
                return Err(OdeError::StepTooSmall {
                    t_s: t,
                    step_s: h_next,
                });
            }
            self.h = Some(h_next);
            self.last_rejected = true;
            Ok(false)
        }
    }

    fn trial(
        &mut self,
        sys: &S,
        t: f64,
        x: &[f64],
        h: f64,
        x_new: &mut [f64],
        stats: &mut Stats,
    ) -> Result<(), OdeError> {
        if self.stages(sys, t, x, h, x_new, stats) {
            Ok(())
        } else {
            Err(OdeError::NewtonFailed { t_s: t, step_s: h })
        }
    }

    fn accepted(&mut self, _cut: bool) {
        self.h = Some(self.h_after);
        self.f0_valid = false;
        self.jac_fresh = false;
        if self.theta_max > THETA_REFRESH {
            self.jac_valid = false;
        }
    }

    fn discontinuity(&mut self) {
        self.f0_valid = false;
        self.jac_valid = false;
        self.h = None;
        self.eta = 1.0;
        self.last_rejected = false;
    }
}

//! Dormand–Prince 5(4) with FSAL and the PI step-size controller of DOPRI5 (Dormand & Prince,
//! J. Comput. Appl. Math. 6, 1980; Hairer, Nørsett & Wanner, Solving ODEs I, §II.5, Table 5.2
//! for the coefficients, §II.4 and §IV.2 "PI control" for the controller).

use super::{initial_step, min_step, weighted_rms, HybridSystem, OdeError, Stats, Stepper};

// Butcher tableau, Hairer, Nørsett & Wanner, Solving ODEs I, Table 5.2.
const C2: f64 = 1.0 / 5.0;
const C3: f64 = 3.0 / 10.0;
const C4: f64 = 4.0 / 5.0;
const C5: f64 = 8.0 / 9.0;
const A21: f64 = 1.0 / 5.0;
const A31: f64 = 3.0 / 40.0;
const A32: f64 = 9.0 / 40.0;
const A41: f64 = 44.0 / 45.0;
const A42: f64 = -56.0 / 15.0;
const A43: f64 = 32.0 / 9.0;
const A51: f64 = 19372.0 / 6561.0;
const A52: f64 = -25360.0 / 2187.0;
const A53: f64 = 64448.0 / 6561.0;
const A54: f64 = -212.0 / 729.0;
const A61: f64 = 9017.0 / 3168.0;
const A62: f64 = -355.0 / 33.0;
const A63: f64 = 46732.0 / 5247.0;
const A64: f64 = 49.0 / 176.0;
const A65: f64 = -5103.0 / 18656.0;
const A71: f64 = 35.0 / 384.0;
const A73: f64 = 500.0 / 1113.0;
const A74: f64 = 125.0 / 192.0;
const A75: f64 = -2187.0 / 6784.0;
const A76: f64 = 11.0 / 84.0;
// b − b̂ (fifth-order minus embedded fourth-order weights), as in DOPRI5.
const E1: f64 = 71.0 / 57600.0;
const E3: f64 = -71.0 / 16695.0;
const E4: f64 = 71.0 / 1920.0;
const E5: f64 = -17253.0 / 339200.0;
const E6: f64 = 22.0 / 525.0;
const E7: f64 = -1.0 / 40.0;

// Controller constants of DOPRI5 (safety 0.9, step ratio in [0.2, 10], PI with β = 0.04).
const SAFETY: f64 = 0.9;
const FAC_MIN: f64 = 0.2;
const FAC_MAX: f64 = 10.0;
const BETA: f64 = 0.04;

pub(super) struct DormandPrince {
    rtol: f64,
    atol: f64,
    max_step: f64,
    /// Proposed next step; None after a discontinuity (re-estimated then).
    h: Option<f64>,
    /// Step size the controller wanted for the current attempt (before landing cuts).
    h_wanted: f64,
    /// Step proposal computed by the last accepted attempt.
    h_after: f64,
    k: [Vec<f64>; 7],
    stage: Vec<f64>,
    err: Vec<f64>,
    /// k[0] holds f(t, x) of the current step start.
    fsal_valid: bool,
    err_old: f64,
    last_rejected: bool,
}

impl DormandPrince {
    pub(super) fn new(rtol: f64, atol: f64, max_step: f64, n: usize) -> Self {
        DormandPrince {
            rtol,
            atol,
            max_step,
            h: None,
            h_wanted: 0.0,
            h_after: 0.0,
            k: std::array::from_fn(|_| vec![0.0; n]),
            stage: vec![0.0; n],
            err: vec![0.0; n],
            fsal_valid: false,
            err_old: 1e-4,
            last_rejected: false,
        }
    }

    fn ensure_fsal<S: HybridSystem>(&mut self, sys: &S, t: f64, x: &[f64], stats: &mut Stats) {
        if !self.fsal_valid {
            sys.derivatives(t, x, &mut self.k[0]);
            stats.derivative_evaluations += 1;
            self.fsal_valid = true;
        }
    }

    /// The six new stages of one step and the fifth-order solution in `x_new`; k[6] = f at the
    /// end (FSAL).
    fn stages<S: HybridSystem>(
        &mut self,
        sys: &S,
        t: f64,
        x: &[f64],
        h: f64,
        x_new: &mut [f64],
        stats: &mut Stats,
    ) {
        let n = x.len();
        let [k1, k2, k3, k4, k5, k6, k7] = &mut self.k;
        let stage = &mut self.stage;
        for i in 0..n {
            stage[i] = x[i] + h * A21 * k1[i];
        }
        sys.derivatives(t + C2 * h, stage, k2);
        for i in 0..n {
            stage[i] = x[i] + h * (A31 * k1[i] + A32 * k2[i]);
        }
        sys.derivatives(t + C3 * h, stage, k3);
        for i in 0..n {
            stage[i] = x[i] + h * (A41 * k1[i] + A42 * k2[i] + A43 * k3[i]);
        }
        sys.derivatives(t + C4 * h, stage, k4);
        for i in 0..n {
            stage[i] = x[i] + h * (A51 * k1[i] + A52 * k2[i] + A53 * k3[i] + A54 * k4[i]);
        }
        sys.derivatives(t + C5 * h, stage, k5);
        for i in 0..n {
            stage[i] =
                x[i] + h * (A61 * k1[i] + A62 * k2[i] + A63 * k3[i] + A64 * k4[i] + A65 * k5[i]);
        }
        sys.derivatives(t + h, stage, k6);
        for i in 0..n {
            x_new[i] =
                x[i] + h * (A71 * k1[i] + A73 * k3[i] + A74 * k4[i] + A75 * k5[i] + A76 * k6[i]);
        }
        sys.derivatives(t + h, x_new, k7);
        stats.derivative_evaluations += 6;
    }
}

impl<S: HybridSystem> Stepper<S> for DormandPrince {
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
                self.ensure_fsal(sys, t, x, stats);
                let h = initial_step(
                    sys,
                    t,
                    x,
                    &self.k[0],
                    5,
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
        self.ensure_fsal(sys, t, x, stats);
        self.stages(sys, t, x, h, x_new, stats);
        let [k1, _, k3, k4, k5, k6, k7] = &self.k;
        for i in 0..x.len() {
            self.err[i] =
                h * (E1 * k1[i] + E3 * k3[i] + E4 * k4[i] + E5 * k5[i] + E6 * k6[i] + E7 * k7[i]);
        }
        let err = weighted_rms(&self.err, x, x_new, self.rtol, self.atol);
        if !err.is_finite() {
            // Treat an overflowing stage like a failed error test with the largest cut.
            let h_next = h * FAC_MIN;
            if h_next < min_step(t) {
                return Err(OdeError::NonFinite { t_s: t + h });
            }
            self.h = Some(h_next);
            self.last_rejected = true;
            return Ok(false);
        }
        // PI step-size control of DOPRI5 (Hairer, Nørsett & Wanner I, §IV.2, eq. 2.43c):
        // h_new = h · safety · err^(−α) · err_old^β with α = 0.2 − 0.75 β.
        let fac11 = err.powf(0.2 - 0.75 * BETA);
        if err <= 1.0 {
            let fac =
                (fac11 / self.err_old.powf(BETA) / SAFETY).clamp(1.0 / FAC_MAX, 1.0 / FAC_MIN);
            let mut h_next = h / fac;
            if self.last_rejected {
                h_next = h_next.min(h);
            }
            self.err_old = err.max(1e-4);
            self.last_rejected = false;
            // A step shortened to land on a target says nothing against the wanted size.
            if h < self.h_wanted {
                h_next = h_next.max(self.h_wanted);
            }
            self.h_after = h_next;
            Ok(true)
        } else {
            let h_next = h / (fac11 / SAFETY).min(1.0 / FAC_MIN);
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
        self.ensure_fsal(sys, t, x, stats);
        self.stages(sys, t, x, h, x_new, stats);
        Ok(())
    }

    fn accepted(&mut self, cut: bool) {
        self.h = Some(self.h_after);
        if cut {
            self.fsal_valid = false;
        } else {
            self.k.swap(0, 6);
        }
    }

    fn discontinuity(&mut self) {
        self.fsal_valid = false;
        self.h = None;
        self.err_old = 1e-4;
        self.last_rejected = false;
    }
}

/// Step towards a target `remaining` away with a wanted step `h`: land on it when it is within
/// reach, halve the rest when a full step would leave a sliver, else take `h`.
pub(super) fn land(h: f64, remaining: f64) -> (f64, bool) {
    if remaining <= h * (1.0 + 1e-9) {
        (remaining, true)
    } else if remaining < 2.0 * h {
        (0.5 * remaining, false)
    } else {
        (h, false)
    }
}

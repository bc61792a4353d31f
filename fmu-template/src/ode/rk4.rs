//! Classical fixed-step Runge–Kutta 4 (Hairer, Nørsett & Wanner, Solving ODEs I, §II.1,
//! Table 1.2, "classical Runge–Kutta method").

// Stage formulas read as the textbook writes them: one index over several vectors.
#![allow(clippy::needless_range_loop)]

use super::{HybridSystem, OdeError, Stats, Stepper};

pub(super) struct Rk4 {
    step: f64,
    k1: Vec<f64>,
    k2: Vec<f64>,
    k3: Vec<f64>,
    k4: Vec<f64>,
    stage: Vec<f64>,
}

impl Rk4 {
    pub(super) fn new(step: f64, n: usize) -> Self {
        Rk4 {
            step,
            k1: vec![0.0; n],
            k2: vec![0.0; n],
            k3: vec![0.0; n],
            k4: vec![0.0; n],
            stage: vec![0.0; n],
        }
    }

    fn step_from<S: HybridSystem>(
        &mut self,
        sys: &S,
        t: f64,
        x: &[f64],
        h: f64,
        x_new: &mut [f64],
        stats: &mut Stats,
    ) {
        let half = 0.5 * h;
        sys.derivatives(t, x, &mut self.k1);
        for i in 0..x.len() {
            self.stage[i] = x[i] + half * self.k1[i];
        }
        sys.derivatives(t + half, &self.stage, &mut self.k2);
        for i in 0..x.len() {
            self.stage[i] = x[i] + half * self.k2[i];
        }
        sys.derivatives(t + half, &self.stage, &mut self.k3);
        for i in 0..x.len() {
            self.stage[i] = x[i] + h * self.k3[i];
        }
        sys.derivatives(t + h, &self.stage, &mut self.k4);
        for i in 0..x.len() {
            x_new[i] =
                x[i] + h / 6.0 * (self.k1[i] + 2.0 * self.k2[i] + 2.0 * self.k3[i] + self.k4[i]);
        }
        stats.derivative_evaluations += 4;
    }
}

impl<S: HybridSystem> Stepper<S> for Rk4 {
    /// Equal steps no longer than `step` that end exactly on the target.
    fn choose_step(
        &mut self,
        _sys: &S,
        _t: f64,
        _x: &[f64],
        remaining: f64,
        _stats: &mut Stats,
    ) -> (f64, bool) {
        // The relative slack keeps round-off from adding a sliver step before the target.
        let count = (remaining / self.step * (1.0 - 1e-9)).ceil().max(1.0);
        (remaining / count, count <= 1.0)
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
        self.step_from(sys, t, x, h, x_new, stats);
        Ok(true)
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
        self.step_from(sys, t, x, h, x_new, stats);
        Ok(())
    }

    fn accepted(&mut self, _cut: bool) {}

    fn discontinuity(&mut self) {}
}

//! Time integration of hybrid (continuous + discrete-mode) systems.
//!
//! Three methods: fixed-step classical Runge–Kutta 4, adaptive Dormand–Prince 5(4), and the
//! L-stable implicit TR-BDF2 with Newton iterations for stiff systems. Time is in seconds.
//!
//! Discontinuities are hit exactly:
//! - **breakpoints** are known times (a fault switching on or off); the integrator lands a step
//!   exactly on each one and calls [`HybridSystem::on_breakpoint`], then
//!   [`HybridSystem::settle_modes`];
//! - **guards** are state-dependent switches (a limiter engaging, a dip detected); each guard is
//!   negative while the current mode holds, and the first time one reaches zero inside a step is
//!   located by root finding on real integration steps (not on an interpolant), the step is cut
//!   there and [`HybridSystem::on_guard`] applies the transition.
//!
//! Samples are right-continuous: a sample that falls on a breakpoint or event time is taken after
//! the transition has been applied.

use thiserror::Error;

/// A continuous system with discrete modes. The mode lives inside the implementor; the
/// integrator only owns the continuous state vector.
pub trait HybridSystem {
    /// Number of continuous states.
    fn dim(&self) -> usize;

    /// dx/dt at time `t_s` in the current mode. Must be smooth in (t, x) while the mode holds and
    /// no breakpoint lies inside the step.
    fn derivatives(&self, t_s: f64, x: &[f64], dx: &mut [f64]);

    /// Number of guard functions.
    fn guard_count(&self) -> usize {
        0
    }

    /// Guard values in the current mode: each is negative while the mode holds; a guard that
    /// reaches ≥ 0 inside a step fires.
    fn guards(&self, _t_s: f64, _x: &[f64], _g: &mut [f64]) {}

    /// Apply the transition of guard `index`, which fired at `t_s`. May change the mode and
    /// reset states.
    fn on_guard(&mut self, _t_s: f64, _x: &mut [f64], _index: usize) {}

    /// A breakpoint at `t_s` has been reached (the integrator stepped exactly onto it): apply
    /// the scheduled discontinuity (e.g. the next disturbance phase).
    fn on_breakpoint(&mut self, _t_s: f64, _x: &mut [f64]) {}

    /// Make the discrete mode consistent with (t, x) directly (not by guard crossings). Called at
    /// the start of integration and after every breakpoint.
    fn settle_modes(&mut self, _t_s: f64, _x: &mut [f64]) {}
}

/// Integration method and its settings.
#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
#[serde(tag = "method", rename_all = "kebab-case", deny_unknown_fields)]
pub enum Method {
    /// Classical fixed-step Runge–Kutta 4 with step `step_s` (steps are shortened to land on
    /// samples, breakpoints and events).
    Rk4 { step_s: f64 },
    /// Dormand–Prince 5(4) with error control (Dormand & Prince 1980; Hairer, Nørsett & Wanner,
    /// Solving ODEs I, §II.5).
    DormandPrince {
        rtol: f64,
        atol: f64,
        max_step_s: f64,
    },
    /// TR-BDF2, L-stable, second order, embedded error estimate (Hosea & Shampine, Appl. Numer.
    /// Math. 20, 1996), Newton on a finite-difference Jacobian.
    TrBdf2 {
        rtol: f64,
        atol: f64,
        max_step_s: f64,
    },
}

/// Counters of one integration run.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq, serde::Serialize, serde::Deserialize)]
pub struct Stats {
    pub steps: usize,
    pub rejected_steps: usize,
    pub derivative_evaluations: usize,
    pub jacobian_evaluations: usize,
    pub guard_events: usize,
    pub breakpoints: usize,
}

/// Failures of the numbers during integration.
#[derive(Debug, Error, Clone, PartialEq)]
pub enum OdeError {
    #[error("integration setting `{name}` = {value} is invalid: expected {expected}")]
    BadSetting {
        name: &'static str,
        value: f64,
        expected: &'static str,
    },
    #[error("step size fell to {step_s:e} s at t = {t_s} s (error control could not be met)")]
    StepTooSmall { t_s: f64, step_s: f64 },
    #[error("Newton iteration did not converge at t = {t_s} s with step {step_s:e} s")]
    NewtonFailed { t_s: f64, step_s: f64 },
    #[error("state became non-finite at t = {t_s} s")]
    NonFinite { t_s: f64 },
    #[error(
        "guard {guard} fired {count} times at t = {t_s} s without time advancing (chattering)"
    )]
    Chattering {
        t_s: f64,
        guard: usize,
        count: usize,
    },
}

/// Integrate `sys` from `t0_s` to `t_end_s`, starting from `x` (overwritten with the final
/// state). `observe(t, x, sys)` is called at t0, every multiple of `sample_step_s` after it, and at
/// `t_end_s`. `breakpoints_s` need not be sorted; those outside (t0, t_end] are ignored.
pub fn integrate<S: HybridSystem>(
    sys: &mut S,
    x: &mut [f64],
    t0_s: f64,
    t_end_s: f64,
    sample_step_s: f64,
    breakpoints_s: &[f64],
    method: &Method,
    observe: impl FnMut(f64, &[f64], &S),
) -> Result<Stats, OdeError> {
    let _ = (
        sys,
        x,
        t0_s,
        t_end_s,
        sample_step_s,
        breakpoints_s,
        method,
        observe,
    );
    unimplemented!("integrator being written")
}

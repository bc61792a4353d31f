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
//!
//! # Steps
//! Every step is cut to land exactly on the next sample, breakpoint or `t_end` (those times are
//! used bit-exactly as step ends). RK4 spreads equal steps no longer than `step_s` between two
//! such targets; the adaptive methods take their controlled step, land on a target within
//! reach, and halve the rest when a full step would leave a sliver.
//!
//! # Events
//! Guards are evaluated in the current mode at the start and end of each accepted step. A guard
//! is *armed* when it is < 0 at the step start and *fires* when it is ≥ 0 at the step end. The
//! earliest crossing is bracketed by the Illinois variant of regula falsi, each trial point being
//! a real step of the method from the step start (no interpolant), until the bracket is narrower
//! than [`EVENT_TIME_TOL_REL`]`·max(1 s, |t0|, |t_end|)`; the step then ends at the bracket's right
//! end (where the guard is already ≥ 0), so the transition happens at most that much after the
//! true crossing of the numerical solution. Every armed guard that is ≥ 0 there fires, earliest
//! estimated crossing first; after the first transition the others fire only if they are still
//! ≥ 0 in the new mode. A guard that is ≥ 0 at a step start (e.g. right after its own transition)
//! is not armed until it has gone negative again.
//!
//! Limits: a guard that crosses and comes back within one step is not seen (bound the step with
//! `max_step_s` / `step_s` below the fastest guard excursion); more than [`MAX_CHATTER_EVENTS`]
//! firings in a row, each within [`CHATTER_WINDOW_TOLS`] tolerances of the previous one, stop the
//! run with [`OdeError::Chattering`].

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
    /// LU factorisations of the Newton iteration matrix (TR-BDF2).
    pub lu_decompositions: usize,
    /// Step attempts rejected because Newton did not converge (TR-BDF2); included in
    /// `rejected_steps`.
    pub newton_failures: usize,
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

/// Relative time tolerance of event location: a guard crossing is bracketed to within
/// `EVENT_TIME_TOL_REL · max(1 s, |t0|, |t_end|)` seconds (1e-12 s for runs shorter than 1 s).
pub const EVENT_TIME_TOL_REL: f64 = 1e-12;

/// A guard firing less than `CHATTER_WINDOW_TOLS` event-time tolerances after the previous
/// firing counts as "time not advancing"; more than [`MAX_CHATTER_EVENTS`] such firings in a row
/// end the integration with [`OdeError::Chattering`].
pub const CHATTER_WINDOW_TOLS: f64 = 10.0;

/// See [`CHATTER_WINDOW_TOLS`].
pub const MAX_CHATTER_EVENTS: usize = 100;

impl Method {
    /// Check the settings of the method: every step and tolerance must be finite and > 0.
    pub fn validate(&self) -> Result<(), OdeError> {
        match *self {
            Method::Rk4 { step_s } => positive("step_s", step_s),
            Method::DormandPrince {
                rtol,
                atol,
                max_step_s,
            }
            | Method::TrBdf2 {
                rtol,
                atol,
                max_step_s,
            } => {
                positive("rtol", rtol)?;
                positive("atol", atol)?;
                positive("max_step_s", max_step_s)
            }
        }
    }
}

fn positive(name: &'static str, value: f64) -> Result<(), OdeError> {
    if value.is_finite() && value > 0.0 {
        Ok(())
    } else {
        Err(OdeError::BadSetting {
            name,
            value,
            expected: "a finite number > 0",
        })
    }
}

fn finite(name: &'static str, value: f64) -> Result<(), OdeError> {
    if value.is_finite() {
        Ok(())
    } else {
        Err(OdeError::BadSetting {
            name,
            value,
            expected: "a finite number",
        })
    }
}

/// Integrate `sys` from `t0_s` to `t_end_s`, starting from `x` (overwritten with the final
/// state). `observe(t, x, sys)` is called at t0, every multiple of `sample_step_s` after it, and at
/// `t_end_s`. `breakpoints_s` need not be sorted; those outside (t0, t_end] are ignored.
///
/// Order of things at one time instant: the step lands; guards that crossed inside it fire
/// ([`HybridSystem::on_guard`]); a breakpoint at that time is applied
/// ([`HybridSystem::on_breakpoint`] then [`HybridSystem::settle_modes`]); then the sample is
/// observed. At `t0` the system is settled before the first observation. When `t_end_s == t0_s`
/// there is exactly one observation.
///
/// A sample time within the event-time tolerance of a breakpoint is taken at the breakpoint.
///
/// # Panics
/// If `x.len() != sys.dim()` (a caller bug).
#[allow(clippy::too_many_arguments)]
pub fn integrate<S: HybridSystem>(
    sys: &mut S,
    x: &mut [f64],
    t0_s: f64,
    t_end_s: f64,
    sample_step_s: f64,
    breakpoints_s: &[f64],
    method: &Method,
    mut observe: impl FnMut(f64, &[f64], &S),
) -> Result<Stats, OdeError> {
    assert_eq!(
        x.len(),
        sys.dim(),
        "state vector length {} differs from the system dimension {}",
        x.len(),
        sys.dim()
    );
    finite("t0_s", t0_s)?;
    finite("t_end_s", t_end_s)?;
    if t_end_s < t0_s {
        return Err(OdeError::BadSetting {
            name: "t_end_s",
            value: t_end_s,
            expected: "t_end_s >= t0_s",
        });
    }
    positive("sample_step_s", sample_step_s)?;
    for &b in breakpoints_s {
        finite("breakpoints_s", b)?;
    }
    method.validate()?;
    let run = Run::new(t0_s, t_end_s, sample_step_s, breakpoints_s);
    match *method {
        Method::Rk4 { step_s } => run.go(sys, x, &mut rk4::Rk4::new(step_s, x.len()), &mut observe),
        Method::DormandPrince {
            rtol,
            atol,
            max_step_s,
        } => run.go(
            sys,
            x,
            &mut dopri::DormandPrince::new(rtol, atol, max_step_s, x.len()),
            &mut observe,
        ),
        Method::TrBdf2 {
            rtol,
            atol,
            max_step_s,
        } => run.go(
            sys,
            x,
            &mut trbdf2::TrBdf2::new(rtol, atol, max_step_s, x.len()),
            &mut observe,
        ),
    }
}

/// One stepping method as the driver sees it. `attempt` may reject (and shrink its own step);
/// `trial` is one step of exactly the given size without error control, used to locate events
/// on real steps.
trait Stepper<S: HybridSystem> {
    /// Step size for the next attempt from (t, x) towards a target `remaining` seconds away, and
    /// whether that step lands exactly on the target.
    fn choose_step(
        &mut self,
        sys: &S,
        t: f64,
        x: &[f64],
        remaining: f64,
        stats: &mut Stats,
    ) -> (f64, bool);

    /// Try a step of size `h`; `Ok(true)` with `x_new` filled when accepted.
    fn attempt(
        &mut self,
        sys: &S,
        t: f64,
        x: &[f64],
        h: f64,
        x_new: &mut [f64],
        stats: &mut Stats,
    ) -> Result<bool, OdeError>;

    /// One step of exactly `h` from (t, x), no error control.
    fn trial(
        &mut self,
        sys: &S,
        t: f64,
        x: &[f64],
        h: f64,
        x_new: &mut [f64],
        stats: &mut Stats,
    ) -> Result<(), OdeError>;

    /// The last attempted step was accepted; `cut` when event location moved its end point.
    fn accepted(&mut self, cut: bool);

    /// The right-hand side changed discontinuously (guard event, breakpoint): drop caches.
    fn discontinuity(&mut self);
}

/// The fixed schedule of one run: samples and breakpoints.
struct Run {
    t0: f64,
    t_end: f64,
    sample_step: f64,
    breakpoints: Vec<f64>,
    tol_t: f64,
}

impl Run {
    fn new(t0: f64, t_end: f64, sample_step: f64, breakpoints: &[f64]) -> Self {
        let tol_t = EVENT_TIME_TOL_REL * t0.abs().max(t_end.abs()).max(1.0);
        let mut bps: Vec<f64> = breakpoints
            .iter()
            .copied()
            .filter(|&b| b > t0 && b <= t_end)
            .collect();
        bps.sort_by(f64::total_cmp);
        bps.dedup_by(|later, earlier| *later - *earlier <= tol_t);
        // A breakpoint within the tolerance of the end is the end (no sliver step after it).
        if let Some(last) = bps.last_mut() {
            if t_end - *last <= tol_t {
                *last = t_end;
            }
        }
        Run {
            t0,
            t_end,
            sample_step,
            breakpoints: bps,
            tol_t,
        }
    }

    /// Time of sample `k` (k ≥ 1), clamped to t_end and snapped to a nearby breakpoint.
    fn sample_time(&self, k: u64) -> f64 {
        let t = self.t0 + k as f64 * self.sample_step;
        if t >= self.t_end - self.tol_t {
            return self.t_end;
        }
        let i = self.breakpoints.partition_point(|&b| b < t);
        for j in [i.wrapping_sub(1), i] {
            if let Some(&b) = self.breakpoints.get(j) {
                if (b - t).abs() <= self.tol_t {
                    return b;
                }
            }
        }
        t
    }

    fn go<S: HybridSystem, M: Stepper<S>>(
        &self,
        sys: &mut S,
        x: &mut [f64],
        stepper: &mut M,
        observe: &mut impl FnMut(f64, &[f64], &S),
    ) -> Result<Stats, OdeError> {
        let n = x.len();
        let ng = sys.guard_count();
        let mut stats = Stats::default();
        let mut t = self.t0;
        sys.settle_modes(t, x);
        check_finite(t, x)?;
        observe(t, x, sys);
        if self.t_end <= self.t0 {
            return Ok(stats);
        }
        let mut sample_k: u64 = 1;
        let mut next_sample = self.sample_time(sample_k);
        let mut bp_index = 0;
        let mut x_new = vec![0.0; n];
        let mut g_start = vec![0.0; ng];
        let mut g_new = vec![0.0; ng];
        sys.guards(t, x, &mut g_start);
        let mut locator = Locator::new(n, ng);
        let mut chatter = Chatter {
            last_t: f64::NEG_INFINITY,
            count: 0,
            window: CHATTER_WINDOW_TOLS * self.tol_t,
        };
        let mut fired: Vec<usize> = Vec::with_capacity(ng);
        while t < self.t_end {
            let next_bp = self
                .breakpoints
                .get(bp_index)
                .copied()
                .unwrap_or(f64::INFINITY);
            let target = next_bp.min(next_sample);
            let (h, lands) = stepper.choose_step(sys, t, x, target - t, &mut stats);
            let t_try = if lands { target } else { t + h };
            if !stepper.attempt(sys, t, x, t_try - t, &mut x_new, &mut stats)? {
                stats.rejected_steps += 1;
                continue;
            }
            check_finite(t_try, &x_new)?;
            let mut t_next = t_try;
            fired.clear();
            if ng > 0 {
                sys.guards(t_try, &x_new, &mut g_new);
                if crossed(&g_start, &g_new) {
                    t_next = locator.locate(
                        sys, stepper, t, x, &g_start, t_try, &mut x_new, &mut g_new, self.tol_t,
                        &mut stats, &mut fired,
                    )?;
                }
            }
            // After event location the stepper's stage caches belong to trial steps.
            stepper.accepted(!fired.is_empty());
            stats.steps += 1;
            t = t_next;
            x.copy_from_slice(&x_new);
            let mut changed = false;
            for (i, &k) in fired.iter().enumerate() {
                if i > 0 {
                    // A simultaneous crossing fires only if the previous transitions left it
                    // on the firing side.
                    sys.guards(t, x, &mut g_new);
                    if g_new[k] < 0.0 {
                        continue;
                    }
                }
                sys.on_guard(t, x, k);
                stats.guard_events += 1;
                changed = true;
                chatter.record(t, k)?;
                check_finite(t, x)?;
            }
            if bp_index < self.breakpoints.len() && t >= self.breakpoints[bp_index] {
                sys.on_breakpoint(t, x);
                sys.settle_modes(t, x);
                stats.breakpoints += 1;
                bp_index += 1;
                changed = true;
                check_finite(t, x)?;
            }
            if t >= next_sample {
                observe(t, x, sys);
                sample_k += 1;
                next_sample = self.sample_time(sample_k);
            }
            if changed {
                stepper.discontinuity();
                sys.guards(t, x, &mut g_start);
            } else {
                g_start.copy_from_slice(&g_new);
            }
        }
        Ok(stats)
    }
}

/// A guard that was negative at the step start and is ≥ 0 at its end.
fn crossed(g_start: &[f64], g_end: &[f64]) -> bool {
    g_start
        .iter()
        .zip(g_end)
        .any(|(&a, &b)| a < 0.0 && b >= 0.0)
}

fn check_finite(t_s: f64, x: &[f64]) -> Result<(), OdeError> {
    if x.iter().all(|v| v.is_finite()) {
        Ok(())
    } else {
        Err(OdeError::NonFinite { t_s })
    }
}

struct Chatter {
    last_t: f64,
    count: usize,
    window: f64,
}

impl Chatter {
    fn record(&mut self, t: f64, guard: usize) -> Result<(), OdeError> {
        if t - self.last_t <= self.window {
            self.count += 1;
        } else {
            self.count = 1;
        }
        self.last_t = t;
        if self.count > MAX_CHATTER_EVENTS {
            return Err(OdeError::Chattering {
                t_s: t,
                guard,
                count: self.count,
            });
        }
        Ok(())
    }
}

/// Locates the earliest guard crossing inside an accepted step by the Illinois variant of
/// regula falsi (Dowell & Jarratt, BIT 11, 1971) on real steps of the method from the step start.
struct Locator {
    x_c: Vec<f64>,
    g_a: Vec<f64>,
    g_c: Vec<f64>,
}

impl Locator {
    fn new(n: usize, ng: usize) -> Self {
        Locator {
            x_c: vec![0.0; n],
            g_a: vec![0.0; ng],
            g_c: vec![0.0; ng],
        }
    }

    /// On entry (t_b, x_b, g_b) is the accepted step end where some armed guard is ≥ 0. On exit
    /// they hold the located event point (right end of a bracket narrower than `tol_t`), and
    /// `fired` lists the guards that crossed, earliest estimated crossing first. Returns t_b.
    #[allow(clippy::too_many_arguments)]
    fn locate<S: HybridSystem, M: Stepper<S>>(
        &mut self,
        sys: &S,
        stepper: &mut M,
        t: f64,
        x: &[f64],
        g_start: &[f64],
        t_end_step: f64,
        x_b: &mut [f64],
        g_b: &mut [f64],
        tol_t: f64,
        stats: &mut Stats,
        fired: &mut Vec<usize>,
    ) -> Result<f64, OdeError> {
        const BISECT_AFTER: usize = 60;
        const MAX_ITERATIONS: usize = 200;
        let armed = |j: usize| g_start[j] < 0.0;
        let mut a = t;
        let mut b = t_end_step;
        self.g_a.copy_from_slice(g_start);
        // Illinois weights on the retained end's guard values.
        let (mut w_a, mut w_b) = (1.0, 1.0);
        let mut last_moved_a: Option<bool> = None;
        let mut iteration = 0;
        while b - a > tol_t && iteration < MAX_ITERATIONS {
            iteration += 1;
            let mut c = b;
            if iteration > BISECT_AFTER {
                c = 0.5 * (a + b);
            } else {
                for (j, (&g_a, &g_b)) in self.g_a.iter().zip(g_b.iter()).enumerate() {
                    if armed(j) && g_b >= 0.0 {
                        let ga = w_a * g_a;
                        let gb = w_b * g_b;
                        // ga < 0 ≤ gb, so the secant root lies in [a, b]
                        c = c.min(b - (b - a) * gb / (gb - ga));
                    }
                }
            }
            // Keep the trial point strictly inside so the bracket always shrinks.
            let margin = 0.5 * tol_t;
            c = c.clamp(a + margin, b - margin);
            stepper.trial(sys, t, x, c - t, &mut self.x_c, stats)?;
            check_finite(c, &self.x_c)?;
            sys.guards(c, &self.x_c, &mut self.g_c);
            let fired_at_c = (0..g_b.len()).any(|j| armed(j) && self.g_c[j] >= 0.0);
            if fired_at_c {
                b = c;
                x_b.copy_from_slice(&self.x_c);
                g_b.copy_from_slice(&self.g_c);
                w_b = 1.0;
                if last_moved_a == Some(false) {
                    w_a *= 0.5;
                }
                last_moved_a = Some(false);
            } else {
                a = c;
                self.g_a.copy_from_slice(&self.g_c);
                w_a = 1.0;
                if last_moved_a == Some(true) {
                    w_b *= 0.5;
                }
                last_moved_a = Some(true);
            }
        }
        fired.clear();
        fired.extend((0..g_b.len()).filter(|&j| armed(j) && g_b[j] >= 0.0));
        // Earliest estimated crossing (fraction of the final bracket) first.
        let fraction = |j: usize| -self.g_a[j] / (g_b[j] - self.g_a[j]);
        fired.sort_by(|&i, &j| fraction(i).total_cmp(&fraction(j)).then(i.cmp(&j)));
        Ok(b)
    }
}

/// Weighted RMS norm of `v` with weights atol + rtol·max(|x|, |y|) (Hairer, Nørsett & Wanner,
/// Solving ODEs I, §II.4, eq. 4.11).
fn weighted_rms(v: &[f64], x: &[f64], y: &[f64], rtol: f64, atol: f64) -> f64 {
    let n = v.len().max(1);
    let sum: f64 = v
        .iter()
        .zip(x.iter().zip(y))
        .map(|(&vi, (&xi, &yi))| {
            let s = atol + rtol * xi.abs().max(yi.abs());
            (vi / s) * (vi / s)
        })
        .sum();
    (sum / n as f64).sqrt()
}

/// Smallest step the error controllers may take at time `t` before giving up.
fn min_step(t: f64) -> f64 {
    16.0 * f64::EPSILON * t.abs().max(1e-3)
}

/// Initial step of an adaptive method of order `order` (Hairer, Nørsett & Wanner, Solving ODEs
/// I, §II.4, "Starting step size", p. 169). `f0` holds f(t, x).
#[allow(clippy::too_many_arguments)]
fn initial_step<S: HybridSystem>(
    sys: &S,
    t: f64,
    x: &[f64],
    f0: &[f64],
    order: i32,
    rtol: f64,
    atol: f64,
    max_step: f64,
    stats: &mut Stats,
) -> f64 {
    let d0 = weighted_rms(x, x, x, rtol, atol);
    let d1 = weighted_rms(f0, x, x, rtol, atol);
    let mut h0 = if d0 < 1e-5 || d1 < 1e-5 {
        1e-6
    } else {
        0.01 * d0 / d1
    };
    h0 = h0.min(max_step);
    let x1: Vec<f64> = x.iter().zip(f0).map(|(&xi, &fi)| xi + h0 * fi).collect();
    let mut f1 = vec![0.0; x.len()];
    sys.derivatives(t + h0, &x1, &mut f1);
    stats.derivative_evaluations += 1;
    let diff: Vec<f64> = f1.iter().zip(f0).map(|(a, b)| a - b).collect();
    let d2 = weighted_rms(&diff, x, x, rtol, atol) / h0;
    let h1 = if d1.max(d2) <= 1e-15 || !d2.is_finite() {
        (h0 * 1e-3).max(1e-6)
    } else {
        (0.01 / d1.max(d2)).powf(1.0 / f64::from(order + 1))
    };
    (100.0 * h0).min(h1).min(max_step)
}

mod dopri;
mod rk4;
#[cfg(test)]
mod tests;
mod trbdf2;

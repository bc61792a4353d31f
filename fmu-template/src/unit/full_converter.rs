//! Detailed RMS-level model of a full-converter generator (a wind turbine or PV plant behind a
//! grid-side voltage-source converter), in the network frame (see the parent module for units).
//!
//! Structure:
//! - grid-side L filter (R, L) with its current dynamics in the network frame:
//!   (L/ω_b)·di/dt = v_c − v_t − R·i − jL·i;
//! - synchronous-reference-frame PLL, PI on the q-axis voltage; its angle is the control frame;
//! - inner dq current PI loops with decoupling and terminal-voltage feed-forward, tuned by
//!   internal model control, k_p = α·L/ω_b, k_i = α·R (Harnefors & Nee, IEEE Trans. Ind. Appl.
//!   34(1), 1998), so the closed loop is first order with bandwidth α;
//! - DC link as capacitor energy, w = v_dc²: H_c·dw/dt = p_source − p_conv − p_chopper; a DC
//!   voltage PI (on w) sets the active-current reference; a chopper with hysteresis; the source
//!   (turbine or array) behind a first-order lag;
//! - reactive power control (PI on filtered Q, optional voltage droop) sets the reactive current;
//! - fault ride-through: below a dip threshold, reactive current i_r = i_r,pre + K·ΔU (optionally
//!   minus the dead band), current limit with reactive priority I_p,max = sqrt(I_max² − I_r²),
//!   optional PLL freeze, and an active-current recovery ramp after the dip;
//! - first-order measurement filters on U, P, Q.
//!
//! Every switch (dip detection, chopper, limiters, end of recovery) is a guard of the hybrid
//! system, so the integrator hits it exactly.

use super::{check, GridEquivalent, GridSchedule, OperatingPoint, UnitError, C64};
use crate::ode::HybridSystem;
use serde::{Deserialize, Serialize};
use std::f64::consts::PI;

/// Parameters of the full-converter model (per unit on the unit rating; times in seconds).
/// Defaults are typical values (common practice, from memory) within the usual ranges.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(default, deny_unknown_fields)]
pub struct FullConverterParams {
    /// Nominal frequency (Hz).
    pub f_nom_hz: f64,
    /// Filter resistance (pu). Common practice: ~0.005–0.02 pu.
    pub filter_r: f64,
    /// Filter inductance (pu). Common practice: 0.1–0.15 pu.
    pub filter_l: f64,
    /// Current-loop closed-loop bandwidth α (Hz): a few hundred Hz (common practice).
    pub current_bandwidth_hz: f64,
    /// PLL proportional gain (pu frequency per pu q-voltage). Default: ω_n = 2π·15 Hz, ζ = 0.7 at
    /// 1 pu (PLL bandwidth 10–30 Hz is common practice).
    pub pll_kp: f64,
    /// PLL integral gain (pu frequency per pu q-voltage per second).
    pub pll_ki: f64,
    /// Hold the PLL frequency during a dip (the PI input is zeroed).
    pub pll_freeze_in_dip: bool,
    /// DC-link energy constant: stored energy at rated DC voltage / S_base (s). From memory:
    /// a few milliseconds.
    pub dc_energy_s: f64,
    /// DC-voltage PI proportional gain (pu active current per pu of v_dc²).
    pub dc_kp: f64,
    /// DC-voltage PI integral gain (per second).
    pub dc_ki: f64,
    /// Chopper switches on above this DC voltage (pu).
    pub chopper_on: f64,
    /// Chopper switches off below this DC voltage (pu).
    pub chopper_off: f64,
    /// Chopper conductance (pu power per pu v_dc²).
    pub chopper_conductance: f64,
    /// Source (turbine or array) power lag (s).
    pub source_lag_s: f64,
    /// Reactive power PI proportional gain (pu reactive current per pu Q).
    pub q_kp: f64,
    /// Reactive power PI integral gain (per second).
    pub q_ki: f64,
    /// Voltage droop added to the Q setpoint (pu Q per pu U); 0 = pure Q control.
    pub voltage_droop: f64,
    /// Voltage measurement filter (s).
    pub u_filter_s: f64,
    /// Active power measurement filter (s).
    pub p_filter_s: f64,
    /// Reactive power measurement filter (s).
    pub q_filter_s: f64,
    /// Dip detection threshold on the terminal voltage (pu). Common practice 0.9.
    pub dip_threshold: f64,
    /// Hysteresis of dip detection: the dip ends above threshold + hysteresis (pu).
    pub dip_hysteresis: f64,
    /// Additional reactive current per pu voltage drop during a dip (K factor). Common practice 2.
    pub frt_k: f64,
    /// Dead band of the voltage drop (pu). Common practice 0.1.
    pub frt_dead_band: f64,
    /// Subtract the dead band from the voltage drop (i_r = K·(ΔU − db)) instead of
    /// i_r = K·ΔU once beyond it.
    pub frt_subtract_dead_band: bool,
    /// Converter current limit (pu). Common practice 1.1–1.3.
    pub i_max: f64,
    /// Active-current recovery rate after a dip (pu/s). Common practice 1–20 pu/s.
    pub recovery_rate_pu_per_s: f64,
}

impl Default for FullConverterParams {
    fn default() -> Self {
        let f_nom_hz = 50.0;
        let omega_b = 2.0 * PI * f_nom_hz;
        let (wn, zeta) = (2.0 * PI * 15.0, 0.7);
        Self {
            f_nom_hz,
            filter_r: 0.01,
            filter_l: 0.12,
            current_bandwidth_hz: 300.0,
            pll_kp: 2.0 * zeta * wn / omega_b,
            pll_ki: wn * wn / omega_b,
            pll_freeze_in_dip: false,
            dc_energy_s: 0.005,
            dc_kp: 0.3,
            dc_ki: 5.0,
            chopper_on: 1.1,
            chopper_off: 1.05,
            chopper_conductance: 1.0,
            source_lag_s: 0.1,
            q_kp: 0.1,
            q_ki: 10.0,
            voltage_droop: 0.0,
            u_filter_s: 0.01,
            p_filter_s: 0.02,
            q_filter_s: 0.02,
            dip_threshold: 0.9,
            dip_hysteresis: 0.02,
            frt_k: 2.0,
            frt_dead_band: 0.1,
            frt_subtract_dead_band: true,
            i_max: 1.1,
            recovery_rate_pu_per_s: 5.0,
        }
    }
}

impl FullConverterParams {
    pub fn omega_b(&self) -> f64 {
        2.0 * PI * self.f_nom_hz
    }

    /// Current-loop bandwidth α in rad/s.
    pub fn alpha(&self) -> f64 {
        2.0 * PI * self.current_bandwidth_hz
    }

    /// Internal-model-control current PI gains (k_p, k_i) = (α·L/ω_b, α·R).
    pub fn current_gains(&self) -> (f64, f64) {
        (
            self.alpha() * self.filter_l / self.omega_b(),
            self.alpha() * self.filter_r,
        )
    }

    /// Natural frequency (rad/s) and damping of the linearised PLL at terminal voltage `u`:
    /// s² + ω_b·k_p·U·s + ω_b·k_i·U = 0.
    pub fn pll_natural_frequency_and_damping(&self, u: f64) -> (f64, f64) {
        let wn = (self.omega_b() * self.pll_ki * u).sqrt();
        (wn, self.omega_b() * self.pll_kp * u / (2.0 * wn))
    }

    pub fn validate(&self) -> Result<(), UnitError> {
        let pos = |f: &str, v: f64| check(f, v, v > 0.0, "a value > 0");
        let nonneg = |f: &str, v: f64| check(f, v, v >= 0.0, "a value >= 0");
        pos("unit.f_nom_hz", self.f_nom_hz)?;
        pos("unit.filter_r", self.filter_r)?;
        pos("unit.filter_l", self.filter_l)?;
        pos("unit.current_bandwidth_hz", self.current_bandwidth_hz)?;
        pos("unit.pll_kp", self.pll_kp)?;
        pos("unit.pll_ki", self.pll_ki)?;
        pos("unit.dc_energy_s", self.dc_energy_s)?;
        pos("unit.dc_kp", self.dc_kp)?;
        nonneg("unit.dc_ki", self.dc_ki)?;
        pos("unit.chopper_off", self.chopper_off)?;
        check(
            "unit.chopper_on",
            self.chopper_on,
            self.chopper_on > self.chopper_off,
            "a value above unit.chopper_off",
        )?;
        check(
            "unit.chopper_off",
            self.chopper_off,
            self.chopper_off > 1.0,
            "a value above the rated DC voltage 1 pu",
        )?;
        nonneg("unit.chopper_conductance", self.chopper_conductance)?;
        pos("unit.source_lag_s", self.source_lag_s)?;
        nonneg("unit.q_kp", self.q_kp)?;
        nonneg("unit.q_ki", self.q_ki)?;
        nonneg("unit.voltage_droop", self.voltage_droop)?;
        pos("unit.u_filter_s", self.u_filter_s)?;
        pos("unit.p_filter_s", self.p_filter_s)?;
        pos("unit.q_filter_s", self.q_filter_s)?;
        check(
            "unit.dip_threshold",
            self.dip_threshold,
            self.dip_threshold > 0.0 && self.dip_threshold < 1.0,
            "a threshold in (0, 1) pu",
        )?;
        nonneg("unit.dip_hysteresis", self.dip_hysteresis)?;
        nonneg("unit.frt_k", self.frt_k)?;
        nonneg("unit.frt_dead_band", self.frt_dead_band)?;
        pos("unit.i_max", self.i_max)?;
        pos("unit.recovery_rate_pu_per_s", self.recovery_rate_pu_per_s)?;
        Ok(())
    }
}

/// State indices.
pub mod ix {
    pub const I_RE: usize = 0;
    pub const I_IM: usize = 1;
    pub const PLL_ANGLE: usize = 2;
    pub const PLL_INT: usize = 3;
    pub const CC_INT_D: usize = 4;
    pub const CC_INT_Q: usize = 5;
    pub const DC_W: usize = 6;
    pub const DC_INT: usize = 7;
    pub const SOURCE_P: usize = 8;
    pub const U_MEAS: usize = 9;
    pub const P_MEAS: usize = 10;
    pub const Q_MEAS: usize = 11;
    pub const Q_INT: usize = 12;
    pub const RECOVERY_CAP: usize = 13;
    pub const COUNT: usize = 14;
    pub const NAMES: [&str; COUNT] = [
        "i_re",
        "i_im",
        "pll_angle",
        "pll_integrator",
        "current_integrator_d",
        "current_integrator_q",
        "dc_energy_w",
        "dc_integrator",
        "source_power",
        "u_measured",
        "p_measured",
        "q_measured",
        "q_integrator",
        "recovery_cap",
    ];
}

/// Guard indices.
mod guard {
    pub const DIP: usize = 0;
    pub const CHOPPER: usize = 1;
    pub const ACTIVE_LIMIT: usize = 2;
    pub const REACTIVE_LIMIT: usize = 3;
    pub const RECOVERY_END: usize = 4;
    pub const COUNT: usize = 5;
}

/// State of a symmetric limiter |y| ≤ cap, kept as a mode so the integrator hits its corners.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
pub enum Clamp {
    Free,
    High,
    Low,
}

impl Clamp {
    fn apply(self, unlimited: f64, cap: f64) -> f64 {
        match self {
            Clamp::Free => unlimited,
            Clamp::High => cap,
            Clamp::Low => -cap,
        }
    }
    /// Negative while the mode holds.
    fn guard(self, unlimited: f64, cap: f64) -> f64 {
        match self {
            Clamp::Free => unlimited.abs() - cap,
            Clamp::High => cap - unlimited,
            Clamp::Low => unlimited + cap,
        }
    }
    fn toggled(self, unlimited: f64) -> Self {
        match self {
            Clamp::Free if unlimited >= 0.0 => Clamp::High,
            Clamp::Free => Clamp::Low,
            _ => Clamp::Free,
        }
    }
    fn settle(unlimited: f64, cap: f64) -> Self {
        if unlimited > cap {
            Clamp::High
        } else if unlimited < -cap {
            Clamp::Low
        } else {
            Clamp::Free
        }
    }
}

/// Discrete modes of the model.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct Modes {
    pub in_dip: bool,
    pub chopper_on: bool,
    pub recovering: bool,
    pub active_limit: Clamp,
    pub reactive_limit: Clamp,
    /// Reactive current and filtered voltage frozen at dip entry.
    pub reactive_current_pre_dip: f64,
    pub voltage_pre_dip: f64,
    /// Index of the grid phase in force.
    pub grid_phase: usize,
    /// A test reference step of the current controller is in force.
    pub reference_step_on: bool,
}

/// Setpoints fixed by the initialisation (per unit).
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct Setpoints {
    pub q_ref: f64,
    pub u_ref: f64,
    pub source_power: f64,
}

/// Everything computed from the state at one instant.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Signals {
    pub terminal_voltage: C64,
    pub current: C64,
    pub converter_voltage: C64,
    pub p: f64,
    pub q: f64,
    pub grid_frequency_pu: f64,
    pub pll_frequency_pu: f64,
    /// Voltage and current in the PLL frame.
    pub v_dq: C64,
    pub i_dq: C64,
    pub active_current_ref: f64,
    pub reactive_current_ref: f64,
    pub active_current_unlimited: f64,
    pub reactive_current_unlimited: f64,
    pub active_cap: f64,
    pub reactive_cap: f64,
    pub dc_voltage: f64,
    pub converter_power: f64,
    pub chopper_power: f64,
    pub source_power: f64,
}

/// The detailed full-converter unit connected to its grid equivalent: a [`HybridSystem`].
#[derive(Debug, Clone)]
pub struct FullConverter {
    pub params: FullConverterParams,
    pub grid: GridSchedule,
    pub setpoints: Setpoints,
    pub modes: Modes,
    /// A step of the current controller's dq reference at a time, overriding the outer loops
    /// (for checking the inner loop; studies leave it empty).
    pub current_ref_step: Option<(f64, C64)>,
    /// The terminal voltage held by a co-simulation host; `None` when the unit sees its grid
    /// equivalent (`grid`).
    pub terminal_input: Option<TerminalInput>,
}

/// A terminal voltage phasor (network frame, pu) and grid frequency (pu) set by a host and held
/// until it sets the next one.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct TerminalInput {
    pub v_re: f64,
    pub v_im: f64,
    pub frequency_pu: f64,
}

impl TerminalInput {
    pub fn voltage(&self) -> C64 {
        C64::new(self.v_re, self.v_im)
    }
}

impl FullConverter {
    /// Build the unit at a true steady state of `op` behind `grid`, which will undergo
    /// `disturbance`. Returns the model and its initial state.
    pub fn initialise(
        params: FullConverterParams,
        op: &OperatingPoint,
        grid: &GridEquivalent,
        disturbance: &super::Disturbance,
    ) -> Result<(Self, Vec<f64>), UnitError> {
        params.validate()?;
        grid.validate()?;
        check(
            "operating_point.p",
            op.p,
            op.p.abs() <= params.i_max * 2.0,
            "|P| within the converter's reach",
        )?;
        check(
            "operating_point.q",
            op.q,
            op.q.abs() <= params.i_max * 2.0,
            "|Q| within the converter's reach",
        )?;
        let z = grid.impedance();
        let u = match op.u {
            Some(u) => {
                check(
                    "operating_point.u",
                    u,
                    u > 0.2 && u < 1.5,
                    "a terminal voltage in (0.2, 1.5) pu",
                )?;
                u
            }
            None => {
                check(
                    "operating_point.grid_voltage",
                    op.grid_voltage,
                    op.grid_voltage > 0.2 && op.grid_voltage < 1.5,
                    "a grid source voltage in (0.2, 1.5) pu",
                )?;
                terminal_voltage_checked(op, z)?
            }
        };
        // phasors with the terminal voltage on the real axis, then rotated so that the grid
        // source has angle 0
        check_injection(&params, op.p, op.q, u)?;
        let v0 = C64::new(u, 0.0);
        let i0 = C64::new(op.p, -op.q) / u;
        let e = v0 - z * i0;
        let rot = C64::from_polar(1.0, -e.arg());
        let (v, i) = (v0 * rot, i0 * rot);
        let schedule = GridSchedule::new(e.norm(), z, disturbance)?;
        Self::at_steady_state(params, schedule, None, v, i, op.p, op.q)
    }

    /// Build the unit at a true steady state with its terminal voltage given by the host (a
    /// co-simulation master) instead of a grid equivalent: `voltage` is the terminal voltage
    /// phasor in the network frame (any angle), `frequency_pu` the grid frequency (reported
    /// only: the PLL takes the frequency from the phasor's angle), (`p`, `q`) the injection.
    /// The terminal voltage then stays at the value set by [`Self::set_terminal_input`] until
    /// the next call (held over a communication step).
    pub fn initialise_at_terminal(
        params: FullConverterParams,
        voltage: C64,
        frequency_pu: f64,
        p: f64,
        q: f64,
    ) -> Result<(Self, Vec<f64>), UnitError> {
        params.validate()?;
        check(
            "terminal_voltage",
            voltage.norm(),
            voltage.norm() > 0.2
                && voltage.norm() < 1.5
                && voltage.re.is_finite()
                && voltage.im.is_finite(),
            "a terminal voltage magnitude in (0.2, 1.5) pu",
        )?;
        check(
            "grid_frequency_pu",
            frequency_pu,
            frequency_pu > 0.5 && frequency_pu < 1.5,
            "a grid frequency in (0.5, 1.5) pu",
        )?;
        check_injection(&params, p, q, voltage.norm())?;
        // S = v·conj(i)  ⇒  i = conj(S / v)
        let i = (C64::new(p, q) / voltage).conj();
        let schedule = GridSchedule::new(
            voltage.norm(),
            C64::new(0.0, 0.0),
            &super::Disturbance::None,
        )?;
        let held = TerminalInput {
            v_re: voltage.re,
            v_im: voltage.im,
            frequency_pu,
        };
        Self::at_steady_state(params, schedule, Some(held), voltage, i, p, q)
    }

    /// Replace the held terminal voltage (host-driven units only).
    ///
    /// # Panics
    /// If the unit was built by [`Self::initialise`] (its terminal voltage follows its grid
    /// equivalent; a caller bug).
    pub fn set_terminal_input(&mut self, input: TerminalInput) {
        assert!(
            self.terminal_input.is_some(),
            "set_terminal_input on a unit connected to a grid equivalent"
        );
        self.terminal_input = Some(input);
    }

    /// The steady state at terminal voltage `v` and current `i` (network frame).
    fn at_steady_state(
        params: FullConverterParams,
        schedule: GridSchedule,
        terminal_input: Option<TerminalInput>,
        v: C64,
        i: C64,
        p_ref: f64,
        q_ref: f64,
    ) -> Result<(Self, Vec<f64>), UnitError> {
        let u = v.norm();
        let theta = v.arg();
        let (r, l) = (params.filter_r, params.filter_l);
        let vc = v + C64::new(r, l) * i;
        let p_conv = (vc * i.conj()).re;
        // PLL-frame current: active along v, reactive current i_r = −i_q (positive = capacitive)
        let i_dq = i * C64::from_polar(1.0, -theta);
        let mut x = vec![0.0; ix::COUNT];
        x[ix::I_RE] = i.re;
        x[ix::I_IM] = i.im;
        x[ix::PLL_ANGLE] = theta;
        x[ix::PLL_INT] = 0.0;
        // in steady state the current PI output equals R·i (the rest is decoupling/feed-forward)
        x[ix::CC_INT_D] = r * i_dq.re;
        x[ix::CC_INT_Q] = r * i_dq.im;
        x[ix::DC_W] = 1.0;
        x[ix::DC_INT] = i_dq.re;
        x[ix::SOURCE_P] = p_conv;
        x[ix::U_MEAS] = u;
        x[ix::P_MEAS] = p_ref;
        x[ix::Q_MEAS] = q_ref;
        x[ix::Q_INT] = -i_dq.im;
        x[ix::RECOVERY_CAP] = params.i_max;
        let modes = Modes {
            in_dip: false,
            chopper_on: false,
            recovering: false,
            active_limit: Clamp::Free,
            reactive_limit: Clamp::Free,
            reactive_current_pre_dip: 0.0,
            voltage_pre_dip: u,
            grid_phase: 0,
            reference_step_on: false,
        };
        let unit = Self {
            setpoints: Setpoints {
                q_ref,
                u_ref: u,
                source_power: p_conv,
            },
            params,
            grid: schedule,
            modes,
            current_ref_step: None,
            terminal_input,
        };
        let s = unit.signals(0.0, &x);
        if s.reactive_current_unlimited.abs() > s.reactive_cap + 1e-12 {
            return Err(UnitError::NoSteadyState {
                reason: format!(
                    "reactive current {:.4} pu exceeds what the current limit leaves beside the active current ({:.4} pu)",
                    s.reactive_current_unlimited, s.reactive_cap
                ),
            });
        }
        Ok((unit, x))
    }

    /// Breakpoints of the grid schedule (and of a test reference step, if any).
    pub fn breakpoints_s(&self) -> Vec<f64> {
        let mut b = self.grid.breakpoints_s();
        if let Some((t, _)) = self.current_ref_step {
            b.push(t);
        }
        b
    }

    fn reference_step_active(&self) -> Option<C64> {
        match self.current_ref_step {
            Some((_, i_ref)) if self.modes.reference_step_on => Some(i_ref),
            _ => None,
        }
    }

    /// All algebraic signals at (t, x) in the current modes.
    pub fn signals(&self, t_s: f64, x: &[f64]) -> Signals {
        let p = &self.params;
        let m = &self.modes;
        let i = C64::new(x[ix::I_RE], x[ix::I_IM]);
        let (v, f_grid) = match self.terminal_input {
            Some(held) => (held.voltage(), held.frequency_pu),
            None => (
                self.grid.terminal_voltage(m.grid_phase, t_s, p.f_nom_hz, i),
                self.grid.source(m.grid_phase, t_s, p.f_nom_hz).1,
            ),
        };
        let theta = x[ix::PLL_ANGLE];
        let to_dq = C64::from_polar(1.0, -theta);
        let v_dq = v * to_dq;
        let i_dq = i * to_dq;
        let pll_input = if m.in_dip && p.pll_freeze_in_dip {
            0.0
        } else {
            v_dq.im
        };
        let pll_frequency_pu = 1.0 + p.pll_kp * pll_input + x[ix::PLL_INT];
        let u_abs = v.norm();

        // reactive current reference
        let reactive_current_unlimited = if m.in_dip {
            let drop = m.voltage_pre_dip - u_abs;
            let extra = if p.frt_subtract_dead_band {
                p.frt_k * (drop - p.frt_dead_band).max(0.0)
            } else if drop > p.frt_dead_band {
                p.frt_k * drop
            } else {
                0.0
            };
            m.reactive_current_pre_dip + extra
        } else {
            let q_target =
                self.setpoints.q_ref + p.voltage_droop * (self.setpoints.u_ref - x[ix::U_MEAS]);
            x[ix::Q_INT] + p.q_kp * (q_target - x[ix::Q_MEAS])
        };
        let active_current_unlimited = p.dc_kp * (x[ix::DC_W] - 1.0) + x[ix::DC_INT];
        let (active_current_ref, reactive_current_ref, active_cap, reactive_cap);
        if m.in_dip {
            // reactive priority
            reactive_cap = p.i_max;
            reactive_current_ref = m
                .reactive_limit
                .apply(reactive_current_unlimited, reactive_cap);
            active_cap = (p.i_max * p.i_max - reactive_current_ref * reactive_current_ref)
                .max(0.0)
                .sqrt();
            active_current_ref = m.active_limit.apply(active_current_unlimited, active_cap);
        } else {
            // active priority, with the recovery ramp after a dip
            active_cap = if m.recovering {
                x[ix::RECOVERY_CAP].clamp(0.0, p.i_max)
            } else {
                p.i_max
            };
            active_current_ref = m.active_limit.apply(active_current_unlimited, active_cap);
            reactive_cap = (p.i_max * p.i_max - active_current_ref * active_current_ref)
                .max(0.0)
                .sqrt();
            reactive_current_ref = m
                .reactive_limit
                .apply(reactive_current_unlimited, reactive_cap);
        }
        let mut i_ref_dq = C64::new(active_current_ref, -reactive_current_ref);
        if let Some(step) = self.reference_step_active() {
            i_ref_dq = step;
        }
        let (kp_i, _) = p.current_gains();
        let err = i_ref_dq - i_dq;
        let u_pi = C64::new(
            kp_i * err.re + x[ix::CC_INT_D],
            kp_i * err.im + x[ix::CC_INT_Q],
        );
        // decoupling jω_pll·L·i and terminal-voltage feed-forward
        let vc_dq = u_pi + v_dq + C64::new(0.0, pll_frequency_pu * p.filter_l) * i_dq;
        let vc = vc_dq * C64::from_polar(1.0, theta);
        let s = v * i.conj();
        let converter_power = (vc * i.conj()).re;
        let w = x[ix::DC_W];
        let chopper_power = if m.chopper_on {
            p.chopper_conductance * w
        } else {
            0.0
        };
        Signals {
            terminal_voltage: v,
            current: i,
            converter_voltage: vc,
            p: s.re,
            q: s.im,
            grid_frequency_pu: f_grid,
            pll_frequency_pu,
            v_dq,
            i_dq,
            active_current_ref,
            reactive_current_ref,
            active_current_unlimited,
            reactive_current_unlimited,
            active_cap,
            reactive_cap,
            dc_voltage: w.max(0.0).sqrt(),
            converter_power,
            chopper_power,
            source_power: x[ix::SOURCE_P],
        }
    }

    fn pll_input(&self, s: &Signals) -> f64 {
        if self.modes.in_dip && self.params.pll_freeze_in_dip {
            0.0
        } else {
            s.v_dq.im
        }
    }
}

/// The injection (p, q) at terminal voltage magnitude `u` must fit the current limit and `u`
/// must lie above the dip band, or the unit has no calm steady state there.
fn check_injection(params: &FullConverterParams, p: f64, q: f64, u: f64) -> Result<(), UnitError> {
    let i_abs = C64::new(p, -q).norm() / u;
    if i_abs > params.i_max {
        return Err(UnitError::NoSteadyState {
            reason: format!(
                "P = {p} pu, Q = {q} pu at U = {u:.4} pu needs {i_abs:.4} pu current, above unit.i_max = {} pu",
                params.i_max
            ),
        });
    }
    if u < params.dip_threshold + params.dip_hysteresis {
        return Err(UnitError::NoSteadyState {
            reason: format!(
                "terminal voltage {u:.4} pu lies in the dip band (threshold {} pu + hysteresis {} pu): \
                 the unit would start in fault ride-through",
                params.dip_threshold, params.dip_hysteresis
            ),
        });
    }
    Ok(())
}

fn terminal_voltage_checked(op: &OperatingPoint, z: C64) -> Result<f64, UnitError> {
    super::terminal_voltage_for(op.p, op.q, z, op.grid_voltage)
}

impl HybridSystem for FullConverter {
    fn dim(&self) -> usize {
        ix::COUNT
    }

    fn derivatives(&self, t_s: f64, x: &[f64], dx: &mut [f64]) {
        let p = &self.params;
        let m = &self.modes;
        let s = self.signals(t_s, x);
        let omega_b = p.omega_b();
        let (_, ki_i) = p.current_gains();

        // filter current in the network frame
        let di = (s.converter_voltage
            - s.terminal_voltage
            - C64::new(p.filter_r, p.filter_l) * s.current)
            * (omega_b / p.filter_l);
        dx[ix::I_RE] = di.re;
        dx[ix::I_IM] = di.im;

        // PLL
        let pll_in = self.pll_input(&s);
        dx[ix::PLL_ANGLE] = omega_b * (s.pll_frequency_pu - 1.0);
        dx[ix::PLL_INT] = p.pll_ki * pll_in;

        // current PI integrators
        let i_ref_dq = match self.reference_step_active() {
            Some(step) => step,
            None => C64::new(s.active_current_ref, -s.reactive_current_ref),
        };
        let err = i_ref_dq - s.i_dq;
        dx[ix::CC_INT_D] = ki_i * err.re;
        dx[ix::CC_INT_Q] = ki_i * err.im;

        // DC link (energy) and its voltage control, frozen while the active current is limited
        dx[ix::DC_W] = (s.source_power - s.converter_power - s.chopper_power) / p.dc_energy_s;
        dx[ix::DC_INT] = if m.active_limit == Clamp::Free {
            p.dc_ki * (x[ix::DC_W] - 1.0)
        } else {
            0.0
        };
        dx[ix::SOURCE_P] = (self.setpoints.source_power - x[ix::SOURCE_P]) / p.source_lag_s;

        // measurements
        dx[ix::U_MEAS] = (s.terminal_voltage.norm() - x[ix::U_MEAS]) / p.u_filter_s;
        dx[ix::P_MEAS] = (s.p - x[ix::P_MEAS]) / p.p_filter_s;
        dx[ix::Q_MEAS] = (s.q - x[ix::Q_MEAS]) / p.q_filter_s;

        // reactive power integrator: frozen in a dip and while limited
        dx[ix::Q_INT] = if !m.in_dip && m.reactive_limit == Clamp::Free {
            let q_target =
                self.setpoints.q_ref + p.voltage_droop * (self.setpoints.u_ref - x[ix::U_MEAS]);
            p.q_ki * (q_target - x[ix::Q_MEAS])
        } else {
            0.0
        };

        dx[ix::RECOVERY_CAP] = if m.recovering && !m.in_dip {
            p.recovery_rate_pu_per_s
        } else {
            0.0
        };
    }

    fn guard_count(&self) -> usize {
        guard::COUNT
    }

    fn guards(&self, t_s: f64, x: &[f64], g: &mut [f64]) {
        let p = &self.params;
        let m = &self.modes;
        let s = self.signals(t_s, x);
        let u = s.terminal_voltage.norm();
        g[guard::DIP] = if m.in_dip {
            u - (p.dip_threshold + p.dip_hysteresis)
        } else {
            p.dip_threshold - u
        };
        let w = x[ix::DC_W];
        g[guard::CHOPPER] = if m.chopper_on {
            p.chopper_off * p.chopper_off - w
        } else {
            w - p.chopper_on * p.chopper_on
        };
        g[guard::ACTIVE_LIMIT] = m
            .active_limit
            .guard(s.active_current_unlimited, s.active_cap);
        g[guard::REACTIVE_LIMIT] = m
            .reactive_limit
            .guard(s.reactive_current_unlimited, s.reactive_cap);
        g[guard::RECOVERY_END] = if m.recovering && !m.in_dip {
            x[ix::RECOVERY_CAP] - p.i_max
        } else {
            -1.0
        };
    }

    fn on_guard(&mut self, t_s: f64, x: &mut [f64], index: usize) {
        let s = self.signals(t_s, x);
        match index {
            guard::DIP => {
                if self.modes.in_dip {
                    self.leave_dip(&s, x);
                } else {
                    self.enter_dip(&s, x);
                }
            }
            guard::CHOPPER => self.modes.chopper_on = !self.modes.chopper_on,
            // a limiter that fired is switched as the guard says, without re-deciding it from
            // signals that sit on the corner within rounding (that would chatter)
            guard::ACTIVE_LIMIT => {
                self.modes.active_limit =
                    self.modes.active_limit.toggled(s.active_current_unlimited)
            }
            guard::REACTIVE_LIMIT => {
                self.modes.reactive_limit = self
                    .modes
                    .reactive_limit
                    .toggled(s.reactive_current_unlimited)
            }
            guard::RECOVERY_END => {
                self.modes.recovering = false;
                x[ix::RECOVERY_CAP] = self.params.i_max;
            }
            _ => {}
        }
        if index == guard::DIP {
            // the limiter priorities change with the dip: decide both limiters afresh
            self.resettle_limits(t_s, x);
        }
    }

    fn on_breakpoint(&mut self, t_s: f64, _x: &mut [f64]) {
        self.modes.grid_phase = self.grid.phase_index_at(t_s);
        if let Some((t_step, _)) = self.current_ref_step {
            self.modes.reference_step_on = t_s >= t_step;
        }
    }

    fn settle_modes(&mut self, t_s: f64, x: &mut [f64]) {
        self.modes.grid_phase = self.grid.phase_index_at(t_s);
        if let Some((t_step, _)) = self.current_ref_step {
            self.modes.reference_step_on = t_s >= t_step;
        }
        // direct consistency: dip first (it changes the limiter priorities), then limiters
        let s = self.signals(t_s, x);
        let u = s.terminal_voltage.norm();
        let p = self.params.clone();
        if !self.modes.in_dip && u < p.dip_threshold {
            self.enter_dip(&s, x);
        } else if self.modes.in_dip && u > p.dip_threshold + p.dip_hysteresis {
            self.leave_dip(&s, x);
        }
        let w = x[ix::DC_W];
        if !self.modes.chopper_on && w > p.chopper_on * p.chopper_on {
            self.modes.chopper_on = true;
        } else if self.modes.chopper_on && w < p.chopper_off * p.chopper_off {
            self.modes.chopper_on = false;
        }
        self.resettle_limits(t_s, x);
    }
}

impl FullConverter {
    fn enter_dip(&mut self, s: &Signals, x: &mut [f64]) {
        self.modes.in_dip = true;
        self.modes.recovering = false;
        self.modes.reactive_current_pre_dip = s.reactive_current_ref;
        self.modes.voltage_pre_dip = x[ix::U_MEAS];
        // the limiters are re-decided under reactive priority
        self.modes.active_limit = Clamp::Free;
        self.modes.reactive_limit = Clamp::Free;
    }

    fn leave_dip(&mut self, s: &Signals, x: &mut [f64]) {
        self.modes.in_dip = false;
        // the active current restarts from where the dip left it and ramps up
        self.modes.recovering = true;
        x[ix::RECOVERY_CAP] = s.active_current_ref.abs();
        // the Q controller resumes from the reactive current it had before the dip
        x[ix::Q_INT] = self.modes.reactive_current_pre_dip
            - self.params.q_kp
                * (self.setpoints.q_ref
                    + self.params.voltage_droop * (self.setpoints.u_ref - x[ix::U_MEAS])
                    - x[ix::Q_MEAS]);
        self.modes.active_limit = Clamp::Free;
        self.modes.reactive_limit = Clamp::Free;
    }

    /// Decide both limiters directly from the signals (a fixed point of at most a few passes,
    /// since each cap depends on the other limited current).
    fn resettle_limits(&mut self, t_s: f64, x: &[f64]) {
        for _ in 0..4 {
            let s = self.signals(t_s, x);
            let a = if self.modes.active_limit == Clamp::Free {
                Clamp::settle(s.active_current_unlimited, s.active_cap)
            } else if self
                .modes
                .active_limit
                .guard(s.active_current_unlimited, s.active_cap)
                > 0.0
            {
                Clamp::Free
            } else {
                self.modes.active_limit
            };
            let r = if self.modes.reactive_limit == Clamp::Free {
                Clamp::settle(s.reactive_current_unlimited, s.reactive_cap)
            } else if self
                .modes
                .reactive_limit
                .guard(s.reactive_current_unlimited, s.reactive_cap)
                > 0.0
            {
                Clamp::Free
            } else {
                self.modes.reactive_limit
            };
            if a == self.modes.active_limit && r == self.modes.reactive_limit {
                return;
            }
            self.modes.active_limit = a;
            self.modes.reactive_limit = r;
        }
    }
}

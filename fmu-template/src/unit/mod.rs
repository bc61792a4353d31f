//! Converter-connected generating units and the grid they see during a fault study.
//!
//! Conventions of this module and its children (stated once):
//! - per unit on the unit's own rating (S_base = rated apparent power, V_base = nominal
//!   line-to-line voltage, ω_b = 2π·f_nom); time in seconds;
//! - phasors are RMS-level complex values in a frame that rotates at nominal frequency (the
//!   "network frame"); angles in radians unless a name says `_deg`;
//! - generator convention: the unit injects current `i` into the grid, S = v·conj(i), positive Q
//!   is capacitive (voltage-raising);
//! - the grid is quasi-static (algebraic), the unit's own filter and controls are dynamic.

pub mod full_converter;

use nalgebra::Complex;
use serde::{Deserialize, Serialize};
use thiserror::Error;

pub type C64 = Complex<f64>;

/// Errors of unit models: bad settings and operating points without a steady state.
#[derive(Debug, Error, Clone, PartialEq)]
pub enum UnitError {
    #[error("`{field}` = {value} is invalid: expected {expected}")]
    BadValue {
        field: String,
        value: f64,
        expected: String,
    },
    #[error("no steady state for this operating point: {reason}")]
    NoSteadyState { reason: String },
}

pub(crate) fn check(field: &str, value: f64, ok: bool, expected: &str) -> Result<(), UnitError> {
    if ok && value.is_finite() {
        Ok(())
    } else {
        Err(UnitError::BadValue {
            field: field.to_string(),
            value,
            expected: expected.to_string(),
        })
    }
}

/// The operating point the unit starts from (per unit on the unit rating).
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct OperatingPoint {
    /// Active power injected at the terminal.
    pub p: f64,
    /// Reactive power injected at the terminal (positive = capacitive).
    pub q: f64,
    /// Terminal voltage magnitude. When absent, it follows from `grid_voltage` and the grid
    /// impedance (the larger power-flow root).
    #[serde(default)]
    pub u: Option<f64>,
    /// Magnitude of the grid equivalent's source before the disturbance (used when `u` is absent).
    #[serde(default = "one")]
    pub grid_voltage: f64,
}

fn one() -> f64 {
    1.0
}

impl OperatingPoint {
    pub fn new(p: f64, q: f64) -> Self {
        Self {
            p,
            q,
            u: None,
            grid_voltage: 1.0,
        }
    }
}

/// Thevenin equivalent of the grid at the unit's terminal: a source behind an impedance set by
/// the short-circuit ratio (S_sc / S_rated) and the X/R ratio.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct GridEquivalent {
    /// Short-circuit ratio; `f64::INFINITY` (or any value above 1e9) is an ideal source.
    pub scr: f64,
    pub x_over_r: f64,
}

impl GridEquivalent {
    pub fn validate(&self) -> Result<(), UnitError> {
        check(
            "grid.scr",
            self.scr.min(1e12),
            self.scr > 0.0,
            "a short-circuit ratio > 0",
        )?;
        check(
            "grid.x_over_r",
            self.x_over_r,
            self.x_over_r > 0.0,
            "an X/R ratio > 0",
        )
    }

    /// Z_th = (1/SCR)∠atan(X/R) on the unit base (source voltage 1 pu at the short-circuit level).
    pub fn impedance(&self) -> C64 {
        if !self.scr.is_finite() || self.scr > 1e9 {
            return C64::new(0.0, 0.0);
        }
        let z = 1.0 / self.scr;
        let angle = self.x_over_r.atan();
        C64::from_polar(z, angle)
    }
}

/// A grid disturbance applied once during a case.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
#[serde(tag = "kind", rename_all = "kebab-case", deny_unknown_fields)]
pub enum Disturbance {
    /// No disturbance (steady-state run).
    None,
    /// A shunt fault impedance at the terminal, chosen so that the no-load retained voltage is
    /// `retained_voltage` (0 = bolted); its X/R equals the grid's.
    Fault {
        start_s: f64,
        duration_s: f64,
        retained_voltage: f64,
    },
    /// The grid source magnitude drops to `residual_voltage` (relative to its pre-fault value),
    /// optionally with a phase jump at the start (and back at the end).
    VoltageDip {
        start_s: f64,
        duration_s: f64,
        residual_voltage: f64,
        #[serde(default)]
        phase_jump_deg: f64,
    },
    /// The grid source angle jumps by `angle_deg` and stays.
    PhaseJump { start_s: f64, angle_deg: f64 },
    /// The grid frequency ramps at `rate_hz_per_s` for `duration_s`, then holds its new value.
    FrequencyRamp {
        start_s: f64,
        duration_s: f64,
        rate_hz_per_s: f64,
    },
    /// The grid source magnitude rises to `magnitude` (relative, > 1) for `duration_s`.
    Swell {
        start_s: f64,
        duration_s: f64,
        magnitude: f64,
    },
}

impl Disturbance {
    pub fn validate(&self) -> Result<(), UnitError> {
        let start_dur = |s: f64, d: f64| -> Result<(), UnitError> {
            check("disturbance.start_s", s, s >= 0.0, "a start time >= 0 s")?;
            check("disturbance.duration_s", d, d > 0.0, "a duration > 0 s")
        };
        match *self {
            Disturbance::None => Ok(()),
            Disturbance::Fault {
                start_s,
                duration_s,
                retained_voltage,
            } => {
                start_dur(start_s, duration_s)?;
                check(
                    "disturbance.retained_voltage",
                    retained_voltage,
                    (0.0..1.0).contains(&retained_voltage),
                    "a retained voltage in [0, 1) pu",
                )
            }
            Disturbance::VoltageDip {
                start_s,
                duration_s,
                residual_voltage,
                phase_jump_deg,
            } => {
                start_dur(start_s, duration_s)?;
                check(
                    "disturbance.residual_voltage",
                    residual_voltage,
                    (0.0..=1.0).contains(&residual_voltage),
                    "a residual voltage in [0, 1] pu (a dip cannot go below 0 pu)",
                )?;
                check(
                    "disturbance.phase_jump_deg",
                    phase_jump_deg,
                    phase_jump_deg.abs() <= 180.0,
                    "a phase jump within ±180°",
                )
            }
            Disturbance::PhaseJump { start_s, angle_deg } => {
                check(
                    "disturbance.start_s",
                    start_s,
                    start_s >= 0.0,
                    "a start time >= 0 s",
                )?;
                check(
                    "disturbance.angle_deg",
                    angle_deg,
                    angle_deg.abs() <= 180.0,
                    "a phase jump within ±180°",
                )
            }
            Disturbance::FrequencyRamp {
                start_s,
                duration_s,
                rate_hz_per_s,
            } => {
                start_dur(start_s, duration_s)?;
                check(
                    "disturbance.rate_hz_per_s",
                    rate_hz_per_s,
                    rate_hz_per_s.abs() <= 10.0,
                    "a rate of change of frequency within ±10 Hz/s",
                )
            }
            Disturbance::Swell {
                start_s,
                duration_s,
                magnitude,
            } => {
                start_dur(start_s, duration_s)?;
                check(
                    "disturbance.magnitude",
                    magnitude,
                    (1.0..=1.5).contains(&magnitude),
                    "a swell magnitude in [1, 1.5] pu",
                )
            }
        }
    }

    /// A short label for file names and reports.
    pub fn label(&self) -> &'static str {
        match self {
            Disturbance::None => "none",
            Disturbance::Fault { .. } => "fault",
            Disturbance::VoltageDip { .. } => "voltage-dip",
            Disturbance::PhaseJump { .. } => "phase-jump",
            Disturbance::FrequencyRamp { .. } => "frequency-ramp",
            Disturbance::Swell { .. } => "swell",
        }
    }

    /// (start, end) of the disturbed interval, if any; a lasting change (phase jump) ends at start.
    pub fn window_s(&self) -> Option<(f64, f64)> {
        match *self {
            Disturbance::None => None,
            Disturbance::PhaseJump { start_s, .. } => Some((start_s, start_s)),
            Disturbance::Fault {
                start_s,
                duration_s,
                ..
            }
            | Disturbance::VoltageDip {
                start_s,
                duration_s,
                ..
            }
            | Disturbance::FrequencyRamp {
                start_s,
                duration_s,
                ..
            }
            | Disturbance::Swell {
                start_s,
                duration_s,
                ..
            } => Some((start_s, start_s + duration_s)),
        }
    }
}

/// One phase of the grid's scripted behaviour between two breakpoints: the source magnitude
/// (relative to pre-fault), its angle at the phase start, its frequency deviation at the phase
/// start and its ramp, and an optional shunt fault impedance at the terminal.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct GridPhase {
    pub start_s: f64,
    pub magnitude: f64,
    pub angle_rad: f64,
    pub df_hz: f64,
    pub ramp_hz_per_s: f64,
    pub fault_impedance: Option<C64>,
}

/// The grid's behaviour over a case, as phases separated by breakpoints.
#[derive(Debug, Clone, PartialEq)]
pub struct GridSchedule {
    pub source_voltage: f64,
    pub impedance: C64,
    pub phases: Vec<GridPhase>,
}

impl GridSchedule {
    /// Build the schedule of `disturbance` on a grid of impedance `z_th` whose source has
    /// magnitude `e0` and angle 0 before the disturbance.
    pub fn new(e0: f64, z_th: C64, disturbance: &Disturbance) -> Result<Self, UnitError> {
        disturbance.validate()?;
        let calm = GridPhase {
            start_s: f64::NEG_INFINITY,
            magnitude: 1.0,
            angle_rad: 0.0,
            df_hz: 0.0,
            ramp_hz_per_s: 0.0,
            fault_impedance: None,
        };
        let mut phases = vec![calm];
        match *disturbance {
            Disturbance::None => {}
            Disturbance::Fault {
                start_s,
                duration_s,
                retained_voltage,
            } => {
                if z_th.norm() == 0.0 {
                    return Err(UnitError::BadValue {
                        field: "grid.scr".into(),
                        value: f64::INFINITY,
                        expected: "a finite short-circuit ratio: a fault at the terminal of an ideal source has no effect".into(),
                    });
                }
                // retained (no-load) voltage u_r = |Z_f / (Z_th + Z_f)| with Z_f ∥ Z_th
                let z_f = z_th * (retained_voltage / (1.0 - retained_voltage));
                phases.push(GridPhase {
                    start_s,
                    fault_impedance: Some(z_f),
                    ..calm
                });
                phases.push(GridPhase {
                    start_s: start_s + duration_s,
                    ..calm
                });
            }
            Disturbance::VoltageDip {
                start_s,
                duration_s,
                residual_voltage,
                phase_jump_deg,
            } => {
                phases.push(GridPhase {
                    start_s,
                    magnitude: residual_voltage,
                    angle_rad: phase_jump_deg.to_radians(),
                    ..calm
                });
                phases.push(GridPhase {
                    start_s: start_s + duration_s,
                    ..calm
                });
            }
            Disturbance::PhaseJump { start_s, angle_deg } => phases.push(GridPhase {
                start_s,
                angle_rad: angle_deg.to_radians(),
                ..calm
            }),
            Disturbance::FrequencyRamp {
                start_s,
                duration_s,
                rate_hz_per_s,
            } => {
                phases.push(GridPhase {
                    start_s,
                    ramp_hz_per_s: rate_hz_per_s,
                    ..calm
                });
                // θ(t) = 2π(df·τ + ramp·τ²/2): continuous angle, then the frequency holds
                let df_end = rate_hz_per_s * duration_s;
                let angle_end =
                    2.0 * std::f64::consts::PI * rate_hz_per_s * duration_s * duration_s / 2.0;
                phases.push(GridPhase {
                    start_s: start_s + duration_s,
                    angle_rad: angle_end,
                    df_hz: df_end,
                    ..calm
                });
            }
            Disturbance::Swell {
                start_s,
                duration_s,
                magnitude,
            } => {
                phases.push(GridPhase {
                    start_s,
                    magnitude,
                    ..calm
                });
                phases.push(GridPhase {
                    start_s: start_s + duration_s,
                    ..calm
                });
            }
        }
        Ok(Self {
            source_voltage: e0,
            impedance: z_th,
            phases,
        })
    }

    /// Times at which the grid changes discontinuously.
    pub fn breakpoints_s(&self) -> Vec<f64> {
        self.phases.iter().skip(1).map(|p| p.start_s).collect()
    }

    /// Index of the phase in force at `t_s` (right-continuous).
    pub fn phase_index_at(&self, t_s: f64) -> usize {
        self.phases
            .iter()
            .rposition(|p| p.start_s <= t_s)
            .unwrap_or(0)
    }

    /// The source phasor and frequency (pu) of phase `k` at time `t_s`.
    pub fn source(&self, k: usize, t_s: f64, f_nom_hz: f64) -> (C64, f64) {
        let p = &self.phases[k];
        let tau = if p.start_s.is_finite() {
            t_s - p.start_s
        } else {
            0.0
        };
        let angle = p.angle_rad
            + 2.0 * std::f64::consts::PI * (p.df_hz * tau + 0.5 * p.ramp_hz_per_s * tau * tau);
        let f_pu = 1.0 + (p.df_hz + p.ramp_hz_per_s * tau) / f_nom_hz;
        (
            C64::from_polar(self.source_voltage * p.magnitude, angle),
            f_pu,
        )
    }

    /// Terminal voltage of phase `k` at `t_s` when the unit injects `i`:
    /// v = Z_f/(Z_th + Z_f)·(E + Z_th·i), which is E + Z_th·i without a fault.
    pub fn terminal_voltage(&self, k: usize, t_s: f64, f_nom_hz: f64, i: C64) -> C64 {
        let (e, _) = self.source(k, t_s, f_nom_hz);
        let open = e + self.impedance * i;
        match self.phases[k].fault_impedance {
            None => open,
            Some(z_f) => {
                let den = self.impedance + z_f;
                if den.norm() == 0.0 {
                    C64::new(0.0, 0.0)
                } else {
                    open * (z_f / den)
                }
            }
        }
    }
}

/// Solve the steady-state terminal voltage for an injection (p, q) behind a grid of impedance
/// z = r + jx fed by a source of magnitude e: with v = U∠0 and i = (p − jq)/U,
/// U⁴ − (2a + e²)U² + a² + b² = 0, a = rp + xq, b = xp − rq (the larger root is the stable one).
pub fn terminal_voltage_for(p: f64, q: f64, z: C64, e: f64) -> Result<f64, UnitError> {
    let (r, x) = (z.re, z.im);
    let a = r * p + x * q;
    let b = x * p - r * q;
    let bq = 2.0 * a + e * e;
    let disc = bq * bq - 4.0 * (a * a + b * b);
    if disc < 0.0 {
        return Err(UnitError::NoSteadyState {
            reason: format!(
                "P = {p} pu, Q = {q} pu cannot be transferred through Z = {r:.4}+j{x:.4} pu \
                 (SCR {:.3}) from a {e} pu source: beyond the nose of the P–V curve",
                1.0 / z.norm()
            ),
        });
    }
    Ok(((bq + disc.sqrt()) / 2.0).sqrt())
}

//! Scenario designs: reproducible sets of cases (operating point × grid × disturbance).
//!
//! A design draws N points from a Latin hypercube over the unit cube (space-filling: every
//! dimension is split into N strata and each stratum is used exactly once; McKay, Beckman &
//! Conover, Technometrics 21, 1979) with a seeded ChaCha8 generator, then maps each point to a
//! case. Points without a steady state (beyond the P–V nose, or above the current limit) are
//! redrawn from the same seeded stream and counted.

use crate::Error;
use rand::{RngExt, SeedableRng};
use rand_chacha::ChaCha8Rng;
use serde::{Deserialize, Serialize};
use std::f64::consts::PI;
use understudy_runtime::unit::{Disturbance, GridEquivalent, OperatingPoint};

/// One case: what the unit is doing, what grid it sees, and what happens to it.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Case {
    /// 1-based index within its design.
    pub index: usize,
    pub operating_point: OperatingPoint,
    pub grid: GridEquivalent,
    pub disturbance: Disturbance,
    /// Hour of the day the active power was drawn from, when a daily profile was used.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub profile_hour: Option<f64>,
}

impl Case {
    /// File stem of the case's trace, e.g. `case_0007`.
    pub fn stem(&self) -> String {
        format!("case_{:04}", self.index)
    }
}

/// A closed interval [min, max].
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Range {
    pub min: f64,
    pub max: f64,
}

impl Range {
    pub const fn new(min: f64, max: f64) -> Self {
        Self { min, max }
    }
    fn at(&self, u: f64) -> f64 {
        self.min + u * (self.max - self.min)
    }
    fn check(&self, field: &str) -> Result<(), Error> {
        if !(self.min.is_finite() && self.max.is_finite() && self.min <= self.max) {
            return Err(Error::bad_input(
                field,
                format!("[{}, {}]", self.min, self.max),
                "finite bounds with min <= max",
            ));
        }
        Ok(())
    }
}

/// Where the active-power setpoints come from.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum PowerDraw {
    /// Uniform over `p`.
    Uniform,
    /// From the invented 24-hour wind profile (hour drawn uniformly).
    WindDay,
    /// From the invented 24-hour solar profile (hour drawn within daylight).
    SolarDay,
}

/// Relative weights of disturbance kinds and their parameter ranges.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(default, deny_unknown_fields)]
pub struct DisturbanceMix {
    pub fault_weight: f64,
    pub dip_weight: f64,
    pub phase_jump_weight: f64,
    pub frequency_ramp_weight: f64,
    pub swell_weight: f64,
    /// Start of the disturbance (s).
    pub start_s: f64,
    /// Fault: no-load retained voltage (pu) and duration (s).
    pub fault_retained_voltage: Range,
    pub fault_duration_s: Range,
    /// Source dip: residual voltage (pu), duration (s), phase jump (deg).
    pub dip_residual_voltage: Range,
    pub dip_duration_s: Range,
    pub dip_phase_jump_deg: Range,
    /// Phase jump (deg).
    pub phase_jump_deg: Range,
    /// Frequency ramp (Hz/s) and its duration (s).
    pub frequency_ramp_hz_per_s: Range,
    pub frequency_ramp_duration_s: Range,
    /// Swell magnitude (pu) and duration (s).
    pub swell_magnitude: Range,
    pub swell_duration_s: Range,
}

impl Default for DisturbanceMix {
    fn default() -> Self {
        Self {
            fault_weight: 0.45,
            dip_weight: 0.25,
            phase_jump_weight: 0.1,
            frequency_ramp_weight: 0.1,
            swell_weight: 0.1,
            start_s: 0.2,
            fault_retained_voltage: Range::new(0.0, 0.7),
            fault_duration_s: Range::new(0.05, 0.25),
            dip_residual_voltage: Range::new(0.2, 0.85),
            dip_duration_s: Range::new(0.08, 0.3),
            dip_phase_jump_deg: Range::new(-20.0, 20.0),
            phase_jump_deg: Range::new(-30.0, 30.0),
            frequency_ramp_hz_per_s: Range::new(-2.0, 2.0),
            frequency_ramp_duration_s: Range::new(0.3, 0.6),
            swell_magnitude: Range::new(1.05, 1.15),
            swell_duration_s: Range::new(0.1, 0.3),
        }
    }
}

/// A reproducible design of cases.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(default, deny_unknown_fields)]
pub struct ScenarioDesign {
    pub cases: usize,
    pub seed: u64,
    pub power_draw: PowerDraw,
    /// Active power (pu), used with `power_draw = "uniform"`.
    pub p: Range,
    /// Reactive power (pu).
    pub q: Range,
    pub scr: Range,
    pub x_over_r: Range,
    pub disturbances: DisturbanceMix,
}

impl Default for ScenarioDesign {
    fn default() -> Self {
        Self {
            cases: 24,
            seed: 1,
            power_draw: PowerDraw::Uniform,
            p: Range::new(0.2, 1.0),
            q: Range::new(-0.3, 0.3),
            scr: Range::new(3.0, 10.0),
            x_over_r: Range::new(5.0, 15.0),
            disturbances: DisturbanceMix::default(),
        }
    }
}

/// The invented 24-hour wind profile of the demo plant (pu of rating; common practice shape:
/// a diurnal swing with faster weather variation, not a measured series).
pub fn wind_profile(hour: f64) -> f64 {
    let h = hour.rem_euclid(24.0);
    (0.55 + 0.25 * (2.0 * PI * (h - 3.0) / 24.0).sin() + 0.12 * (2.0 * PI * h / 6.5).sin())
        .clamp(0.05, 1.0)
}

/// The invented 24-hour clear-sky solar profile (pu of rating), daylight from 06:00 to 18:00.
pub fn solar_profile(hour: f64) -> f64 {
    let h = hour.rem_euclid(24.0);
    if !(6.0..=18.0).contains(&h) {
        return 0.0;
    }
    (PI * (h - 6.0) / 12.0).sin().powf(1.3)
}

const DIMENSIONS: usize = 7;

/// Latin hypercube sample of `n` points in [0,1)^d.
fn latin_hypercube(n: usize, d: usize, rng: &mut ChaCha8Rng) -> Vec<Vec<f64>> {
    let mut points = vec![vec![0.0; d]; n];
    for dim in 0..d {
        let mut strata: Vec<usize> = (0..n).collect();
        // Fisher–Yates shuffle
        for k in (1..n).rev() {
            let j = rng.random_range(0..=k);
            strata.swap(k, j);
        }
        for (point, s) in points.iter_mut().zip(strata) {
            point[dim] = (s as f64 + rng.random::<f64>()) / n as f64;
        }
    }
    points
}

impl ScenarioDesign {
    pub fn validate(&self) -> Result<(), Error> {
        if self.cases == 0 {
            return Err(Error::bad_input("design.cases", "0", "at least 1 case"));
        }
        self.p.check("design.p")?;
        self.q.check("design.q")?;
        self.scr.check("design.scr")?;
        self.x_over_r.check("design.x_over_r")?;
        if self.scr.min <= 0.0 {
            return Err(Error::bad_input(
                "design.scr.min",
                self.scr.min.to_string(),
                "a short-circuit ratio > 0",
            ));
        }
        let m = &self.disturbances;
        let weights = [
            ("design.disturbances.fault_weight", m.fault_weight),
            ("design.disturbances.dip_weight", m.dip_weight),
            ("design.disturbances.phase_jump_weight", m.phase_jump_weight),
            (
                "design.disturbances.frequency_ramp_weight",
                m.frequency_ramp_weight,
            ),
            ("design.disturbances.swell_weight", m.swell_weight),
        ];
        for (name, w) in weights {
            if !(w.is_finite() && w >= 0.0) {
                return Err(Error::bad_input(name, w.to_string(), "a weight >= 0"));
            }
        }
        if weights.iter().map(|(_, w)| w).sum::<f64>() <= 0.0 {
            return Err(Error::bad_input(
                "design.disturbances",
                "all weights 0",
                "at least one disturbance kind with a positive weight",
            ));
        }
        for (name, r) in [
            ("fault_retained_voltage", m.fault_retained_voltage),
            ("fault_duration_s", m.fault_duration_s),
            ("dip_residual_voltage", m.dip_residual_voltage),
            ("dip_duration_s", m.dip_duration_s),
            ("dip_phase_jump_deg", m.dip_phase_jump_deg),
            ("phase_jump_deg", m.phase_jump_deg),
            ("frequency_ramp_hz_per_s", m.frequency_ramp_hz_per_s),
            ("frequency_ramp_duration_s", m.frequency_ramp_duration_s),
            ("swell_magnitude", m.swell_magnitude),
            ("swell_duration_s", m.swell_duration_s),
        ] {
            r.check(&format!("design.disturbances.{name}"))?;
        }
        Ok(())
    }

    fn disturbance_at(&self, u_kind: f64, u1: f64, u2: f64, u3: f64) -> Disturbance {
        let m = &self.disturbances;
        let w = [
            m.fault_weight,
            m.dip_weight,
            m.phase_jump_weight,
            m.frequency_ramp_weight,
            m.swell_weight,
        ];
        let total: f64 = w.iter().sum();
        let mut acc = 0.0;
        let mut kind = w.len() - 1;
        for (k, wk) in w.iter().enumerate() {
            acc += wk / total;
            if u_kind < acc && *wk > 0.0 {
                kind = k;
                break;
            }
        }
        let start_s = m.start_s;
        match kind {
            0 => Disturbance::Fault {
                start_s,
                duration_s: m.fault_duration_s.at(u2),
                retained_voltage: m.fault_retained_voltage.at(u1),
            },
            1 => Disturbance::VoltageDip {
                start_s,
                duration_s: m.dip_duration_s.at(u2),
                residual_voltage: m.dip_residual_voltage.at(u1),
                phase_jump_deg: m.dip_phase_jump_deg.at(u3),
            },
            2 => Disturbance::PhaseJump {
                start_s,
                angle_deg: m.phase_jump_deg.at(u1),
            },
            3 => Disturbance::FrequencyRamp {
                start_s,
                duration_s: m.frequency_ramp_duration_s.at(u2),
                rate_hz_per_s: m.frequency_ramp_hz_per_s.at(u1),
            },
            _ => Disturbance::Swell {
                start_s,
                duration_s: m.swell_duration_s.at(u2),
                magnitude: m.swell_magnitude.at(u1),
            },
        }
    }

    fn case_at(&self, index: usize, u: &[f64]) -> Case {
        let (p, hour) = match self.power_draw {
            PowerDraw::Uniform => (self.p.at(u[0]), None),
            PowerDraw::WindDay => {
                let h = 24.0 * u[0];
                (wind_profile(h), Some(h))
            }
            PowerDraw::SolarDay => {
                // daylight hours where the plant produces at least 5 %
                let h = 7.0 + 10.0 * u[0];
                (solar_profile(h).max(0.05), Some(h))
            }
        };
        Case {
            index,
            operating_point: OperatingPoint::new(p, self.q.at(u[1])),
            grid: GridEquivalent {
                scr: self.scr.at(u[2]),
                x_over_r: self.x_over_r.at(u[3]),
            },
            disturbance: self.disturbance_at(u[4], u[5], u[6], (u[5] + u[6]).fract()),
            profile_hour: hour,
        }
    }

    /// Generate the design's cases. `feasible(case)` says whether a case has a steady state;
    /// infeasible points are redrawn (up to 1000 times each). Returns the cases and the number of
    /// redraws.
    pub fn generate(&self, feasible: impl Fn(&Case) -> bool) -> Result<(Vec<Case>, usize), Error> {
        self.validate()?;
        let mut rng = ChaCha8Rng::seed_from_u64(self.seed);
        let points = latin_hypercube(self.cases, DIMENSIONS, &mut rng);
        let mut redraws = 0;
        let mut cases = Vec::with_capacity(self.cases);
        for (k, mut u) in points.into_iter().enumerate() {
            let mut case = self.case_at(k + 1, &u);
            // a disturbance outside its physical range is the design's fault, not bad luck
            case.disturbance.validate().map_err(|e| match e {
                understudy_runtime::unit::UnitError::BadValue {
                    field,
                    value,
                    expected,
                } => Error::bad_input(format!("design.{field}"), value.to_string(), expected),
                other => Error::Unit(other),
            })?;
            let mut tries = 0;
            while !feasible(&case) {
                tries += 1;
                redraws += 1;
                if tries > 1000 {
                    return Err(Error::bad_input(
                        "design",
                        format!("case {}", k + 1),
                        "ranges of P, Q, SCR and X/R that contain operating points with a steady state",
                    ));
                }
                for v in u.iter_mut().take(4) {
                    *v = rng.random::<f64>();
                }
                case = self.case_at(k + 1, &u);
            }
            cases.push(case);
        }
        Ok((cases, redraws))
    }
}

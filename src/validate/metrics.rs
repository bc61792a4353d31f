//! Validation metrics: a simulated signal against a reference signal over the windows of a fault.
//!
//! The window method follows the structure of IEC 61400-27-2 (validation of electrical simulation
//! models of wind power generation): the record is split into a pre-fault window, a window during
//! the fault and a post-fault window; the during- and post-fault windows are each split into a
//! transient part (right after the switching instant) and a quasi-steady part. In each part the
//! mean error (ME), mean absolute error (MAE) and maximum absolute error (MXE) are computed.
//! The lengths of the transient parts and the default tolerances are stated below with their
//! origin (from memory of that standard's defaults — check them against the edition your grid code
//! cites; they are settings, not constants).

use serde::{Deserialize, Serialize};
use thiserror::Error;

#[derive(Debug, Error, Clone, PartialEq)]
pub enum MetricError {
    #[error("signal `{signal}`: reference has {reference} samples, simulation {simulated}")]
    LengthMismatch {
        signal: String,
        reference: usize,
        simulated: usize,
    },
    #[error("signal `{signal}` is not finite at sample {index}")]
    NonFinite { signal: String, index: usize },
    #[error("setting `{setting}` = {value} is invalid: expected {expected}")]
    Setting {
        setting: &'static str,
        value: f64,
        expected: &'static str,
    },
}

/// The parts of a faulted record.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, PartialOrd, Ord, Serialize, Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum Window {
    PreFault,
    FaultTransient,
    FaultSteady,
    PostTransient,
    PostSteady,
}

impl Window {
    pub const ALL: [Window; 5] = [
        Window::PreFault,
        Window::FaultTransient,
        Window::FaultSteady,
        Window::PostTransient,
        Window::PostSteady,
    ];

    pub fn label(&self) -> &'static str {
        match self {
            Window::PreFault => "pre-fault",
            Window::FaultTransient => "fault, transient",
            Window::FaultSteady => "fault, quasi-steady",
            Window::PostTransient => "post-fault, transient",
            Window::PostSteady => "post-fault, quasi-steady",
        }
    }

    fn is_transient(&self) -> bool {
        matches!(self, Window::FaultTransient | Window::PostTransient)
    }
}

/// Error figures in one window.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct WindowErrors {
    pub window: Window,
    pub samples: usize,
    /// Mean error (simulated − reference), pu.
    pub mean: f64,
    /// Mean absolute error, pu.
    pub mean_abs: f64,
    /// Maximum absolute error, pu.
    pub max_abs: f64,
}

/// Tolerances of one window kind (pu).
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Tolerance {
    pub mean: f64,
    pub mean_abs: f64,
    pub max_abs: f64,
}

/// Window lengths and tolerances.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
#[serde(default, deny_unknown_fields)]
pub struct WindowConfig {
    /// Length of the transient part after the fault starts (s). From memory of IEC 61400-27-2:
    /// 140 ms after the voltage dip begins; 500 ms after it clears.
    pub fault_transient_s: f64,
    pub post_transient_s: f64,
    /// Tolerances in quasi-steady windows (pre-fault, fault and post-fault quasi-steady).
    /// From memory of the IEC 61400-27-1 validation defaults for P, Q and currents: MXE 0.1 pu,
    /// ME 0.05 pu, MAE 0.07 pu — check against the edition in force.
    pub steady: Tolerance,
    /// Tolerances in transient windows: only the mean error is bounded by that method (MAE and
    /// MXE are reported for information); set here to 0.1 pu / ∞ / ∞.
    pub transient: Tolerance,
    /// NRMSE limit over the whole record, in % of rating (common practice, our default 2 %).
    pub nrmse_percent: f64,
}

impl Default for WindowConfig {
    fn default() -> Self {
        Self {
            fault_transient_s: 0.14,
            post_transient_s: 0.5,
            steady: Tolerance {
                mean: 0.05,
                mean_abs: 0.07,
                max_abs: 0.1,
            },
            transient: Tolerance {
                mean: 0.1,
                mean_abs: f64::INFINITY,
                max_abs: f64::INFINITY,
            },
            nrmse_percent: 2.0,
        }
    }
}

impl WindowConfig {
    pub fn with_fault_transient_s(mut self, t: f64) -> Result<Self, MetricError> {
        if !(t.is_finite() && t >= 0.0) {
            return Err(MetricError::Setting {
                setting: "fault_transient_s",
                value: t,
                expected: "a length >= 0 s",
            });
        }
        self.fault_transient_s = t;
        Ok(self)
    }

    pub fn with_post_transient_s(mut self, t: f64) -> Result<Self, MetricError> {
        if !(t.is_finite() && t >= 0.0) {
            return Err(MetricError::Setting {
                setting: "post_transient_s",
                value: t,
                expected: "a length >= 0 s",
            });
        }
        self.post_transient_s = t;
        Ok(self)
    }

    /// The window a sample at `t_s` belongs to, for a fault on [start, end).
    pub fn window_of(&self, t_s: f64, fault: (f64, f64)) -> Window {
        let (start, end) = fault;
        if t_s < start {
            Window::PreFault
        } else if t_s < end {
            if t_s < start + self.fault_transient_s {
                Window::FaultTransient
            } else {
                Window::FaultSteady
            }
        } else if t_s < end + self.post_transient_s {
            Window::PostTransient
        } else {
            Window::PostSteady
        }
    }

    pub fn tolerance(&self, w: Window) -> Tolerance {
        if w.is_transient() {
            self.transient
        } else {
            self.steady
        }
    }
}

/// The comparison of one signal over one record.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct SignalComparison {
    pub signal: String,
    pub windows: Vec<WindowErrors>,
    /// Root-mean-square error over the whole record divided by the rating base (1 pu), in %.
    pub nrmse_percent: f64,
    /// Whether every window and the NRMSE are within tolerance.
    pub within_tolerance: bool,
}

/// Compare `simulated` against `reference` (same sample times) for a disturbance on
/// [start, end). NRMSE is normalised by the rating (1 pu), as is usual for P, Q and currents in
/// per unit. Windows with no samples are left out.
pub fn compare_signal(
    signal: &str,
    time_s: &[f64],
    reference: &[f64],
    simulated: &[f64],
    fault: Option<(f64, f64)>,
    cfg: &WindowConfig,
) -> Result<SignalComparison, MetricError> {
    if reference.len() != simulated.len() || reference.len() != time_s.len() {
        return Err(MetricError::LengthMismatch {
            signal: signal.into(),
            reference: reference.len(),
            simulated: simulated.len(),
        });
    }
    for (k, (a, b)) in reference.iter().zip(simulated).enumerate() {
        if !(a.is_finite() && b.is_finite()) {
            return Err(MetricError::NonFinite {
                signal: signal.into(),
                index: k,
            });
        }
    }
    // a record without a disturbance window is all "pre-fault" (steady)
    let fault = fault.unwrap_or((f64::INFINITY, f64::INFINITY));
    let mut acc: Vec<(usize, f64, f64, f64)> = vec![(0, 0.0, 0.0, 0.0); Window::ALL.len()];
    let mut sq = 0.0;
    for ((t, a), b) in time_s.iter().zip(reference).zip(simulated) {
        let e = b - a;
        sq += e * e;
        let w = cfg.window_of(*t, fault) as usize;
        let slot = &mut acc[w];
        slot.0 += 1;
        slot.1 += e;
        slot.2 += e.abs();
        slot.3 = slot.3.max(e.abs());
    }
    let windows: Vec<WindowErrors> = Window::ALL
        .iter()
        .zip(&acc)
        .filter(|(_, a)| a.0 > 0)
        .map(|(w, a)| WindowErrors {
            window: *w,
            samples: a.0,
            mean: a.1 / a.0 as f64,
            mean_abs: a.2 / a.0 as f64,
            max_abs: a.3,
        })
        .collect();
    let nrmse_percent = 100.0 * (sq / time_s.len().max(1) as f64).sqrt();
    let within_tolerance = nrmse_percent <= cfg.nrmse_percent
        && windows.iter().all(|w| {
            let tol = cfg.tolerance(w.window);
            w.mean.abs() <= tol.mean && w.mean_abs <= tol.mean_abs && w.max_abs <= tol.max_abs
        });
    Ok(SignalComparison {
        signal: signal.into(),
        windows,
        nrmse_percent,
        within_tolerance,
    })
}

/// The median of a list (NaN-free); `None` when empty.
pub fn median(values: &[f64]) -> Option<f64> {
    if values.is_empty() {
        return None;
    }
    let mut v = values.to_vec();
    v.sort_by(f64::total_cmp);
    let n = v.len();
    Some(if n % 2 == 1 {
        v[n / 2]
    } else {
        0.5 * (v[n / 2 - 1] + v[n / 2])
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn windows_split_as_declared() {
        let cfg = WindowConfig::default();
        let f = (1.0, 1.3);
        assert_eq!(cfg.window_of(0.99, f), Window::PreFault);
        assert_eq!(cfg.window_of(1.0, f), Window::FaultTransient);
        assert_eq!(cfg.window_of(1.139, f), Window::FaultTransient);
        assert_eq!(cfg.window_of(1.141, f), Window::FaultSteady);
        assert_eq!(cfg.window_of(1.3, f), Window::PostTransient);
        assert_eq!(cfg.window_of(1.8, f), Window::PostSteady);
    }

    #[test]
    fn hand_computed_errors() {
        // reference 0, simulation +0.1 before, −0.2 / +0.4 in the fault: hand-computed figures
        let t: Vec<f64> = (0..6).map(|k| k as f64 * 0.1).collect();
        let reference = vec![0.0; 6];
        let simulated = vec![0.1, 0.1, -0.2, 0.4, 0.0, 0.0];
        let cfg = WindowConfig::default()
            .with_fault_transient_s(0.0)
            .unwrap()
            .with_post_transient_s(0.0)
            .unwrap();
        let c = compare_signal("p", &t, &reference, &simulated, Some((0.2, 0.4)), &cfg).unwrap();
        let pre = c
            .windows
            .iter()
            .find(|w| w.window == Window::PreFault)
            .unwrap();
        assert_eq!(pre.samples, 2);
        assert!((pre.mean - 0.1).abs() < 1e-15);
        let during = c
            .windows
            .iter()
            .find(|w| w.window == Window::FaultSteady)
            .unwrap();
        assert_eq!(during.samples, 2);
        assert!((during.mean - 0.1).abs() < 1e-15);
        assert!((during.mean_abs - 0.3).abs() < 1e-15);
        assert!((during.max_abs - 0.4).abs() < 1e-15);
        // NRMSE = sqrt((0.01 + 0.01 + 0.04 + 0.16) / 6) = sqrt(0.22/6)
        assert!((c.nrmse_percent - 100.0 * (0.22f64 / 6.0).sqrt()).abs() < 1e-12);
        assert!(!c.within_tolerance);
    }

    #[test]
    fn mismatched_lengths_and_nan_are_errors() {
        let cfg = WindowConfig::default();
        assert!(compare_signal("q", &[0.0, 1.0], &[0.0, 1.0], &[0.0], None, &cfg).is_err());
        let e = compare_signal("q", &[0.0, 1.0], &[0.0, f64::NAN], &[0.0, 1.0], None, &cfg)
            .unwrap_err();
        assert!(e.to_string().contains("sample 1"));
        assert!(WindowConfig::default()
            .with_fault_transient_s(-1.0)
            .is_err());
    }

    #[test]
    fn median_of_odd_and_even() {
        assert!((median(&[3.0, 1.0, 2.0]).unwrap() - 2.0).abs() < 1e-15);
        assert!((median(&[4.0, 1.0, 2.0, 3.0]).unwrap() - 2.5).abs() < 1e-15);
        assert!(median(&[]).is_none());
    }
}

//! Reading which limit of the parameters a geodesic's end point approaches.
//!
//! Near a boundary of the model manifold the parameter velocity v grows without bound along the
//! directions that leave the manifold's interior; its direction u = v/|v| at the end point names
//! the limit (Transtrum & Qiu 2014, the "reading" of the boundary from the geodesic):
//! - one component of u dominates: that parameter goes to 0 (θ_i → −∞) or ∞ (θ_i → +∞);
//! - u lies along e_i − e_j and θ_i − θ_j shrinks toward 0: the two parameters coalesce
//!   (a fold of the manifold, p_i = p_j);
//! - otherwise u spans several components: they diverge together while every combination of
//!   their logarithms orthogonal to u stays finite (for two: p_i^{u_j} / p_j^{u_i} finite).

use super::geodesic::GeodesicResult;
use super::ReduceError;
use crate::fit::ConfigError;

/// Where a single parameter goes.
#[derive(Debug, Clone, Copy, PartialEq, Eq, serde::Serialize, serde::Deserialize)]
pub enum LimitDirection {
    /// p → 0 (θ → −∞)
    ToZero,
    /// p → ∞ (θ → +∞)
    ToInfinity,
}

impl LimitDirection {
    fn of(velocity_component: f64) -> Self {
        if velocity_component < 0.0 {
            LimitDirection::ToZero
        } else {
            LimitDirection::ToInfinity
        }
    }
    fn symbol(self) -> &'static str {
        match self {
            LimitDirection::ToZero => "0",
            LimitDirection::ToInfinity => "∞",
        }
    }
}

/// A limit of the parameters at a manifold boundary; indices are parameter positions in θ.
#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
pub enum BoundaryLimit {
    /// p_index → 0 or ∞
    Single {
        index: usize,
        direction: LimitDirection,
    },
    /// several parameters diverge together along the unit direction given by
    /// (index, component) pairs (largest first); combinations of their logarithms orthogonal to
    /// it stay finite
    Coupled { components: Vec<(usize, f64)> },
    /// p_first and p_second coalesce (θ_first − θ_second → 0) with both finite
    Fold { first: usize, second: usize },
}

impl BoundaryLimit {
    /// One human sentence, with parameter names and the end-point values.
    pub fn describe(&self, names: &[String], end_log_params: &[f64]) -> String {
        match self {
            BoundaryLimit::Single { index, direction } => format!(
                "{} → {} (reached {:.4e}); the other parameters stay finite",
                names[*index],
                direction.symbol(),
                end_log_params[*index].exp()
            ),
            BoundaryLimit::Fold { first, second } => {
                let merged = 0.5 * (end_log_params[*first] + end_log_params[*second]);
                format!(
                    "{} and {} coalesce ({} = {} ≈ {:.4}): the model manifold folds there",
                    names[*first],
                    names[*second],
                    names[*first],
                    names[*second],
                    merged.exp()
                )
            }
            BoundaryLimit::Coupled { components } => {
                // parameter order reads more naturally than velocity order
                let mut components = components.clone();
                components.sort_by_key(|c| c.0);
                let moving: Vec<String> = components
                    .iter()
                    .map(|&(i, u)| format!("{} → {}", names[i], LimitDirection::of(u).symbol()))
                    .collect();
                let mut sentence = format!("{} together", moving.join(", "));
                if let [(i, ui), (j, uj)] = components.as_slice() {
                    // θ_i·u_j − θ_j·u_i is constant along u: p_i · p_j^(−u_i/u_j) stays finite
                    let exponent = -ui / uj;
                    sentence.push_str(&format!(
                        ", with {}·{}^({:.3}) finite",
                        names[*i], names[*j], exponent
                    ));
                } else {
                    sentence.push_str(", combinations orthogonal to the direction stay finite");
                }
                sentence
            }
        }
    }
}

/// Thresholds of the boundary reading.
#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct BoundaryConfig {
    coverage: f64,
    fold_shrink: f64,
}

impl Default for BoundaryConfig {
    fn default() -> Self {
        BoundaryConfig {
            coverage: 0.9,
            fold_shrink: 0.1,
        }
    }
}

impl BoundaryConfig {
    /// The components that take part are the fewest largest |u_i| whose squares sum to at least
    /// this fraction of |u|² = 1 (in (0.5, 1)).
    pub fn with_coverage(mut self, coverage: f64) -> Result<Self, ConfigError> {
        if !(coverage > 0.5 && coverage < 1.0) {
            return Err(ConfigError::Invalid {
                setting: "coverage",
                value: coverage.to_string(),
                expected: "a fraction in (0.5, 1)",
            });
        }
        self.coverage = coverage;
        Ok(self)
    }

    /// A pair is a fold when |θ_i − θ_j| at the end is at most this fraction of its start value
    /// (in (0, 1)).
    pub fn with_fold_shrink(mut self, fraction: f64) -> Result<Self, ConfigError> {
        if !(fraction > 0.0 && fraction < 1.0) {
            return Err(ConfigError::Invalid {
                setting: "fold_shrink",
                value: fraction.to_string(),
                expected: "a fraction in (0, 1)",
            });
        }
        self.fold_shrink = fraction;
        Ok(self)
    }
}

/// The limit read from a geodesic's end, with what it was read from.
#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct BoundaryReading {
    pub limit: BoundaryLimit,
    pub sentence: String,
    pub parameter_names: Vec<String>,
    pub start_log_params: Vec<f64>,
    pub end_log_params: Vec<f64>,
    /// u = v/|v| at the end
    pub velocity_direction: Vec<f64>,
    pub arc_length: f64,
}

/// Classify the end of a geodesic that stopped at a boundary.
pub fn read_boundary(
    names: &[String],
    geodesic: &GeodesicResult,
    config: &BoundaryConfig,
) -> Result<BoundaryReading, ReduceError> {
    if !geodesic.stop.is_boundary() {
        return Err(ReduceError::NoBoundary {
            arc_lengths: vec![geodesic.arc_length],
            stops: vec![format!("{:?}", geodesic.stop)],
        });
    }
    let start = geodesic.start();
    let end = geodesic.end();
    assert_eq!(names.len(), end.log_params.len(), "names length");
    let u: Vec<f64> = end.velocity.iter().map(|v| v / end.speed).collect();
    let mut order: Vec<usize> = (0..u.len()).collect();
    order.sort_by(|&a, &b| u[b].abs().total_cmp(&u[a].abs()));
    let mut covered = 0.0;
    let mut taking = Vec::new();
    for &i in &order {
        taking.push(i);
        covered += u[i] * u[i];
        if covered >= config.coverage {
            break;
        }
    }
    let limit = match taking.as_slice() {
        [i] => BoundaryLimit::Single {
            index: *i,
            direction: LimitDirection::of(u[*i]),
        },
        [i, j] if is_fold(*i, *j, &u, &start.log_params, &end.log_params, config) => {
            let (first, second) = if i < j { (*i, *j) } else { (*j, *i) };
            BoundaryLimit::Fold { first, second }
        }
        several => BoundaryLimit::Coupled {
            components: several.iter().map(|&i| (i, u[i])).collect(),
        },
    };
    Ok(BoundaryReading {
        sentence: limit.describe(names, &end.log_params),
        limit,
        parameter_names: names.to_vec(),
        start_log_params: start.log_params.clone(),
        end_log_params: end.log_params.clone(),
        velocity_direction: u,
        arc_length: geodesic.arc_length,
    })
}

/// Opposite velocity components and a gap θ_i − θ_j that closes to a small fraction of its start.
fn is_fold(
    i: usize,
    j: usize,
    u: &[f64],
    start: &[f64],
    end: &[f64],
    config: &BoundaryConfig,
) -> bool {
    let gap_start = start[i] - start[j];
    let gap_end = end[i] - end[j];
    let closing = gap_end * (u[i] - u[j]) < 0.0;
    u[i] * u[j] < 0.0 && closing && gap_end.abs() <= config.fold_shrink * gap_start.abs()
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::reduce::geodesic::{GeodesicPoint, GeodesicStop};

    fn path(start: Vec<f64>, end: Vec<f64>, velocity: Vec<f64>) -> GeodesicResult {
        let speed = velocity.iter().map(|v| v * v).sum::<f64>().sqrt();
        let point = |p: Vec<f64>| GeodesicPoint {
            arc_length: 0.0,
            log_params: p,
            velocity: velocity.clone(),
            speed,
            data_speed: 1.0,
            smallest_eigenvalue: 1.0,
        };
        GeodesicResult {
            path: vec![point(start), point(end)],
            stop: GeodesicStop::VelocityGrowth { factor: 100.0 },
            arc_length: 1.0,
            steps: 1,
            rejected_steps: 0,
            derivative_source: crate::fit::DerivativeSource::Exact,
        }
    }

    fn names() -> Vec<String> {
        vec!["a".into(), "b".into(), "c".into()]
    }

    #[test]
    fn single_parameter_to_zero() {
        let g = path(vec![0.0; 3], vec![0.1, -9.0, 0.2], vec![0.1, -50.0, 0.3]);
        let r = read_boundary(&names(), &g, &BoundaryConfig::default()).unwrap();
        assert_eq!(
            r.limit,
            BoundaryLimit::Single {
                index: 1,
                direction: LimitDirection::ToZero
            }
        );
        assert!(r.sentence.starts_with("b → 0"), "{}", r.sentence);
    }

    #[test]
    fn two_parameters_diverging_with_finite_ratio() {
        // a and c both to ∞ at the same rate: a/c finite
        let g = path(vec![0.0; 3], vec![8.0, 0.1, 8.5], vec![30.0, 0.2, 30.0]);
        let r = read_boundary(&names(), &g, &BoundaryConfig::default()).unwrap();
        match &r.limit {
            BoundaryLimit::Coupled { components } => {
                let idx: Vec<usize> = components.iter().map(|c| c.0).collect();
                assert!(idx == vec![0, 2] || idx == vec![2, 0]);
            }
            other => panic!("expected coupled, got {other:?}"),
        }
        assert!(r.sentence.contains("^(-1.000)"), "{}", r.sentence);
    }

    #[test]
    fn opposite_components_with_opening_gap_are_not_a_fold() {
        // a → ∞, b → 0 with a·b finite: the gap θ_a − θ_b grows
        let g = path(vec![0.0; 3], vec![6.0, -6.0, 0.0], vec![40.0, -40.0, 0.1]);
        let r = read_boundary(&names(), &g, &BoundaryConfig::default()).unwrap();
        assert!(matches!(r.limit, BoundaryLimit::Coupled { .. }), "{r:?}");
        assert!(r.sentence.contains("a·b^(1.000) finite"), "{}", r.sentence);
    }

    #[test]
    fn closing_gap_is_a_fold() {
        let g = path(
            vec![0.0, 0.7, 0.0],
            vec![0.33, 0.335, 0.0],
            vec![400.0, -400.0, 0.5],
        );
        let r = read_boundary(&names(), &g, &BoundaryConfig::default()).unwrap();
        assert_eq!(
            r.limit,
            BoundaryLimit::Fold {
                first: 0,
                second: 1
            }
        );
    }
}

//! The held-out split shared by every stage that validates: reduction (`reduce`), the hybrid
//! surrogate (`fit`) and its report. One rule, so a case held out from one stage is never
//! trained on by another.
//!
//! Rule (common practice for designed experiments): sort the traces by name (case index), then
//! hold out every k-th one starting at the second, k = round(1 / fraction). Deterministic, spread
//! across the design (a Latin hypercube is ordered by sample index, not by value), and stable
//! when cases are appended.

use thiserror::Error;

#[derive(Debug, Error, PartialEq)]
pub enum SplitError {
    #[error("held-out fraction {fraction} is outside (0, 0.5]; expected e.g. 0.25")]
    Fraction { fraction: f64 },
    #[error("{cases} cases cannot be split into a training and a held-out set (need at least 2 with the held-out fraction {fraction})")]
    TooFew { cases: usize, fraction: f64 },
}

/// Indices (into the name-sorted list) of training and held-out cases.
#[derive(Debug, Clone, PartialEq, Eq, serde::Serialize, serde::Deserialize)]
pub struct Split {
    pub training: Vec<usize>,
    pub held_out: Vec<usize>,
}

/// Split `cases` items (already in name order) with the shared rule.
pub fn held_out_split(cases: usize, fraction: f64) -> Result<Split, SplitError> {
    if !(fraction > 0.0 && fraction <= 0.5) {
        return Err(SplitError::Fraction { fraction });
    }
    let k = (1.0 / fraction).round().max(2.0) as usize;
    let held_out: Vec<usize> = (0..cases).filter(|i| i % k == 1).collect();
    if held_out.is_empty() || held_out.len() == cases {
        return Err(SplitError::TooFew { cases, fraction });
    }
    let training = (0..cases).filter(|i| i % k != 1).collect();
    Ok(Split { training, held_out })
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn every_fourth_case_from_the_second_is_held_out() {
        let s = held_out_split(10, 0.25).unwrap();
        assert_eq!(s.held_out, vec![1, 5, 9]);
        assert_eq!(s.training, vec![0, 2, 3, 4, 6, 7, 8]);
    }

    #[test]
    fn bad_fractions_and_too_few_cases_are_refused() {
        assert_eq!(
            held_out_split(10, 0.0),
            Err(SplitError::Fraction { fraction: 0.0 })
        );
        assert!(held_out_split(10, 0.7).is_err());
        assert!(held_out_split(1, 0.25).is_err());
        assert!(held_out_split(2, 0.5).is_ok());
    }
}

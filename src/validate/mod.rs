//! Validation on held-out cases: window metrics, plots and the HTML report.
pub mod metrics;
pub mod plot;
pub mod report;

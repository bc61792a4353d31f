//! understudy: fast, validated stand-in models of converter-connected generators.
//!
//! The pipeline (see DEVELOPERS.md): source → cases → traces → fit template → reduce →
//! residuals → correction → surrogate → FMU. This crate is the tool; the code that must also run
//! inside an exported FMU lives in `understudy-runtime` (folder `fmu-template/`).

#![deny(clippy::float_cmp)]

pub mod atomic;
pub mod demo;
pub mod error;
pub mod fit;
pub mod fmi;
pub mod greybox;
pub mod hybrid;
pub mod reduce;
pub mod residual;
pub mod scenario;
pub mod signal;
pub mod simulate;
pub mod split;
pub mod study;
pub mod validate;

pub use error::Error;
pub use understudy_runtime as runtime;

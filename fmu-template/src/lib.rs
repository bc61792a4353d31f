//! understudy-runtime: everything that must run inside an exported FMU — unit models, the
//! integrators, and (later) the block-model interpreter and the correction's state update.
//! It knows nothing of fitting, plotting or the command line.

#![deny(clippy::float_cmp)]

pub mod block;
pub mod correction;
pub mod cosim;
pub mod fmi2;
pub mod fmi3;
pub mod hybrid;
pub mod ode;
pub mod unit;
pub mod variables;

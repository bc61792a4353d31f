//! The block-model engine: grey-box templates as data.
//!
//! A [`Template`] is a declarative block diagram (serde, JSON or TOML) from the terminal voltage
//! phasor to the injected current and power, with named physical parameters, their bounds and the
//! limits a reduction may take them to. [`BlockModel::compile`] checks it (unknown kinds, ports,
//! parameters, bounds, algebraic loops → [`TemplateError`] naming the block or parameter) and
//! [`BlockModel::simulate`] runs it on a fixed step, generic over the scalar type: with
//! [`Dual`] numbers one run also gives the exact derivatives of the discrete simulation with
//! respect to the seeded parameters. [`apply_limit`] rewrites a template at a parameter limit
//! (the reduced model is data again).
//!
//! Units: per unit on the unit's rating, seconds, network-frame phasors, generator convention.

mod kinds;
mod limits;
mod model;
mod scalar;
mod template;
mod tracking;

pub use kinds::{known_kinds, lookup, KindInfo, PortUse, KINDS};
pub use limits::{apply_limit, Limit, LimitError, Reduction};
pub use model::{
    BlockModel, BlockRun, EvalConfig, InitialOutputs, InitialQuantity, InputSeries, OutputSeries,
    Sample, Simulator, SimulatorSnapshot, TemplateError, INPUT_SIGNALS,
};
pub use scalar::{Dual, Scalar};
pub use template::{BlockSpec, LimitKind, OutputMap, ParamRef, ParameterSpec, Template};

#[cfg(test)]
mod tests;

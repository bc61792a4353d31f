//! FMI: packaging models as Co-Simulation FMUs (export). Import comes later.

pub mod export;

pub use export::{export_fmu, find_runtime_library, ExportError, ExportReport, FmiVersion};

//! FMI: packaging models as Co-Simulation FMUs (export), loading FMUs (import), checking them
//! (check) and driving them as a black-box source of traces (blackbox).

pub mod blackbox;
pub mod check;
pub mod export;
pub mod import;

pub use export::{export_fmu, find_runtime_library, ExportError, ExportReport, FmiVersion};
pub use import::{Fmu, ImportError, Instance, LoadOptions};

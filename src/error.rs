//! The library's error type. Every variant says what was wrong and where; `exit_code` maps it to
//! the CLI contract (1 = a failure of the work, 2 = bad input or usage).

use std::path::PathBuf;
use thiserror::Error;
use understudy_runtime::ode::OdeError;
use understudy_runtime::unit::UnitError;

use crate::fmi::export::ExportError;
use crate::fmi::import::ImportError;
use crate::signal::trace::TraceError;

#[derive(Debug, Error)]
pub enum Error {
    #[error("`{field}` = {value} is invalid: expected {expected}")]
    BadInput {
        field: String,
        value: String,
        expected: String,
    },
    #[error("{path}: {message}")]
    BadFile { path: PathBuf, message: String },
    #[error("{path}: {source}")]
    Io {
        path: PathBuf,
        source: std::io::Error,
    },
    #[error(transparent)]
    Unit(#[from] UnitError),
    #[error("case {case}: {source}")]
    Integration { case: String, source: OdeError },
    #[error(transparent)]
    Trace(#[from] TraceError),
    #[error(transparent)]
    Export(#[from] ExportError),
    #[error(transparent)]
    Import(#[from] ImportError),
    #[error("{0}")]
    Failed(String),
}

impl Error {
    pub fn bad_input(
        field: impl Into<String>,
        value: impl Into<String>,
        expected: impl Into<String>,
    ) -> Self {
        Error::BadInput {
            field: field.into(),
            value: value.into(),
            expected: expected.into(),
        }
    }

    pub fn io(path: impl Into<PathBuf>, source: std::io::Error) -> Self {
        Error::Io {
            path: path.into(),
            source,
        }
    }

    /// 1 for a failure of the work (non-convergence, a failed check, an I/O failure while
    /// writing), 2 for bad input.
    pub fn exit_code(&self) -> i32 {
        match self {
            Error::BadInput { .. } | Error::BadFile { .. } | Error::Unit(_) => 2,
            Error::Trace(TraceError::Parse { .. } | TraceError::Invalid { .. }) => 2,
            Error::Io { .. } | Error::Trace(TraceError::Io { .. }) => 1,
            Error::Integration { .. } | Error::Failed(_) => 1,
            Error::Export(ExportError::Model(_) | ExportError::Platform(_)) => 2,
            Error::Export(_) => 1,
            // a file that is not a usable FMU is bad input; a failing FMU is a failure of the work
            Error::Import(
                ImportError::NotAnFmu { .. }
                | ImportError::Description { .. }
                | ImportError::Platform { .. }
                | ImportError::Library { .. }
                | ImportError::MissingFunction { .. }
                | ImportError::Preload { .. }
                | ImportError::UnknownVariable { .. }
                | ImportError::VariableType { .. },
            ) => 2,
            Error::Import(_) => 1,
        }
    }
}

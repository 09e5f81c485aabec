//! The engine's one error type. Messages are lowercase, carry the bad value and a hint, and
//! never mention the wire format: `api` maps each kind to a field pointer and an HTTP status.

use thiserror::Error;

#[derive(Debug, Error, Clone, PartialEq)]
pub enum EngineError {
    /// Occurs when the raster's shape or size is unusable.
    #[error("{0}")]
    InvalidRaster(String),
    /// Occurs when a raster value is not a probability.
    #[error("{detail}")]
    InvalidValue { cell: u32, detail: String },
    /// Occurs when a zone is empty, lists a cell twice, or names a cell outside the raster or nodata.
    #[error("{detail}")]
    InvalidZone {
        zone: String,
        position: Option<usize>,
        detail: String,
    },
    /// Occurs when no zone or cell was given where at least one is needed.
    #[error("{0}")]
    NothingToDo(String),
    /// Occurs when a setting (interval level, tolerance) is out of range.
    #[error("{detail}")]
    InvalidSetting { field: &'static str, detail: String },
    /// Occurs when the observed total cannot happen under the raster: fewer events than cells
    /// with p = 1, or more than cells with p > 0.
    #[error("{0}")]
    ImpossibleTotal(String),
    /// Occurs when the planned work exceeds a limit set by the caller.
    #[error("{0}")]
    TooLarge(String),
    /// Occurs when the caller cancelled the computation through its `Control`.
    #[error("the computation was cancelled")]
    Cancelled,
}

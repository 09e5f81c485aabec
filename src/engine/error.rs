//! The engine's one error type. Variants carry the facts (zone id, cell, value, limit), never
//! prose, so callers map them to fields and statuses by matching; `Display` renders the message a
//! person reads: lowercase, with the bad value and a hint, and no mention of any wire format.

use std::fmt;

/// Why a raster's shape is unusable.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum RasterProblem {
    /// Width or height is zero.
    Empty { width: u32, height: u32 },
    /// More cells than `u32` indices reach.
    TooManyCells { width: u32, height: u32 },
    /// The number of values differs from width x height.
    ValueCount {
        width: u32,
        height: u32,
        given: usize,
    },
}

/// Why a listed cell cannot be used.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum CellProblem {
    /// The index lies past the raster's last cell.
    Outside { width: u32, height: u32 },
    /// The cell is nodata (outside the study area).
    Nodata,
}

/// Why a zone cannot be used.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum ZoneProblem {
    /// The zone lists no cell.
    Empty,
    /// The cell at `position` of the zone's list is unusable.
    Cell {
        position: usize,
        cell: u32,
        problem: CellProblem,
    },
    /// The zone lists `cell` more than once.
    Repeated { cell: u32 },
    /// The zone's id was already used by the zone at `first`; this one is at `second`.
    DuplicateId { first: usize, second: usize },
}

/// What was missing where at least one is needed.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Missing {
    Zones,
    Cells,
}

/// Which setting is out of range, with its value (and, for the tolerance, the range and default).
#[derive(Clone, Copy, Debug, PartialEq)]
pub enum SettingProblem {
    Level(f64),
    Tolerance {
        value: f64,
        min: f64,
        max: f64,
        default: f64,
    },
}

/// An observed total the raster cannot produce: below the cells with p = 1 (`certain`) or above
/// the cells with p > 0 (`possible`).
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub struct ImpossibleTotal {
    pub total: u64,
    pub certain: u64,
    pub possible: u64,
}

#[derive(Clone, Debug, PartialEq)]
pub enum EngineError {
    /// Occurs when the raster's shape or size is unusable.
    InvalidRaster(RasterProblem),
    /// Occurs when a raster value is not a probability.
    InvalidValue { cell: u32, value: f64 },
    /// Occurs when a zone is empty, lists a cell twice, names a cell outside the raster or
    /// nodata, or reuses another zone's id.
    InvalidZone { zone: String, problem: ZoneProblem },
    /// Occurs when a cell list (of the cell posterior) names a cell outside the raster or nodata.
    InvalidCell {
        position: usize,
        cell: u32,
        problem: CellProblem,
    },
    /// Occurs when no zone or cell was given where at least one is needed.
    NothingToDo(Missing),
    /// Occurs when a setting (interval level, tolerance) is out of range.
    InvalidSetting(SettingProblem),
    /// Occurs when the observed total cannot happen under the raster.
    ImpossibleTotal(ImpossibleTotal),
    /// Occurs when evidence other than an exact total is malformed: a range with min > max, a
    /// detection rate outside (0, 1], a negative likelihood value. The message names the value
    /// and the fix.
    InvalidEvidence(String),
    /// Occurs when evidence other than an exact total is impossible under the raster: no total
    /// it allows can happen (or none has a prior probability f64 can hold).
    ImpossibleEvidence(String),
    /// Occurs when the caller cancelled the computation through its `Control`.
    Cancelled,
}

impl std::error::Error for EngineError {}

impl fmt::Display for RasterProblem {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match *self {
            RasterProblem::Empty { width, height } => write!(
                f,
                "raster is {width}x{height}: width and height must both be at least 1"
            ),
            RasterProblem::TooManyCells { width, height } => write!(
                f,
                "raster is {width}x{height} = {} cells: at most {} cells are supported",
                width as u64 * height as u64,
                u32::MAX
            ),
            RasterProblem::ValueCount {
                width,
                height,
                given,
            } => write!(
                f,
                "raster is {width}x{height} = {} cells but {given} values were given",
                width as u64 * height as u64
            ),
        }
    }
}

/// "cell 7, outside the 4x2 raster (last index 7)" and the like, after a subject.
fn cell_clause(f: &mut fmt::Formatter<'_>, cell: u32, problem: CellProblem) -> fmt::Result {
    match problem {
        CellProblem::Outside { width, height } => write!(
            f,
            "cell {cell}, outside the {width}x{height} raster (last index {})",
            width as u64 * height as u64 - 1
        ),
        CellProblem::Nodata => write!(f, "cell {cell}, which is nodata (outside the study area)"),
    }
}

impl fmt::Display for EngineError {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            EngineError::InvalidRaster(p) => p.fmt(f),
            EngineError::InvalidValue { cell, value } => write!(
                f,
                "cell {cell} has value {value}: a probability must lie in [0, 1] (use nodata for cells outside the study area)"
            ),
            EngineError::InvalidZone { zone, problem } => match *problem {
                ZoneProblem::Empty => {
                    write!(f, "zone `{zone}` has no cells: give at least one cell")
                }
                ZoneProblem::Cell { cell, problem, .. } => {
                    write!(f, "zone `{zone}` has ")?;
                    cell_clause(f, cell, problem)?;
                    if problem == CellProblem::Nodata {
                        write!(f, ": remove it from the zone")?;
                    }
                    Ok(())
                }
                ZoneProblem::Repeated { cell } => write!(
                    f,
                    "zone `{zone}` lists cell {cell} more than once: list each cell once"
                ),
                ZoneProblem::DuplicateId { second, .. } => write!(
                    f,
                    "zone id `{zone}` is used twice (second time at zone {second}): give each zone its own id"
                ),
            },
            EngineError::InvalidCell { cell, problem, .. } => {
                write!(f, "the cell list has ")?;
                cell_clause(f, *cell, *problem)?;
                write!(f, ": list valid cells only")
            }
            EngineError::NothingToDo(Missing::Zones) => {
                write!(f, "the zone list is empty: give at least one zone")
            }
            EngineError::NothingToDo(Missing::Cells) => {
                write!(f, "the cell list is empty: give at least one cell")
            }
            EngineError::InvalidSetting(SettingProblem::Level(level)) => write!(
                f,
                "interval level {level} must lie strictly between 0 and 1, e.g. 0.9"
            ),
            EngineError::InvalidSetting(SettingProblem::Tolerance {
                value,
                min,
                max,
                default,
            }) => write!(
                f,
                "tolerance {value} must lie in [{min:e}, {max:e}]; the default is {default:e}"
            ),
            EngineError::ImpossibleTotal(t) => {
                if t.total < t.certain {
                    write!(
                        f,
                        "observed total {} is impossible: {} cells have p = 1, so at least {} events happened",
                        t.total, t.certain, t.certain
                    )
                } else {
                    write!(
                        f,
                        "observed total {} is impossible: only {} cells have p > 0, so at most {} events can happen",
                        t.total, t.possible, t.possible
                    )
                }
            }
            EngineError::InvalidEvidence(message) | EngineError::ImpossibleEvidence(message) => {
                f.write_str(message)
            }
            EngineError::Cancelled => write!(f, "the computation was cancelled"),
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn messages_carry_the_value_and_a_hint() {
        let e = EngineError::InvalidZone {
            zone: "north-road".into(),
            problem: ZoneProblem::Cell {
                position: 3,
                cell: 250_000,
                problem: CellProblem::Outside {
                    width: 500,
                    height: 500,
                },
            },
        };
        assert_eq!(
            e.to_string(),
            "zone `north-road` has cell 250000, outside the 500x500 raster (last index 249999)"
        );
        let t = EngineError::ImpossibleTotal(ImpossibleTotal {
            total: 9,
            certain: 0,
            possible: 8,
        });
        assert!(t.to_string().contains("at most 8 events"), "{t}");
    }
}

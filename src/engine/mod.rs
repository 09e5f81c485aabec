//! The numerical core: exact conditional distributions of zone counts given an observed total.
//!
//! Owns the validated input types, the tilt, the normaliser, the union-tree planner and the
//! executor. Pure and synchronous: it knows nothing of HTTP, async runtimes, JSON or files, and
//! never does IO. Parallelism is rayon's: callers choose the pool with `pool.install`.
//! Cancellation and progress go through `Control`.

mod control;
mod error;
mod execute;
mod fft;
pub(crate) mod law;
mod model;
mod normaliser;
mod plan;
pub mod reference;
mod sets;
mod summary;
mod tilt;

pub use control::Control;
pub use error::EngineError;
pub use execute::{cell_posterior, execute, CellPosterior};
pub use model::{
    check_unique_ids, CellIndex, Raster, RasterStats, Settings, Zone, DEFAULT_LEVEL,
    DEFAULT_TOLERANCE, MAX_TOLERANCE, MIN_TOLERANCE,
};
pub use normaliser::{Normaliser, TotalCheck, IMPLAUSIBLE_TAIL};
pub use plan::{plan, Plan, PlanNode};
pub use summary::{Interval, ZoneSummary};

/// Everything `evaluate` reports: one summary per zone, in request order, and the total check.
#[derive(Clone, Debug, PartialEq)]
pub struct Evaluation {
    pub zones: Vec<ZoneSummary>,
    pub total: TotalCheck,
}

/// Plans and executes in one call, computing the normaliser too.
///
/// Occurs as an error for an empty zone list, repeated zone ids, an impossible total, or
/// cancellation.
pub fn evaluate(
    raster: &Raster,
    zones: &[Zone],
    total: u64,
    settings: &Settings,
    control: &Control,
) -> Result<Evaluation, EngineError> {
    if zones.is_empty() {
        return Err(EngineError::NothingToDo(
            "the zone list is empty: give at least one zone".into(),
        ));
    }
    check_unique_ids(zones)?;
    let normaliser = Normaliser::new(raster, total, control)?;
    let plan = plan(raster, zones);
    let summaries = execute(&plan, raster, zones, &normaliser, settings, control)?;
    Ok(Evaluation {
        zones: summaries,
        total: normaliser.check.clone(),
    })
}

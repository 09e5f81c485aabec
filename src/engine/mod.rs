//! The numerical core: exact conditional distributions of zone counts given an observed total.
//!
//! Owns the validated input types, the tilt, the normaliser, the union-tree planner and the
//! executor. Pure and synchronous: it knows nothing of HTTP, async runtimes, JSON or files, and
//! never does IO. Parallelism is rayon's: callers choose the pool with `pool.install`.
//! Cancellation and progress go through `Control`.
//!
//! Inputs are checked once, when their types are built (`Raster`, `Zone`, `ZoneSet`,
//! `Evidence`, `Settings`, `CellSelection`); the planner and the kernels trust them.

mod certify;
mod control;
mod error;
mod evidence;
mod execute;
mod fft;
pub(crate) mod law;
mod membership;
mod model;
mod normaliser;
mod plan;
mod posterior;
pub mod reference;
mod rounding;
mod scenarios;
mod sets;
mod strata;
mod summary;
mod tilt;
mod tree;

pub use control::Control;
pub use error::{
    CellProblem, EngineError, ImpossibleTotal, Missing, RasterProblem, SettingProblem, ZoneProblem,
};
pub use evidence::{Evidence, Form, MAX_LIKELIHOOD_VALUES};
pub use execute::execute;
pub use model::{
    check_zones, CellIndex, Raster, RasterStats, Settings, Zone, ZoneSet, DEFAULT_LEVEL,
    DEFAULT_TOLERANCE, MAX_TOLERANCE, MIN_TOLERANCE,
};
pub use normaliser::{Normaliser, TotalCheck, TotalPosterior, IMPLAUSIBLE_TAIL};
pub use plan::{plan, Plan, PlanNode};
pub use posterior::{
    cell_posterior, plan_cells, posterior, CellPlan, CellPosterior, CellSelection,
};
pub use scenarios::{scenario_cost, scenarios, Sampler, Scenario};
pub use strata::{cell_posterior_strata, execute_strata, Strata, StrataEvaluation, StratumCells};
pub use summary::{summarise, Interval, Summary, ZoneSummary};

/// Everything `evaluate` reports: one summary per zone, in request order, and the total check.
#[derive(Clone, Debug, PartialEq)]
pub struct Evaluation {
    pub zones: Vec<ZoneSummary>,
    pub total: TotalCheck,
}

/// Checks the zones and the total, then plans and executes in one call, computing the
/// normaliser too. For inputs already checked (a `ZoneSet` and an `Evidence`), call
/// `Normaliser::of`, `plan` and `execute` directly.
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
    check_zones(zones)?;
    let evidence = Evidence::exact_total(total, raster)?;
    let normaliser = Normaliser::of(raster, &evidence, control)?;
    let plan = plan(raster, zones);
    let summaries = execute(&plan, raster, zones, &normaliser, settings, control)?;
    Ok(Evaluation {
        zones: summaries,
        total: normaliser.check.clone(),
    })
}

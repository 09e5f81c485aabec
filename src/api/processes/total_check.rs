//! `total-check`: the evidence against the raster's prior, before any zone is computed: the
//! prior law of the total, how plausible the observation is, and the posterior of the true
//! total. Dashboards call it first to flag a miscalibrated raster.

use serde_json::{json, Value};

use super::{
    input, parse_execute, run_error, schema_of, to_json, Context, Output, Prepared, Process,
    ResponseMode,
};
use crate::api::decode::{self, DecodedEvidence, DecodedTotal};
use crate::api::formats::Format;
use crate::api::problem::ApiError;
use crate::api::wire::{
    EvidenceSpec, RasterInput, StratumCheck, TotalCheckInputs, TotalResult, TotalSummaries,
};
use crate::engine::{self, Control, EngineError, TotalCheck};

pub struct TotalCheckProcess;

const OUTPUT: &str = "check";

/// The formats of the `check` output.
pub const FORMATS: [Format; 1] = [Format::Json];

/// Law builds of the whole raster a check may take: the prior, up to eight re-centrings of the
/// tilt, and the tails (`engine::Normaliser::of`).
const LAW_BUILDS: f64 = 12.0;
/// Multiply-adds per cell of one law build (the product tree's leaves fold 64 cells).
const PER_CELL: f64 = 64.0;

impl Process for TotalCheckProcess {
    fn id(&self) -> &'static str {
        "total-check"
    }
    fn title(&self) -> &'static str {
        "The evidence on the total against the raster's prior"
    }
    fn description(&self) -> &'static str {
        "For a raster and any evidence on the total (an exact count, a range, a detected count under imperfect detection, a likelihood): the prior mean, sd and 99% interval of the total, the tail probabilities and log-likelihood of the observation, a warning when either tail is below 1e-6 (the raster may be miscalibrated), and the posterior of the true total."
    }
    fn output(&self) -> &'static str {
        OUTPUT
    }
    fn inputs(&self) -> Value {
        json!({
            "raster": input("probability raster", "per-cell event probabilities, inline or as {\"ref\": \"sha256:...\"} from POST /rasters", schema_of::<RasterInput>(), 1),
            "evidence": input("evidence", "what is known about the total number of events over all valid cells", schema_of::<EvidenceSpec>(), 1),
            "summaries": input("summaries", "interval level and pmf of the posterior total", schema_of::<TotalSummaries>(), 0),
        })
    }
    fn outputs(&self) -> Value {
        json!({OUTPUT: {"title": "total check", "description": "the prior of the total, the plausibility of the evidence and the posterior of the true total", "schema": schema_of::<TotalResult>()}})
    }
    fn formats(&self) -> &'static [Format] {
        &FORMATS
    }
    fn prepare(
        &self,
        body: &[u8],
        accept: Option<&str>,
        ctx: &Context,
    ) -> Result<(ResponseMode, Box<dyn Prepared>), ApiError> {
        let (req, mode, _): (TotalCheckInputs, _, _) =
            parse_execute(body, OUTPUT, accept, &FORMATS)?;
        let decoded = decode::total_check(req, &ctx.limits, ctx.rasters)
            .map_err(|e| ApiError::from_decode(e, "/inputs"))?;
        Ok((mode, Box::new(Check(decoded))))
    }
}

/// A decoded `total-check` request.
pub struct Check(pub DecodedTotal);

/// Runs a decoded request: the normaliser (from the context's source) holds the check; under
/// strata, each stratum's normaliser and their combination.
pub fn compute(
    d: &DecodedTotal,
    ctx: &Context,
    control: &Control,
) -> Result<TotalResult, EngineError> {
    let (level, pmf) = (d.settings.level(), d.settings.pmf());
    match &d.evidence {
        DecodedEvidence::Whole(e) => {
            let n = ctx
                .normalisers
                .normaliser(d.raster_key.as_deref(), &d.raster, e, control)?;
            Ok(TotalResult::of(n.check.clone(), level, pmf))
        }
        DecodedEvidence::Strata(strata) => {
            let run = engine::execute_strata(&d.raster, &[], strata, &d.settings, control)?;
            Ok(with_strata(
                run.total,
                run.strata,
                strata.cell_counts(),
                level,
                pmf,
            ))
        }
    }
}

/// The overall check with each stratum's beside it; `cells` counts each stratum's cells.
pub fn with_strata(
    total: TotalCheck,
    strata: Vec<(String, TotalCheck)>,
    cells: Vec<usize>,
    level: f64,
    pmf: bool,
) -> TotalResult {
    let mut out = TotalResult::of(total, level, pmf);
    out.strata = Some(
        strata
            .into_iter()
            .zip(cells)
            .map(|((id, check), cells)| StratumCheck {
                id,
                cells: cells as u64,
                check: TotalResult::of(check, level, pmf),
            })
            .collect(),
    );
    out
}

impl Prepared for Check {
    fn estimated_cost(&self) -> f64 {
        self.0.raster.len() as f64 * PER_CELL * LAW_BUILDS
    }
    fn cells(&self) -> u64 {
        self.0.raster.len() as u64
    }
    fn held_bytes(&self) -> u64 {
        // The posterior total's pmf as JSON (about 64 bytes a number): it is kept within the
        // tilted law's window, some 12 tilted sd either side, and a tilted sd is at most
        // sqrt(free / 4).
        let st = self.0.raster.stats();
        let width = (12.0 * (st.free as f64).sqrt() + 64.0).min(st.free as f64 + 1.0);
        (width * 72.0) as u64 + 4096
    }
    fn run(self: Box<Self>, ctx: &Context, control: &Control) -> Result<Output, ApiError> {
        let doc = compute(&self.0, ctx, control).map_err(run_error)?;
        to_json(&doc)
    }
}

//! `zone-counts`: the conditional distribution of the event count in each zone given the
//! observed total, plus the total check. Inputs are exactly the document `zonetally eval` reads.

use bytes::Bytes;
use serde_json::{json, Value};

use super::{
    check_cost, input, parse_execute, run_error, schema_of, to_json, Context, Prepared, Process,
    ResponseMode,
};
use crate::api::decode::{self, DecodeError, Decoded};
use crate::api::problem::ApiError;
use crate::api::wire::{
    EvalRequest, EvidenceSpec, RasterInput, ResultsDocument, SummariesSpec, ZoneSpec,
};
use crate::engine::{self, Control, EngineError, Plan};

pub struct ZoneCounts;

const OUTPUT: &str = "counts";

impl Process for ZoneCounts {
    fn id(&self) -> &'static str {
        "zone-counts"
    }
    fn title(&self) -> &'static str {
        "Zone event counts given the observed total"
    }
    fn description(&self) -> &'static str {
        "For each zone, the exact distribution of the number of events in it given the total observed over the raster (cells independent a priori): pmf, mean, sd, mode, median, equal-tailed credible interval, exceedance probabilities, prior moments and a certified error bound; plus a check of the observed total against the raster."
    }
    fn output(&self) -> &'static str {
        OUTPUT
    }
    fn inputs(&self) -> Value {
        json!({
            "raster": input("probability raster", "per-cell event probabilities, inline or as {\"ref\": \"sha256:...\"} from POST /rasters", schema_of::<RasterInput>(), 1),
            "zones": input("zones", "the cell sets to report on, each by cell list or rectangle", schema_of::<Vec<ZoneSpec>>(), 1),
            "evidence": input("evidence", "the observed total number of events over all valid cells", schema_of::<EvidenceSpec>(), 1),
            "summaries": input("summaries", "what to report: interval level, exceedance thresholds, pmf, tolerance", schema_of::<SummariesSpec>(), 0),
        })
    }
    fn outputs(&self) -> Value {
        json!({OUTPUT: {"title": "zone counts", "description": "the results document: one entry per zone, in request order, and the total check", "schema": schema_of::<ResultsDocument>()}})
    }
    fn prepare(
        &self,
        body: &[u8],
        ctx: &Context,
    ) -> Result<(ResponseMode, Box<dyn Prepared>), ApiError> {
        let (req, mode): (EvalRequest, _) = parse_execute(body, OUTPUT)?;
        let counts = prepare(req, ctx).map_err(|e| ApiError::from_decode(e, "/inputs"))?;
        Ok((mode, Box::new(counts)))
    }
}

/// A decoded and planned `zone-counts` request.
pub struct Counts {
    decoded: Decoded,
    plan: Plan,
}

/// Decodes and plans a request document, refusing it when the planned cost is over the limit.
pub fn prepare(req: EvalRequest, ctx: &Context) -> Result<Counts, DecodeError> {
    let decoded = decode::zone_counts(req, &ctx.limits, ctx.rasters)?;
    let plan = engine::plan(&decoded.raster, &decoded.zones);
    check_cost(plan.estimated_cost, &ctx.limits, "/zones")?;
    Ok(Counts { decoded, plan })
}

/// Runs a prepared request: the normaliser (from the context's source), then the union tree.
pub fn compute(
    c: &Counts,
    ctx: &Context,
    control: &Control,
) -> Result<ResultsDocument, EngineError> {
    let d = &c.decoded;
    let normaliser =
        ctx.normalisers
            .normaliser(d.raster_key.as_deref(), &d.raster, &d.evidence, control)?;
    let zones = engine::execute(
        &c.plan,
        &d.raster,
        &d.zones,
        &normaliser,
        &d.settings,
        control,
    )?;
    Ok(ResultsDocument {
        zones: zones.into_iter().map(Into::into).collect(),
        total: normaliser.check.clone().into(),
    })
}

impl Prepared for Counts {
    fn estimated_cost(&self) -> f64 {
        self.plan.estimated_cost
    }
    fn cells(&self) -> u64 {
        self.decoded.zones.cell_count()
    }
    fn run(self: Box<Self>, ctx: &Context, control: &Control) -> Result<Bytes, ApiError> {
        to_json(&compute(&self, ctx, control).map_err(run_error)?)
    }
}

//! `zone-counts`: the conditional distribution of the event count in each zone given the
//! observed total, plus the total check. Inputs are exactly the document `zonetally eval` reads.

use std::sync::Arc;

use bytes::Bytes;
use serde_json::{json, Value};

use super::{
    check_cost, check_total, engine_error, input, parse_execute, resolve_raster, schema_of,
    Prepared, Process, ResponseMode,
};
use crate::api::problem::ApiError;
use crate::api::state::AppState;
use crate::api::wire::{
    self, EvalRequest, EvidenceSpec, RasterInput, ResultsDocument, SummariesSpec, ZoneSpec,
};
use crate::engine::{self, Control, Plan, Raster, Settings, Zone};

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
        state: &AppState,
    ) -> Result<(ResponseMode, Box<dyn Prepared>), ApiError> {
        let (req, mode): (EvalRequest, _) = parse_execute(body, OUTPUT)?;
        let limits = state.config().limits();
        let settings = wire::decode_settings(req.summaries)
            .map_err(|e| ApiError::from_decode(e, "/inputs"))?;
        let (hash, raster) = resolve_raster(req.raster, state)?;
        let zones = wire::decode_zones(req.zones, &raster, &limits)
            .map_err(|e| ApiError::from_decode(e, "/inputs"))?;
        check_total(&raster, req.evidence.total)?;
        let plan = engine::plan(&raster, &zones);
        check_cost(plan.estimated_cost, state)?;
        Ok((
            mode,
            Box::new(Run {
                hash,
                raster,
                zones,
                total: req.evidence.total,
                settings,
                plan,
            }),
        ))
    }
}

struct Run {
    hash: String,
    raster: Arc<Raster>,
    zones: Vec<Zone>,
    total: u64,
    settings: Settings,
    plan: Plan,
}

impl Prepared for Run {
    fn estimated_cost(&self) -> f64 {
        self.plan.estimated_cost
    }
    fn cells(&self) -> u64 {
        self.zones.iter().map(|z| z.len() as u64).sum()
    }
    fn run(self: Box<Self>, state: &AppState, control: &Control) -> Result<Bytes, ApiError> {
        let normaliser = state
            .caches()
            .normaliser(&self.hash, &self.raster, self.total, control)
            .map_err(engine_error)?;
        let zones = engine::execute(
            &self.plan,
            &self.raster,
            &self.zones,
            &normaliser,
            &self.settings,
            control,
        )
        .map_err(engine_error)?;
        let doc = ResultsDocument {
            zones: zones.into_iter().map(Into::into).collect(),
            total: normaliser.check.clone().into(),
        };
        serde_json::to_vec(&doc)
            .map(Bytes::from)
            .map_err(|e| ApiError::Internal {
                cause: format!("cannot encode results: {e}"),
            })
    }
}

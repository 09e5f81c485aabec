//! `zone-counts`: the conditional distribution of the event count in each zone given the
//! observed total, plus the total check. Inputs are exactly the document `zonetally eval` reads.

use bytes::Bytes;
use serde_json::{json, Value};

use super::total_check::with_strata;
use super::{
    check_cost, input, parse_execute, run_error, schema_of, to_json, Context, Output, Prepared,
    Process, ResponseMode,
};
use crate::api::decode::{self, DecodeError, Decoded, DecodedEvidence};
use crate::api::formats::{self, Format};
use crate::api::problem::ApiError;
use crate::api::wire::{
    EvalRequest, EvidenceSpec, RasterInput, ResultsDocument, SummariesSpec, TotalResult,
    ZoneResult, ZonesDoc,
};
use crate::engine::{self, Control, EngineError, Plan, ZoneSummary};

pub struct ZoneCounts;

const OUTPUT: &str = "counts";

/// The formats of the `counts` output.
pub const FORMATS: [Format; 3] = [Format::Json, Format::GeoJson, Format::Csv];

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
            "zones": input("zones", "the zones to report on: a list of zones (cell lists or rectangles), a GeoJSON Feature or FeatureCollection of polygons, or a label raster", schema_of::<ZonesDoc>(), 1),
            "evidence": input("evidence", "the observed total number of events over all valid cells", schema_of::<EvidenceSpec>(), 1),
            "summaries": input("summaries", "what to report: interval level, exceedance thresholds, pmf, tolerance", schema_of::<SummariesSpec>(), 0),
        })
    }
    fn outputs(&self) -> Value {
        json!({OUTPUT: {"title": "zone counts", "description": "the results document: one entry per zone, in request order, and the total check", "schema": schema_of::<ResultsDocument>()}})
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
        let (req, mode, format): (EvalRequest, _, _) =
            parse_execute(body, OUTPUT, accept, &FORMATS)?;
        let mut counts = prepare(req, ctx).map_err(|e| ApiError::from_decode(e, "/inputs"))?;
        counts.format = format;
        Ok((mode, Box::new(counts)))
    }
}

/// A decoded and planned `zone-counts` request.
pub struct Counts {
    decoded: Decoded,
    plan: Plan,
    /// How `run` encodes the results (JSON unless chosen otherwise).
    pub format: Format,
}

/// Decodes and plans a request document, refusing it when the planned cost is over the limit.
pub fn prepare(req: EvalRequest, ctx: &Context) -> Result<Counts, DecodeError> {
    let decoded = decode::zone_counts(req, &ctx.limits, ctx.rasters)?;
    let plan = engine::plan(&decoded.raster, decoded.zones.engine_zones());
    check_cost(plan.estimated_cost, &ctx.limits, "/zones")?;
    Ok(Counts {
        decoded,
        plan,
        format: Format::Json,
    })
}

/// Runs a prepared request: the normaliser (from the context's source), then the union tree.
pub fn compute(
    c: &Counts,
    ctx: &Context,
    control: &Control,
) -> Result<ResultsDocument, EngineError> {
    let d = &c.decoded;
    let (computed, total) = match &d.evidence {
        DecodedEvidence::Whole(evidence) => {
            let normaliser = ctx.normalisers.normaliser(
                d.raster_key.as_deref(),
                &d.raster,
                evidence,
                control,
            )?;
            let computed = match &d.zones.set {
                Some(set) => {
                    engine::execute(&c.plan, &d.raster, set, &normaliser, &d.settings, control)?
                }
                None => Vec::new(),
            };
            let total = TotalResult::of(
                normaliser.check.clone(),
                d.settings.level(),
                d.settings.pmf(),
            );
            (computed, total)
        }
        DecodedEvidence::Strata(strata) => {
            let run = engine::execute_strata(
                &d.raster,
                d.zones.engine_zones(),
                strata,
                &d.settings,
                control,
            )?;
            let total = with_strata(
                run.total,
                run.strata,
                strata.cell_counts(),
                d.settings.level(),
                d.settings.pmf(),
            );
            (run.zones, total)
        }
    };
    let mut computed: Vec<Option<ZoneSummary>> = computed.into_iter().map(Some).collect();
    let zones = d
        .zones
        .entries
        .iter()
        .map(|entry| {
            let summary = entry
                .slot
                .and_then(|slot| computed.get_mut(slot).and_then(Option::take))
                .unwrap_or_else(|| ZoneSummary::certain_zero(entry.id.clone(), &d.settings));
            let mut result = ZoneResult::from(summary);
            result.nodata_cells = entry.nodata_cells;
            result
        })
        .collect();
    Ok(ResultsDocument { zones, total })
}

impl Prepared for Counts {
    fn estimated_cost(&self) -> f64 {
        self.plan.estimated_cost
    }
    fn cells(&self) -> u64 {
        self.decoded.zones.cell_count()
    }
    fn held_bytes(&self) -> u64 {
        // Four bytes per zone cell; per zone, a summary and its JSON (about 64 bytes a number)
        // with each threshold, and a pmf of up to PMF_ESTIMATE values. Running adds the
        // executor's membership: 12 bytes per raster cell, and for overlapping zones the shared
        // and fringe lists, WORKING_PER_SHARED_CELL bytes per zone cell (a job of 2,000
        // overlapping 100x100 rects, 80 MB of cell lists, peaked 265 MB above them).
        const PMF_ESTIMATE: u64 = 64;
        const WORKING_PER_SHARED_CELL: u64 = 16;
        let zones = self.decoded.zones.entries.len() as u64;
        let numbers = 16 + self.decoded.settings.thresholds().len() as u64 * 2 + PMF_ESTIMATE;
        let cells = self.decoded.zones.cell_count();
        let working = self.decoded.raster.len() as u64 * 12
            + if self.plan.overlapping {
                cells * WORKING_PER_SHARED_CELL
            } else {
                0
            };
        cells * 4 + working + zones * numbers * 64
    }
    fn run(self: Box<Self>, ctx: &Context, control: &Control) -> Result<Output, ApiError> {
        let doc = compute(&self, ctx, control).map_err(run_error)?;
        encode(&self, &doc)
    }
}

/// Encodes a results document in the request's format.
pub fn encode(c: &Counts, doc: &ResultsDocument) -> Result<Output, ApiError> {
    let body = match c.format {
        Format::Json | Format::GeoTiff => return to_json(doc),
        Format::GeoJson => formats::zone_counts_geojson(doc, &c.decoded.zones, &c.decoded.frame)?,
        Format::Csv => formats::zone_counts_csv(doc)?,
    };
    Ok(Output {
        body: Bytes::from(body),
        format: c.format,
    })
}

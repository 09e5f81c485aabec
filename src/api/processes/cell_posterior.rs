//! `cell-posterior`: the posterior event probability of single cells given the observed total.

use bytes::Bytes;
use serde_json::{json, Value};

use super::total_check::with_strata;
use super::{
    check_cost, input, parse_execute, run_error, schema_of, to_json, Context, Output, Prepared,
    Process, ResponseMode,
};
use crate::api::decode::{self, DecodeError, DecodedCells, DecodedEvidence, Frame};
use crate::api::formats::{self, Format};
use crate::api::problem::ApiError;
use crate::api::wire::{
    CellPosteriorOut, EvidenceSpec, PosteriorDocument, PosteriorInputs, PosteriorSummaries,
    RasterInput, TotalResult,
};
use crate::engine::{self, CellPlan, Control, EngineError, Raster, Settings, DEFAULT_LEVEL};

pub struct CellPosteriorProcess;

const OUTPUT: &str = "posterior";

/// The formats of the `posterior` output.
pub const FORMATS: [Format; 2] = [Format::Json, Format::GeoTiff];

impl Process for CellPosteriorProcess {
    fn id(&self) -> &'static str {
        "cell-posterior"
    }
    fn title(&self) -> &'static str {
        "Per-cell posterior event probabilities given the observed total"
    }
    fn description(&self) -> &'static str {
        "For each requested cell (all valid cells by default), its prior probability and its probability of holding an event given the total observed over the raster, with a certified error bound, plus the total check."
    }
    fn output(&self) -> &'static str {
        OUTPUT
    }
    fn inputs(&self) -> Value {
        json!({
            "raster": input("probability raster", "per-cell event probabilities, inline or as {\"ref\": \"sha256:...\"} from POST /rasters", schema_of::<RasterInput>(), 1),
            "evidence": input("evidence", "the observed total number of events over all valid cells", schema_of::<EvidenceSpec>(), 1),
            "cells": input("cells", "row-major indices of the cells to report; all valid cells when absent", schema_of::<Vec<u32>>(), 0),
            "summaries": input("summaries", "accuracy target", schema_of::<PosteriorSummaries>(), 0),
        })
    }
    fn outputs(&self) -> Value {
        json!({OUTPUT: {"title": "posterior", "description": "prior and posterior probability of each requested cell, and the total check", "schema": schema_of::<PosteriorDocument>()}})
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
        let (req, mode, format): (PosteriorInputs, _, _) =
            parse_execute(body, OUTPUT, accept, &FORMATS)?;
        let mut cells = prepare(req, ctx).map_err(|e| ApiError::from_decode(e, "/inputs"))?;
        cells.format = format;
        Ok((mode, Box::new(cells)))
    }
}

/// A decoded and planned `cell-posterior` request.
pub struct Cells {
    raster_key: Option<String>,
    raster: std::sync::Arc<Raster>,
    frame: Frame,
    evidence: DecodedEvidence,
    settings: Settings,
    plan: CellPlan,
    /// How `run` encodes the results (JSON unless chosen otherwise).
    pub format: Format,
}

/// Decodes and plans a request, refusing it when the planned cost is over the limit.
pub fn prepare(req: PosteriorInputs, ctx: &Context) -> Result<Cells, DecodeError> {
    let d: DecodedCells = decode::cell_posterior(req, &ctx.limits, ctx.rasters)?;
    let plan = engine::plan_cells(&d.raster, d.cells);
    check_cost(plan.estimated_cost(), &ctx.limits, "/cells")?;
    Ok(Cells {
        raster_key: d.raster_key,
        raster: d.raster,
        frame: d.frame,
        evidence: d.evidence,
        settings: d.settings,
        plan,
        format: Format::Json,
    })
}

/// Runs a prepared request.
pub fn compute(
    c: &Cells,
    ctx: &Context,
    control: &Control,
) -> Result<PosteriorDocument, EngineError> {
    let d = c;
    let (post, total) = match &d.evidence {
        DecodedEvidence::Whole(evidence) => {
            let normaliser = ctx.normalisers.normaliser(
                d.raster_key.as_deref(),
                &d.raster,
                evidence,
                control,
            )?;
            let post = engine::posterior(&d.raster, &c.plan, &normaliser, &d.settings, control)?;
            (
                post,
                TotalResult::of(normaliser.check.clone(), DEFAULT_LEVEL, true),
            )
        }
        DecodedEvidence::Strata(strata) => {
            let cells: Vec<u32> = c.plan.requested().collect();
            let post =
                engine::cell_posterior_strata(&d.raster, &cells, strata, &d.settings, control)?;
            let run = engine::execute_strata(&d.raster, &[], strata, &d.settings, control)?;
            (
                post,
                with_strata(
                    run.total,
                    run.strata,
                    strata.cell_counts(),
                    DEFAULT_LEVEL,
                    true,
                ),
            )
        }
    };
    Ok(PosteriorDocument {
        cells: post
            .cells
            .into_iter()
            .map(|(cell, prior, posterior)| CellPosteriorOut {
                cell,
                prior,
                posterior,
            })
            .collect(),
        error_bound: post.error_bound,
        total,
    })
}

impl Prepared for Cells {
    fn estimated_cost(&self) -> f64 {
        self.plan.estimated_cost()
    }
    fn cells(&self) -> u64 {
        self.plan.cells() as u64
    }
    fn held_bytes(&self) -> u64 {
        // Per reported cell: its triple and its JSON (about 64 bytes a number).
        self.plan.cells() as u64 * (24 + 3 * 64)
    }
    fn run(self: Box<Self>, ctx: &Context, control: &Control) -> Result<Output, ApiError> {
        let doc = compute(&self, ctx, control).map_err(run_error)?;
        match self.format {
            Format::GeoTiff => Ok(Output {
                body: Bytes::from(formats::posterior_tiff(&doc, &self.raster, &self.frame)?),
                format: Format::GeoTiff,
            }),
            _ => to_json(&doc),
        }
    }
}

//! `cell-posterior`: the posterior event probability of single cells given the observed total.

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
    CellPosteriorOut, EvidenceSpec, PosteriorDocument, PosteriorInputs, PosteriorSummaries,
    RasterInput,
};
use crate::engine::{self, Control, Raster, Settings, DEFAULT_LEVEL, DEFAULT_TOLERANCE};

/// Multiply-adds charged per valid cell of the raster and per requested cell; the engine's
/// planner has no posterior cost yet, so this mirrors its per-cell folding charge.
const COST_PER_CELL: f64 = 48.0;

pub struct CellPosteriorProcess;

const OUTPUT: &str = "posterior";

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
    fn prepare(
        &self,
        body: &[u8],
        state: &AppState,
    ) -> Result<(ResponseMode, Box<dyn Prepared>), ApiError> {
        let (req, mode): (PosteriorInputs, _) = parse_execute(body, OUTPUT)?;
        let tolerance = req.summaries.tolerance.unwrap_or(DEFAULT_TOLERANCE);
        let settings = Settings::new(DEFAULT_LEVEL, Vec::new(), tolerance, false).map_err(|e| {
            ApiError::InvalidInput {
                pointer: "/inputs/summaries/tolerance".into(),
                detail: e.to_string(),
            }
        })?;
        let (hash, raster) = resolve_raster(req.raster, state)?;
        let limit = state.config().max_zone_cells;
        if let Some(cells) = &req.cells {
            if cells.len() as u64 > limit {
                return Err(ApiError::TooLarge {
                    pointer: "/inputs/cells".into(),
                    detail: format!("{} cells exceed this service's limit of {limit}: send them in several requests", cells.len()),
                });
            }
            check_cells(cells, &raster)?;
        }
        check_total(&raster, req.evidence.total)?;
        let requested = req
            .cells
            .as_ref()
            .map_or(raster.stats().valid, |c| c.len() as u64);
        let cost = COST_PER_CELL * (raster.stats().valid + requested) as f64;
        check_cost(cost, state)?;
        Ok((
            mode,
            Box::new(Run {
                hash,
                raster,
                cells: req.cells,
                total: req.evidence.total,
                settings,
                cost,
                requested,
            }),
        ))
    }
}

fn check_cells(cells: &[u32], raster: &Raster) -> Result<(), ApiError> {
    let (w, h, last) = (raster.width(), raster.height(), raster.len() as u64 - 1);
    for (i, &c) in cells.iter().enumerate() {
        let pointer = format!("/inputs/cells/{i}");
        if c as u64 > last {
            return Err(ApiError::InvalidInput {
                pointer,
                detail: format!("cell {c} lies outside the {w}x{h} raster (last index {last})"),
            });
        }
        if raster.values()[c as usize].is_nan() {
            return Err(ApiError::InvalidInput {
                pointer,
                detail: format!(
                    "cell {c} is nodata (outside the study area): remove it from the list"
                ),
            });
        }
    }
    Ok(())
}

struct Run {
    hash: String,
    raster: Arc<Raster>,
    cells: Option<Vec<u32>>,
    total: u64,
    settings: Settings,
    cost: f64,
    requested: u64,
}

impl Prepared for Run {
    fn estimated_cost(&self) -> f64 {
        self.cost
    }
    fn cells(&self) -> u64 {
        self.requested
    }
    fn run(self: Box<Self>, state: &AppState, control: &Control) -> Result<Bytes, ApiError> {
        let normaliser = state
            .caches()
            .normaliser(&self.hash, &self.raster, self.total, control)
            .map_err(engine_error)?;
        let post = engine::cell_posterior(
            &self.raster,
            self.cells.as_deref(),
            &normaliser,
            &self.settings,
            control,
        )
        .map_err(engine_error)?;
        let doc = PosteriorDocument {
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
            total: normaliser.check.clone().into(),
        };
        serde_json::to_vec(&doc)
            .map(Bytes::from)
            .map_err(|e| ApiError::Internal {
                cause: format!("cannot encode results: {e}"),
            })
    }
}

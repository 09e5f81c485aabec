//! The one decoding path: request documents (wire types) into validated engine types, shared by
//! `zonetally eval` and every process of the service. After it nothing is validated again.
//!
//! Errors carry a JSON pointer relative to the request document (the service prefixes
//! `/inputs`), the value and a hint. Engine construction errors are mapped by their kind and
//! fields, never by their text. Where a raster comes from is the caller's `RasterSource`: the
//! service resolves references from its cache, `eval` refuses them. Decoders of other formats
//! (GeoTIFF, GeoJSON) go beside the JSON ones here, each producing the same engine types.

use std::sync::Arc;

use crate::engine::{
    CellSelection, EngineError, Evidence, Missing, Raster, RasterProblem, SettingProblem, Settings,
    Zone, ZoneProblem, ZoneSet, DEFAULT_LEVEL, DEFAULT_TOLERANCE,
};
use crate::geo::rect::{rect_cells, RectProblem};

use super::wire::{
    EvalRequest, EvidenceSpec, PosteriorInputs, RasterInput, RasterSpec, RectSpec, SummariesSpec,
    ZoneSpec,
};

/// Size limits checked while decoding and planning, before the large allocations.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct Limits {
    pub max_cells: u64,
    pub max_zones: usize,
    pub max_zone_cells: u64,
    /// Largest planned cost (the planner's multiply-adds).
    pub max_cost: f64,
}

impl Default for Limits {
    /// The command line's limits: generous, as the user runs on their own machine.
    fn default() -> Self {
        Limits {
            max_cells: 100_000_000,
            max_zones: 1_000_000,
            max_zone_cells: 400_000_000,
            max_cost: f64::INFINITY,
        }
    }
}

/// What kind of failure a decoding error is.
#[derive(Clone, Debug, PartialEq)]
pub enum DecodeKind {
    /// The content is wrong.
    Invalid,
    /// A size limit, not the content, was the problem.
    TooLarge,
    /// A raster reference names nothing held.
    UnknownRaster { reference: String },
}

/// A decoding failure: where (a JSON pointer into the document) and what, with a hint.
#[derive(Clone, Debug, PartialEq)]
pub struct DecodeError {
    pub pointer: String,
    pub detail: String,
    pub kind: DecodeKind,
}

impl std::fmt::Display for DecodeError {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        write!(f, "{} (at {})", self.detail, self.pointer)
    }
}

impl DecodeError {
    pub fn at(pointer: impl Into<String>, detail: impl Into<String>) -> DecodeError {
        DecodeError {
            pointer: pointer.into(),
            detail: detail.into(),
            kind: DecodeKind::Invalid,
        }
    }
    pub fn limit(pointer: impl Into<String>, detail: impl Into<String>) -> DecodeError {
        DecodeError {
            pointer: pointer.into(),
            detail: detail.into(),
            kind: DecodeKind::TooLarge,
        }
    }
}

/// Where rasters come from and go: references resolved, inline rasters kept.
pub trait RasterSource: Sync {
    /// The raster held under `reference` and its key. Errors point at `/raster/ref`.
    fn resolve(&self, reference: &str) -> Result<(String, Arc<Raster>), DecodeError>;
    /// Keeps an inline raster; returns its key (when this source keys rasters) and the copy held.
    fn keep(&self, raster: Raster) -> (Option<String>, Arc<Raster>);
}

/// The command line's source: rasters are inline, references cannot be resolved.
pub struct InlineOnly;

impl RasterSource for InlineOnly {
    fn resolve(&self, reference: &str) -> Result<(String, Arc<Raster>), DecodeError> {
        Err(DecodeError::at(
            "/raster/ref",
            format!(
                "raster `{reference}` is a reference, which only the service (`zonetally serve`, POST /rasters) can resolve: put the raster inline (`width`, `height`, `values`)"
            ),
        ))
    }
    fn keep(&self, raster: Raster) -> (Option<String>, Arc<Raster>) {
        (None, Arc::new(raster))
    }
}

/// A `zone-counts` request after validation: engine types only.
#[derive(Clone, Debug)]
pub struct Decoded {
    /// The raster's key in its source (its content hash in the service), for caching.
    pub raster_key: Option<String>,
    pub raster: Arc<Raster>,
    pub zones: ZoneSet,
    pub evidence: Evidence,
    pub settings: Settings,
}

/// A `cell-posterior` request after validation.
#[derive(Clone, Debug)]
pub struct DecodedCells {
    pub raster_key: Option<String>,
    pub raster: Arc<Raster>,
    pub cells: CellSelection,
    pub evidence: Evidence,
    pub settings: Settings,
}

/// Decodes a `zone-counts` request document: summaries, raster, zones, evidence, in that order.
pub fn zone_counts(
    req: EvalRequest,
    limits: &Limits,
    rasters: &dyn RasterSource,
) -> Result<Decoded, DecodeError> {
    let settings = settings(req.summaries)?;
    let (raster_key, raster) = raster_input(req.raster, limits, rasters)?;
    let zones = zones(req.zones, &raster, limits)?;
    let evidence = evidence(req.evidence, &raster)?;
    Ok(Decoded {
        raster_key,
        raster,
        zones,
        evidence,
        settings,
    })
}

/// Decodes a `cell-posterior` request document.
pub fn cell_posterior(
    req: PosteriorInputs,
    limits: &Limits,
    rasters: &dyn RasterSource,
) -> Result<DecodedCells, DecodeError> {
    let tolerance = req.summaries.tolerance.unwrap_or(DEFAULT_TOLERANCE);
    let settings = Settings::new(DEFAULT_LEVEL, Vec::new(), tolerance, false)
        .map_err(|e| DecodeError::at("/summaries/tolerance", e.to_string()))?;
    let (raster_key, raster) = raster_input(req.raster, limits, rasters)?;
    if let Some(cells) = &req.cells {
        if cells.len() as u64 > limits.max_zone_cells {
            return Err(DecodeError::limit(
                "/cells",
                format!(
                    "{} cells exceed this service's limit of {}: send them in several requests",
                    cells.len(),
                    limits.max_zone_cells
                ),
            ));
        }
    }
    let cells = CellSelection::new(&raster, req.cells.as_deref()).map_err(|e| {
        let pointer = match &e {
            EngineError::InvalidCell { position, .. } => format!("/cells/{position}"),
            EngineError::NothingToDo(Missing::Cells) if req.cells.is_none() => "/raster".into(),
            _ => "/cells".into(),
        };
        DecodeError::at(pointer, e.to_string())
    })?;
    let evidence = evidence(req.evidence, &raster)?;
    Ok(DecodedCells {
        raster_key,
        raster,
        cells,
        evidence,
        settings,
    })
}

/// The raster of a request: resolved by reference, or decoded and kept.
fn raster_input(
    input: RasterInput,
    limits: &Limits,
    rasters: &dyn RasterSource,
) -> Result<(Option<String>, Arc<Raster>), DecodeError> {
    match input {
        RasterInput::Ref(r) => {
            let (key, raster) = rasters.resolve(&r.reference)?;
            Ok((Some(key), raster))
        }
        RasterInput::Inline(spec) => Ok(rasters.keep(raster(spec, limits)?)),
    }
}

/// Decodes an inline raster; `nodata` values become nodata cells. Pointers start at `/raster`.
pub fn raster(spec: RasterSpec, limits: &Limits) -> Result<Raster, DecodeError> {
    let cells = spec.width as u64 * spec.height as u64;
    if cells > limits.max_cells {
        return Err(DecodeError::limit(
            "/raster",
            format!(
                "raster is {}x{} = {cells} cells, above this service's limit of {} cells: split the area or coarsen the raster",
                spec.width, spec.height, limits.max_cells
            ),
        ));
    }
    let nodata = spec.nodata;
    let values = spec
        .values
        .into_iter()
        .map(|v| match (v, nodata) {
            (Some(x), Some(nd)) if x == nd => None,
            (v, _) => v,
        })
        .collect();
    Raster::new(spec.width, spec.height, values).map_err(|e| {
        let pointer = match &e {
            EngineError::InvalidValue { cell, .. } => format!("/raster/values/{cell}"),
            EngineError::InvalidRaster(RasterProblem::ValueCount { .. }) => "/raster/values".into(),
            _ => "/raster".into(),
        };
        DecodeError::at(pointer, e.to_string())
    })
}

/// Decodes the zones against their raster, checking the counts first.
fn zones(specs: Vec<ZoneSpec>, raster: &Raster, limits: &Limits) -> Result<ZoneSet, DecodeError> {
    if specs.len() > limits.max_zones {
        return Err(DecodeError::limit(
            "/zones",
            format!(
                "{} zones exceed this service's limit of {}: send them in several requests",
                specs.len(),
                limits.max_zones
            ),
        ));
    }
    let mut budget = limits.max_zone_cells;
    let mut zones = Vec::with_capacity(specs.len());
    for (i, spec) in specs.into_iter().enumerate() {
        let base = format!("/zones/{i}");
        let (cells, from_rect) = match (spec.cells, spec.rect) {
            (Some(_), Some(_)) => {
                return Err(DecodeError::at(
                    base,
                    format!(
                        "zone `{}` gives both `cells` and `rect`: give exactly one",
                        spec.id
                    ),
                ))
            }
            (None, None) => {
                return Err(DecodeError::at(
                    base,
                    format!(
                        "zone `{}` gives neither `cells` nor `rect`: give one",
                        spec.id
                    ),
                ))
            }
            (Some(c), None) => (c, false),
            (None, Some(r)) => (rect(&spec.id, r, raster, &base)?, true),
        };
        if cells.len() as u64 > budget {
            return Err(DecodeError::limit(
                base,
                format!(
                    "zones hold more than this service's limit of {} cells in all: send fewer or smaller zones",
                    limits.max_zone_cells
                ),
            ));
        }
        budget -= cells.len() as u64;
        let zone = Zone::new(spec.id, cells, raster).map_err(|e| {
            let pointer = match &e {
                EngineError::InvalidZone { .. } if from_rect => format!("{base}/rect"),
                EngineError::InvalidZone {
                    problem: ZoneProblem::Cell { position, .. },
                    ..
                } => format!("{base}/cells/{position}"),
                _ => format!("{base}/cells"),
            };
            DecodeError::at(pointer, e.to_string())
        })?;
        zones.push(zone);
    }
    ZoneSet::new(zones).map_err(|e| {
        let pointer = match &e {
            EngineError::InvalidZone {
                problem: ZoneProblem::DuplicateId { second, .. },
                ..
            } => format!("/zones/{second}/id"),
            _ => "/zones".into(),
        };
        DecodeError::at(pointer, e.to_string())
    })
}

fn rect(id: &str, r: RectSpec, raster: &Raster, base: &str) -> Result<Vec<u32>, DecodeError> {
    let (w, h) = (raster.width(), raster.height());
    rect_cells(w, h, r.row, r.col, r.rows, r.cols).map_err(|p| {
        let detail = match p {
            RectProblem::Empty => format!(
                "zone `{id}` has an empty rect ({}x{}): rows and cols must be at least 1",
                r.rows, r.cols
            ),
            RectProblem::Leaves => format!(
                "zone `{id}` rect rows {}..{} x cols {}..{} leaves the {w}x{h} raster: keep row + rows <= {h} and col + cols <= {w}",
                r.row,
                r.row as u64 + r.rows as u64,
                r.col,
                r.col as u64 + r.cols as u64
            ),
        };
        DecodeError::at(format!("{base}/rect"), detail)
    })
}

/// Decodes the summaries part.
fn settings(spec: SummariesSpec) -> Result<Settings, DecodeError> {
    let thresholds = spec.exceedance.unwrap_or_default();
    Settings::new(
        spec.interval.unwrap_or(DEFAULT_LEVEL),
        thresholds,
        spec.tolerance.unwrap_or(DEFAULT_TOLERANCE),
        spec.pmf.unwrap_or(true),
    )
    .map_err(|e| {
        let field = match &e {
            EngineError::InvalidSetting(SettingProblem::Level(_)) => "/summaries/interval",
            EngineError::InvalidSetting(SettingProblem::Tolerance { .. }) => "/summaries/tolerance",
            _ => "/summaries",
        };
        DecodeError::at(field, e.to_string())
    })
}

/// Decodes the evidence against the raster.
fn evidence(spec: EvidenceSpec, raster: &Raster) -> Result<Evidence, DecodeError> {
    Evidence::exact_total(spec.total, raster)
        .map_err(|e| DecodeError::at("/evidence/total", e.to_string()))
}

//! Wire types of the request and results documents, and their one-time conversion into
//! validated engine types.
//!
//! The request document is the same for `zonetally eval` and for the service's process inputs.
//! Decoding errors carry a JSON pointer (relative to the document) to the offending field, the
//! value, and a hint; after `decode` nothing is validated again.

use serde::{Deserialize, Serialize};
use utoipa::ToSchema;

use crate::engine::{
    self, EngineError, Evaluation, Raster, Settings, TotalCheck, Zone, ZoneSummary, DEFAULT_LEVEL,
    DEFAULT_TOLERANCE,
};

/// The raster as sent: row-major values, row 0 at the top; `null` or the `nodata` value marks
/// cells outside the study area.
#[derive(Clone, Debug, Deserialize, Serialize, ToSchema)]
#[serde(deny_unknown_fields)]
pub struct RasterSpec {
    pub width: u32,
    pub height: u32,
    /// `width * height` probabilities in [0, 1], row-major; `null` for nodata.
    pub values: Vec<Option<f64>>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub nodata: Option<f64>,
}

/// A raster by content hash, as returned by `POST /rasters`.
#[derive(Clone, Debug, Deserialize, Serialize, ToSchema)]
#[serde(deny_unknown_fields)]
pub struct RasterRef {
    /// `sha256:` and 64 lowercase hex digits.
    #[serde(rename = "ref")]
    pub reference: String,
}

/// The `raster` field: inline, or a reference to a raster the service holds.
#[derive(Clone, Debug, Deserialize, Serialize, ToSchema)]
#[serde(untagged, try_from = "RasterFields")]
pub enum RasterInput {
    Inline(RasterSpec),
    Ref(RasterRef),
}

impl From<RasterSpec> for RasterInput {
    fn from(spec: RasterSpec) -> Self {
        RasterInput::Inline(spec)
    }
}

/// Every field either form may carry; `TryFrom` picks the form, so a mistake names the field.
#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct RasterFields {
    #[serde(rename = "ref")]
    reference: Option<String>,
    width: Option<u32>,
    height: Option<u32>,
    values: Option<Vec<Option<f64>>>,
    nodata: Option<f64>,
}

impl TryFrom<RasterFields> for RasterInput {
    type Error = String;
    fn try_from(f: RasterFields) -> Result<Self, String> {
        match (f.reference, f.width, f.height, f.values) {
            (Some(r), None, None, None) if f.nodata.is_none() => Ok(RasterInput::Ref(RasterRef { reference: r })),
            (Some(_), ..) => Err("a raster given by `ref` takes no other field: send either `ref` alone or `width`, `height` and `values`".into()),
            (None, Some(width), Some(height), Some(values)) => {
                Ok(RasterInput::Inline(RasterSpec { width, height, values, nodata: f.nodata }))
            }
            (None, w, h, v) => {
                let missing: Vec<&str> = [("width", w.is_none()), ("height", h.is_none()), ("values", v.is_none())]
                    .into_iter()
                    .filter_map(|(n, m)| m.then_some(n))
                    .collect();
                Err(format!(
                    "the raster lacks `{}`: send `width`, `height` and `values` (or `ref` from POST /rasters)",
                    missing.join("`, `")
                ))
            }
        }
    }
}

/// A rectangle of cells: `rows` x `cols` cells from (`row`, `col`), row 0 at the top.
#[derive(Clone, Copy, Debug, Deserialize, Serialize, ToSchema)]
#[serde(deny_unknown_fields)]
pub struct RectSpec {
    pub row: u32,
    pub col: u32,
    pub rows: u32,
    pub cols: u32,
}

/// A zone: an id and either a list of cell indices or a rectangle.
#[derive(Clone, Debug, Deserialize, Serialize, ToSchema)]
#[serde(deny_unknown_fields)]
pub struct ZoneSpec {
    pub id: String,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub cells: Option<Vec<u32>>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub rect: Option<RectSpec>,
}

#[derive(Clone, Copy, Debug, Deserialize, Serialize, ToSchema)]
#[serde(deny_unknown_fields)]
pub struct EvidenceSpec {
    /// The observed number of events over all valid cells.
    pub total: u64,
}

/// What to report. Every field is optional.
#[derive(Clone, Debug, Default, Deserialize, Serialize, ToSchema)]
#[serde(deny_unknown_fields)]
pub struct SummariesSpec {
    /// Credible level of the equal-tailed interval (default 0.9).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub interval: Option<f64>,
    /// Thresholds k for P(N >= k).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub exceedance: Option<Vec<u64>>,
    /// Whether to report the pmf (default true).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub pmf: Option<bool>,
    /// Accuracy target (default 1e-13); looser is faster.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub tolerance: Option<f64>,
}

/// The request document read by `zonetally eval` and taken as process inputs.
#[derive(Clone, Debug, Deserialize, Serialize, ToSchema)]
#[serde(deny_unknown_fields)]
pub struct EvalRequest {
    pub raster: RasterInput,
    pub zones: Vec<ZoneSpec>,
    pub evidence: EvidenceSpec,
    #[serde(default)]
    pub summaries: SummariesSpec,
}

/// Size limits checked while decoding, before the large allocations.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct Limits {
    pub max_cells: u64,
    pub max_zones: usize,
    pub max_zone_cells: u64,
}

impl Default for Limits {
    fn default() -> Self {
        Limits {
            max_cells: 100_000_000,
            max_zones: 1_000_000,
            max_zone_cells: 400_000_000,
        }
    }
}

/// A decoding failure: where (a JSON pointer into the document) and what, with a hint.
#[derive(Clone, Debug, PartialEq)]
pub struct DecodeError {
    pub pointer: String,
    pub detail: String,
    /// True when a size limit, not the content, was the problem.
    pub too_large: bool,
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
            too_large: false,
        }
    }
    pub fn limit(pointer: impl Into<String>, detail: impl Into<String>) -> DecodeError {
        DecodeError {
            pointer: pointer.into(),
            detail: detail.into(),
            too_large: true,
        }
    }
}

/// A request after validation: engine types only.
#[derive(Clone, Debug)]
pub struct Decoded {
    pub raster: Raster,
    pub zones: Vec<Zone>,
    pub total: u64,
    pub settings: Settings,
}

/// Maps an engine error raised while evaluating a decoded request to its field.
pub fn engine_pointer(err: &EngineError) -> &'static str {
    match err {
        EngineError::ImpossibleTotal(_) => "/evidence/total",
        EngineError::InvalidValue { .. } | EngineError::InvalidRaster(_) => "/raster",
        EngineError::InvalidZone { .. } | EngineError::NothingToDo(_) => "/zones",
        EngineError::InvalidSetting { .. } => "/summaries",
        EngineError::TooLarge(_) | EngineError::Cancelled => "",
    }
}

/// Decodes the raster part; `nodata` values become nodata cells.
pub fn decode_raster(spec: RasterSpec, limits: &Limits) -> Result<Raster, DecodeError> {
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
    Raster::new(spec.width, spec.height, values).map_err(|e| match e {
        EngineError::InvalidValue { cell, detail } => {
            DecodeError::at(format!("/raster/values/{cell}"), detail)
        }
        EngineError::InvalidRaster(d) if d.contains("values were given") => {
            DecodeError::at("/raster/values", d)
        }
        other => DecodeError::at("/raster", other.to_string()),
    })
}

/// Decodes the zones against their raster.
pub fn decode_zones(
    specs: Vec<ZoneSpec>,
    raster: &Raster,
    limits: &Limits,
) -> Result<Vec<Zone>, DecodeError> {
    if specs.is_empty() {
        return Err(DecodeError::at(
            "/zones",
            "the zone list is empty: give at least one zone",
        ));
    }
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
        let cells = match (spec.cells, spec.rect) {
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
            (Some(c), None) => c,
            (None, Some(r)) => rect_cells(&spec.id, r, raster, &base)?,
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
        let zone = Zone::new(spec.id, cells, raster).map_err(|e| match e {
            EngineError::InvalidZone {
                position: Some(p),
                detail,
                ..
            } => DecodeError::at(format!("{base}/cells/{p}"), detail),
            other => DecodeError::at(format!("{base}/cells"), other.to_string()),
        })?;
        zones.push(zone);
    }
    engine::check_unique_ids(&zones).map_err(|e| {
        let pos = match &e {
            EngineError::InvalidZone { zone, .. } => {
                zones.iter().rposition(|z| z.id() == zone).unwrap_or(0)
            }
            _ => 0,
        };
        DecodeError::at(format!("/zones/{pos}/id"), e.to_string())
    })?;
    Ok(zones)
}

fn rect_cells(id: &str, r: RectSpec, raster: &Raster, base: &str) -> Result<Vec<u32>, DecodeError> {
    let (w, h) = (raster.width(), raster.height());
    if r.rows == 0 || r.cols == 0 {
        return Err(DecodeError::at(
            format!("{base}/rect"),
            format!(
                "zone `{id}` has an empty rect ({}x{}): rows and cols must be at least 1",
                r.rows, r.cols
            ),
        ));
    }
    let fits = r.row as u64 + r.rows as u64 <= h as u64 && r.col as u64 + r.cols as u64 <= w as u64;
    if !fits {
        return Err(DecodeError::at(
            format!("{base}/rect"),
            format!(
                "zone `{id}` rect rows {}..{} x cols {}..{} leaves the {w}x{h} raster: keep row + rows <= {h} and col + cols <= {w}",
                r.row,
                r.row as u64 + r.rows as u64,
                r.col,
                r.col as u64 + r.cols as u64
            ),
        ));
    }
    Ok((r.row..r.row + r.rows)
        .flat_map(|y| (r.col..r.col + r.cols).map(move |x| y * w + x))
        .collect())
}

/// Decodes the summaries part.
pub fn decode_settings(spec: SummariesSpec) -> Result<Settings, DecodeError> {
    let thresholds = spec.exceedance.unwrap_or_default();
    Settings::new(
        spec.interval.unwrap_or(DEFAULT_LEVEL),
        thresholds,
        spec.tolerance.unwrap_or(DEFAULT_TOLERANCE),
        spec.pmf.unwrap_or(true),
    )
    .map_err(|e| match e {
        EngineError::InvalidSetting { field, detail } => {
            DecodeError::at(format!("/summaries/{field}"), detail)
        }
        other => DecodeError::at("/summaries", other.to_string()),
    })
}

/// Decodes a whole request document whose raster is inline; a raster reference is an error
/// here, as only the service holds referenced rasters.
pub fn decode(req: EvalRequest, limits: &Limits) -> Result<Decoded, DecodeError> {
    let settings = decode_settings(req.summaries)?;
    let raster = match req.raster {
        RasterInput::Inline(spec) => decode_raster(spec, limits)?,
        RasterInput::Ref(r) => {
            return Err(DecodeError::at(
                "/raster/ref",
                format!(
                    "raster `{}` is a reference, which only the service (`zonetally serve`, POST /rasters) can resolve: put the raster inline (`width`, `height`, `values`)",
                    r.reference
                ),
            ))
        }
    };
    let zones = decode_zones(req.zones, &raster, limits)?;
    Ok(Decoded {
        raster,
        zones,
        total: req.evidence.total,
        settings,
    })
}

/// The pmf of a zone: `values[i]` is P(N = offset + i).
#[derive(Clone, Debug, Serialize, Deserialize, PartialEq, ToSchema)]
pub struct PmfOut {
    pub offset: u64,
    pub values: Vec<f64>,
}

#[derive(Clone, Copy, Debug, Serialize, Deserialize, PartialEq, ToSchema)]
pub struct IntervalOut {
    pub level: f64,
    pub lower: u64,
    pub upper: u64,
}

#[derive(Clone, Copy, Debug, Serialize, Deserialize, PartialEq, ToSchema)]
pub struct ExceedanceOut {
    pub k: u64,
    pub p: f64,
}

#[derive(Clone, Copy, Debug, Serialize, Deserialize, PartialEq, ToSchema)]
pub struct PriorOut {
    pub mean: f64,
    pub sd: f64,
}

/// One zone's results.
#[derive(Clone, Debug, Serialize, Deserialize, PartialEq, ToSchema)]
pub struct ZoneResult {
    pub id: String,
    pub cells: usize,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub pmf: Option<PmfOut>,
    pub mean: f64,
    pub sd: f64,
    pub mode: u64,
    pub median: u64,
    pub interval: IntervalOut,
    pub exceedance: Vec<ExceedanceOut>,
    pub prior: PriorOut,
    pub error_bound: f64,
}

/// The total check.
#[derive(Clone, Debug, Serialize, Deserialize, PartialEq, ToSchema)]
pub struct TotalResult {
    pub observed: u64,
    pub prior_mean: f64,
    pub prior_sd: f64,
    pub z_score: Option<f64>,
    pub p_at_most: f64,
    pub p_at_least: f64,
    pub log_p_equal: f64,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub warning: Option<String>,
}

/// The results document.
#[derive(Clone, Debug, Serialize, Deserialize, PartialEq, ToSchema)]
pub struct ResultsDocument {
    pub zones: Vec<ZoneResult>,
    pub total: TotalResult,
}

impl From<ZoneSummary> for ZoneResult {
    fn from(z: ZoneSummary) -> Self {
        let pmf = (!z.pmf.is_empty()).then_some(PmfOut {
            offset: z.offset,
            values: z.pmf,
        });
        ZoneResult {
            id: z.id,
            cells: z.cells,
            pmf,
            mean: z.mean,
            sd: z.sd,
            mode: z.mode,
            median: z.median,
            interval: IntervalOut {
                level: z.interval.level,
                lower: z.interval.lower,
                upper: z.interval.upper,
            },
            exceedance: z
                .exceedance
                .into_iter()
                .map(|(k, p)| ExceedanceOut { k, p })
                .collect(),
            prior: PriorOut {
                mean: z.prior_mean,
                sd: z.prior_sd,
            },
            error_bound: z.error_bound,
        }
    }
}

impl From<TotalCheck> for TotalResult {
    fn from(t: TotalCheck) -> Self {
        TotalResult {
            observed: t.observed,
            prior_mean: t.prior_mean,
            prior_sd: t.prior_sd,
            z_score: t.z_score,
            p_at_most: t.p_at_most,
            p_at_least: t.p_at_least,
            log_p_equal: t.log_p_equal,
            warning: t.warning,
        }
    }
}

impl From<Evaluation> for ResultsDocument {
    fn from(e: Evaluation) -> Self {
        ResultsDocument {
            zones: e.zones.into_iter().map(Into::into).collect(),
            total: e.total.into(),
        }
    }
}

/// One cell of the `cell-posterior` output.
#[derive(Clone, Copy, Debug, Serialize, Deserialize, PartialEq, ToSchema)]
pub struct CellPosteriorOut {
    pub cell: u32,
    /// Prior probability p of an event in the cell.
    pub prior: f64,
    /// P(event in the cell | observed total).
    pub posterior: f64,
}

/// The `cell-posterior` output.
#[derive(Clone, Debug, Serialize, Deserialize, PartialEq, ToSchema)]
pub struct PosteriorDocument {
    pub cells: Vec<CellPosteriorOut>,
    /// Largest certified error bound over the cells.
    pub error_bound: f64,
    pub total: TotalResult,
}

/// Accuracy settings of a posterior request.
#[derive(Clone, Debug, Default, Deserialize, ToSchema)]
#[serde(deny_unknown_fields)]
pub struct PosteriorSummaries {
    /// Accuracy target (default 1e-13).
    #[serde(default)]
    pub tolerance: Option<f64>,
}

/// The inputs of `cell-posterior`.
#[derive(Clone, Debug, Deserialize, ToSchema)]
#[serde(deny_unknown_fields)]
pub struct PosteriorInputs {
    pub raster: RasterInput,
    pub evidence: EvidenceSpec,
    /// Cells to report, row-major indices; all valid cells when absent.
    #[serde(default)]
    pub cells: Option<Vec<u32>>,
    #[serde(default)]
    pub summaries: PosteriorSummaries,
}

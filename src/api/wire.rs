//! Wire types of the request and results documents (serde and utoipa), and the conversion of
//! engine results into them. Nothing here validates: `decode` turns these into engine types.
//!
//! The request document is the same for `zonetally eval` and for the service's process inputs.

use serde::{Deserialize, Serialize};
use utoipa::ToSchema;

use crate::engine::{Evaluation, TotalCheck, ZoneSummary};

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

//! Wire types of the request and results documents (serde and utoipa), and the conversion of
//! engine results into them. Nothing here validates: `decode` turns these into engine types.
//!
//! The request document is the same for `zonetally eval` and for the service's process inputs.

use serde::{Deserialize, Serialize};
use serde_json::value::RawValue;
use utoipa::ToSchema;

use crate::engine::{summarise, TotalCheck, ZoneSummary};

/// The sample type of `values_base64`: little-endian IEEE 754 floats.
#[derive(Clone, Copy, Debug, Default, Deserialize, Serialize, ToSchema, PartialEq, Eq)]
#[serde(rename_all = "lowercase")]
pub enum SampleType {
    Float32,
    #[default]
    Float64,
}

/// The raster as sent: row-major values, row 0 at the top; `null` or the `nodata` value marks
/// cells outside the study area. Give the values as `values` (JSON numbers) or as
/// `values_base64` (little-endian floats, see `sample_type`), not both.
#[derive(Clone, Debug, Deserialize, Serialize, ToSchema)]
#[serde(deny_unknown_fields)]
pub struct RasterSpec {
    pub width: u32,
    pub height: u32,
    /// `width * height` probabilities in [0, 1], row-major; `null` for nodata.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub values: Option<Vec<Option<f64>>>,
    /// The same values as base64 of little-endian floats (`sample_type`, float64 by default);
    /// NaN or the `nodata` value for nodata.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub values_base64: Option<String>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub sample_type: Option<SampleType>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub nodata: Option<f64>,
    /// Where the raster lies: the six terms `[x0, dx, rx, y0, ry, dy]` mapping (col, row) to map
    /// coordinates (x0, y0 the outer corner of cell (0, 0); north-up: rx = ry = 0, dy < 0).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub geotransform: Option<[f64; 6]>,
    /// EPSG code of the map coordinates, carried to every output.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub crs: Option<u32>,
    /// Multiplies every value before it is checked (e.g. 0.01 for percent); 1 by default.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub scale: Option<f64>,
}

/// A raster by content hash, as returned by `POST /rasters`.
#[derive(Clone, Debug, Deserialize, Serialize, ToSchema)]
#[serde(deny_unknown_fields)]
pub struct RasterRef {
    /// `sha256:` and 64 lowercase hex digits.
    #[serde(rename = "ref")]
    pub reference: String,
}

/// A raster by link: `/rasters/sha256:...` (held by this service) or a GeoTIFF file under the
/// directory the operator mounted with `--data-dir` (a relative path). Nothing is fetched
/// from the network.
#[derive(Clone, Debug, Deserialize, Serialize, ToSchema)]
#[serde(deny_unknown_fields)]
pub struct RasterHref {
    pub href: String,
    /// Multiplies every value (integer rasters: e.g. 0.01 for percent).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub scale: Option<f64>,
}

/// A GeoTIFF sent inside the JSON document (OGC qualified input value).
#[derive(Clone, Debug, Deserialize, Serialize, ToSchema)]
#[serde(deny_unknown_fields)]
pub struct RasterFile {
    /// The file's bytes, base64.
    pub value: String,
    /// `image/tiff; application=geotiff` (or `image/tiff`).
    #[serde(rename = "mediaType")]
    pub media_type: String,
    /// Multiplies every value (integer rasters: e.g. 0.01 for percent).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub scale: Option<f64>,
}

/// The `raster` field: inline values, a reference or link to a raster, or a GeoTIFF.
#[derive(Clone, Debug, Deserialize, Serialize, ToSchema)]
#[serde(untagged, try_from = "RasterFields")]
pub enum RasterInput {
    Inline(RasterSpec),
    Ref(RasterRef),
    Href(RasterHref),
    File(RasterFile),
}

impl From<RasterSpec> for RasterInput {
    fn from(spec: RasterSpec) -> Self {
        RasterInput::Inline(spec)
    }
}

/// Every field any form may carry; `TryFrom` picks the form, so a mistake names the field.
#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct RasterFields {
    #[serde(rename = "ref")]
    reference: Option<String>,
    href: Option<String>,
    value: Option<String>,
    #[serde(rename = "mediaType")]
    media_type: Option<String>,
    width: Option<u32>,
    height: Option<u32>,
    values: Option<Vec<Option<f64>>>,
    values_base64: Option<String>,
    sample_type: Option<SampleType>,
    nodata: Option<f64>,
    geotransform: Option<[f64; 6]>,
    crs: Option<u32>,
    scale: Option<f64>,
}

impl RasterFields {
    /// The inline-only fields present, by name.
    fn inline_fields(&self) -> Vec<&'static str> {
        [
            ("width", self.width.is_some()),
            ("height", self.height.is_some()),
            ("values", self.values.is_some()),
            ("values_base64", self.values_base64.is_some()),
            ("sample_type", self.sample_type.is_some()),
            ("nodata", self.nodata.is_some()),
            ("geotransform", self.geotransform.is_some()),
            ("crs", self.crs.is_some()),
        ]
        .into_iter()
        .filter_map(|(n, present)| present.then_some(n))
        .collect()
    }
}

impl TryFrom<RasterFields> for RasterInput {
    type Error = String;
    fn try_from(f: RasterFields) -> Result<Self, String> {
        let forms: Vec<&str> = [
            ("ref", f.reference.is_some()),
            ("href", f.href.is_some()),
            ("value", f.value.is_some()),
        ]
        .into_iter()
        .filter_map(|(n, present)| present.then_some(n))
        .collect();
        if forms.len() > 1 {
            return Err(format!(
                "the raster gives both `{}`: send one of `ref`, `href`, `value` or the inline fields",
                forms.join("` and `")
            ));
        }
        let inline = f.inline_fields();
        if let Some(form) = forms.first() {
            if !inline.is_empty() {
                return Err(format!(
                    "a raster given by `{form}` takes no `{}`: the file or held raster carries its own grid",
                    inline.join("`, `")
                ));
            }
        }
        if f.media_type.is_some() && f.value.is_none() {
            return Err("`mediaType` goes with `value` (a GeoTIFF as base64)".into());
        }
        if f.scale.is_some() && f.reference.is_some() {
            return Err(
                "a raster given by `ref` takes no `scale`: it was scaled when posted".into(),
            );
        }
        if let Some(reference) = f.reference {
            return Ok(RasterInput::Ref(RasterRef { reference }));
        }
        if let Some(href) = f.href {
            return Ok(RasterInput::Href(RasterHref {
                href,
                scale: f.scale,
            }));
        }
        if let Some(value) = f.value {
            let media_type = f.media_type.ok_or(
                "a raster `value` needs its `mediaType`: `image/tiff; application=geotiff`",
            )?;
            return Ok(RasterInput::File(RasterFile {
                value,
                media_type,
                scale: f.scale,
            }));
        }
        let missing: Vec<&str> = [
            ("width", f.width.is_none()),
            ("height", f.height.is_none()),
            (
                "values` or `values_base64",
                f.values.is_none() && f.values_base64.is_none(),
            ),
        ]
        .into_iter()
        .filter_map(|(n, m)| m.then_some(n))
        .collect();
        match (f.width, f.height) {
            (Some(width), Some(height)) if missing.is_empty() => {
                Ok(RasterInput::Inline(RasterSpec {
                    width,
                    height,
                    values: f.values,
                    values_base64: f.values_base64,
                    sample_type: f.sample_type,
                    nodata: f.nodata,
                    geotransform: f.geotransform,
                    crs: f.crs,
                    scale: f.scale,
                }))
            }
            _ => Err(format!(
                "the raster lacks `{}`: send `width`, `height` and `values` (or `ref` from POST /rasters, `href`, or a GeoTIFF as `value`)",
                missing.join("`, `")
            )),
        }
    }
}

/// A rectangle of cells: `rows` x `cols` cells from (`row`, `col`), row 0 at the top.
#[derive(Clone, Copy, Debug, PartialEq, Deserialize, Serialize, ToSchema)]
#[serde(deny_unknown_fields)]
pub struct RectSpec {
    pub row: u32,
    pub col: u32,
    pub rows: u32,
    pub cols: u32,
}

/// A zone: an id and either a list of cell indices or a rectangle. Nodata cells in it are
/// dropped (and counted in the result's `nodata_cells`), not refused.
#[derive(Clone, Debug, Deserialize, Serialize, ToSchema)]
#[serde(deny_unknown_fields)]
pub struct ZoneSpec {
    pub id: String,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub cells: Option<Vec<u32>>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub rect: Option<RectSpec>,
}

/// What is known about the number of events: one `total` over all valid cells, or `strata`
/// (disjoint sets of cells, each with its own total); not both.
#[derive(Clone, Debug, Deserialize, Serialize, ToSchema)]
#[serde(deny_unknown_fields)]
pub struct EvidenceSpec {
    /// The true total over all valid cells in one of its forms: an exact count (`318`, also
    /// `318.0`), a range (`{"min": 300, "max": 340}`), a detected count under imperfect detection
    /// (`{"detected": 318, "detection": 0.85}`) or a likelihood over totals
    /// (`{"likelihood": {"offset": 300, "values": [...]}}`).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    #[schema(value_type = Option<TotalSpec>)]
    pub total: Option<serde_json::Value>,
    /// Disjoint strata (districts), each with its own evidence on its own total; cells in no
    /// stratum are unconstrained.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub strata: Option<Vec<StratumSpec>>,
    /// A label raster on the raster's grid, for strata chosen by `label`: whole numbers, 0 or
    /// nodata for no stratum.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub labels: Option<RasterInput>,
}

impl EvidenceSpec {
    /// An exact observed total.
    pub fn exact(total: u64) -> EvidenceSpec {
        EvidenceSpec {
            total: Some(total.into()),
            strata: None,
            labels: None,
        }
    }
}

/// One stratum: its cells, chosen by exactly one of `cells`, `rect`, `geometry` or `label`, and
/// the evidence on its total. Nodata cells under a geometry or label are left out.
#[derive(Clone, Debug, Deserialize, Serialize, ToSchema)]
#[serde(deny_unknown_fields)]
pub struct StratumSpec {
    pub id: String,
    /// Row-major cell indices.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub cells: Option<Vec<u32>>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub rect: Option<RectSpec>,
    /// A GeoJSON Polygon or MultiPolygon in the raster's CRS: the cells whose centres it holds
    /// (the centre rule keeps adjoining districts disjoint).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    #[schema(value_type = Option<Object>)]
    pub geometry: Option<Box<RawValue>>,
    /// The cells holding this value in `evidence.labels`.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub label: Option<i64>,
    /// The stratum's total, in any form `evidence.total` takes.
    #[schema(value_type = TotalSpec)]
    pub total: serde_json::Value,
}

/// The forms of `evidence.total` (a schema only: `decode` reads the value itself, so each
/// mistake is reported at its own field).
#[derive(Serialize, ToSchema)]
#[serde(untagged)]
#[allow(dead_code)]
pub enum TotalSpec {
    /// Exactly this many events happened (a whole number; `318.0` is read as 318).
    Exact(f64),
    /// The true total lies in [min, max].
    Range { min: u64, max: u64 },
    /// This many events were found, each event being found independently with probability
    /// `detection` (0 < detection <= 1).
    Detected { detected: u64, detection: f64 },
    /// P(observation | total = offset + i) = values[i], zero elsewhere.
    Likelihood { likelihood: LikelihoodSpec },
}

/// A likelihood over totals.
#[derive(Serialize, ToSchema)]
#[allow(dead_code)]
pub struct LikelihoodSpec {
    pub offset: u64,
    /// Non-negative, not all zero.
    pub values: Vec<f64>,
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

/// The `zones` field in any of its forms (a schema only: `decode` reads the field's bytes
/// itself, so a large GeoJSON document is streamed and its vertices counted before any is held).
#[derive(Serialize, ToSchema)]
#[serde(untagged)]
#[allow(dead_code)]
pub enum ZonesDoc {
    /// Zones by cell list or rectangle.
    List(Vec<ZoneSpec>),
    /// A GeoJSON Feature or FeatureCollection of polygons.
    Features(GeoJsonZones),
    /// A zone label raster.
    Labels(LabelZones),
}

/// A GeoJSON (RFC 7946) Feature or FeatureCollection of Polygon / MultiPolygon features in the
/// raster's CRS; the zone id is the feature `id`, or the property `zone_options.id_property`
/// names. A cell is in a zone when its centre is inside (or, with `all_touched`, when the zone
/// touches it).
#[derive(Serialize, ToSchema)]
pub struct GeoJsonZones(serde_json::Value);

/// Zones read off an integer raster on the same grid: each distinct value a zone (its id the
/// value), 0 or nodata in no zone.
#[derive(Clone, Debug, Deserialize, Serialize, ToSchema)]
#[serde(deny_unknown_fields)]
pub struct LabelZones {
    pub labels: RasterInput,
}

/// How GeoJSON zones become cells.
#[derive(Clone, Debug, Default, Deserialize, Serialize, ToSchema)]
#[serde(deny_unknown_fields)]
pub struct ZoneOptions {
    /// Take each zone's id from this feature property instead of the feature `id`.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub id_property: Option<String>,
    /// Also count the cells a polygon's boundary touches (default: cells whose centre is inside).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub all_touched: Option<bool>,
}

/// The request document read by `zonetally eval` and taken as process inputs.
#[derive(Clone, Debug, Deserialize, Serialize, ToSchema)]
#[serde(deny_unknown_fields)]
pub struct EvalRequest {
    pub raster: RasterInput,
    /// A list of zones (`ZoneSpec`), a GeoJSON Feature or FeatureCollection, or `{"labels": raster}`.
    #[schema(value_type = ZonesDoc)]
    pub zones: Box<RawValue>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub zone_options: Option<ZoneOptions>,
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
    /// Valid cells used.
    pub cells: usize,
    /// Nodata cells of the zone, dropped.
    #[serde(default)]
    pub nodata_cells: u64,
    /// Set when the zone has no valid cell (all nodata or outside the raster): its count is 0
    /// for certain.
    #[serde(default, skip_serializing_if = "std::ops::Not::not")]
    pub no_valid_cells: bool,
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

/// The total check: the evidence against the raster's prior, and the posterior of the true
/// total.
#[derive(Clone, Debug, Serialize, Deserialize, PartialEq, ToSchema)]
pub struct TotalResult {
    /// The form the evidence was read as: `total`, `range`, `detected` or `likelihood`.
    pub evidence: String,
    /// The exact total, or the detected count; absent for a range or a likelihood.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub observed: Option<u64>,
    pub prior_mean: f64,
    pub prior_sd: f64,
    /// The central 99% interval of the prior total.
    pub prior_interval: IntervalOut,
    /// Distance of the observation from the prior mean in prior sd (for a range or a
    /// likelihood, from the nearest total it allows; 0 inside); null when the sd is zero.
    pub z_score: Option<f64>,
    /// P(total <= observed) under the prior (range, likelihood: P(total <= largest allowed);
    /// detected: P(detected count <= detected)).
    pub p_at_most: f64,
    /// P(total >= observed) under the prior (range, likelihood: P(total >= smallest allowed);
    /// detected: P(detected count >= detected)).
    pub p_at_least: f64,
    /// ln P(observation) under the prior.
    pub log_likelihood: f64,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub warning: Option<String>,
    /// The posterior of the true total; absent for an exact total.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub posterior: Option<TotalPosteriorOut>,
    /// Under strata: each stratum's own check (the tails and warning above are those of the
    /// least plausible stratum, `log_likelihood` their sum).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    #[schema(no_recursion)]
    pub strata: Option<Vec<StratumCheck>>,
}

/// One stratum's total check.
#[derive(Clone, Debug, Serialize, Deserialize, PartialEq, ToSchema)]
pub struct StratumCheck {
    pub id: String,
    /// The valid cells the stratum holds (for a geometry or label, those the request chose).
    pub cells: u64,
    #[schema(no_recursion)]
    pub check: TotalResult,
}

/// The posterior law of the true total given the evidence.
#[derive(Clone, Debug, Serialize, Deserialize, PartialEq, ToSchema)]
pub struct TotalPosteriorOut {
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub pmf: Option<PmfOut>,
    pub mean: f64,
    pub sd: f64,
    pub mode: u64,
    pub median: u64,
    pub interval: IntervalOut,
    pub error_bound: f64,
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
            nodata_cells: 0,
            no_valid_cells: z.cells == 0,
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

impl TotalResult {
    /// The wire form of a total check, its posterior summarised at `level` (pmf when `pmf`).
    pub fn of(t: TotalCheck, level: f64, pmf: bool) -> TotalResult {
        let posterior = t.posterior.map(|p| {
            let s = summarise(p.offset, &p.pmf, level, &[]);
            TotalPosteriorOut {
                pmf: pmf.then_some(PmfOut {
                    offset: p.offset,
                    values: p.pmf,
                }),
                mean: s.mean,
                sd: s.sd,
                mode: s.mode,
                median: s.median,
                interval: IntervalOut {
                    level: s.interval.level,
                    lower: s.interval.lower,
                    upper: s.interval.upper,
                },
                error_bound: p.error_bound,
            }
        });
        TotalResult {
            evidence: t.evidence.to_string(),
            observed: t.observed,
            prior_mean: t.prior_mean,
            prior_sd: t.prior_sd,
            prior_interval: IntervalOut {
                level: t.prior_level,
                lower: t.prior_interval.0,
                upper: t.prior_interval.1,
            },
            z_score: t.z_score.filter(|z| z.is_finite()),
            p_at_most: t.p_at_most,
            p_at_least: t.p_at_least,
            log_likelihood: if t.log_likelihood.is_finite() {
                t.log_likelihood
            } else {
                -f64::MAX
            },
            warning: t.warning,
            posterior,
            strata: None,
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

/// What the `total-check` reports besides the check itself. Every field is optional.
#[derive(Clone, Debug, Default, Deserialize, Serialize, ToSchema)]
#[serde(deny_unknown_fields)]
pub struct TotalSummaries {
    /// Credible level of the posterior total's interval (default 0.9).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub interval: Option<f64>,
    /// Whether to report the posterior total's pmf (default true).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub pmf: Option<bool>,
}

/// The inputs of `total-check`.
#[derive(Clone, Debug, Deserialize, ToSchema)]
#[serde(deny_unknown_fields)]
pub struct TotalCheckInputs {
    pub raster: RasterInput,
    pub evidence: EvidenceSpec,
    #[serde(default)]
    pub summaries: TotalSummaries,
}

/// The inputs of `scenarios`: those of `zone-counts` (without `summaries`), plus how many
/// scenarios to draw and what to summarise over them.
#[derive(Clone, Debug, Deserialize, Serialize, ToSchema)]
#[serde(deny_unknown_fields)]
pub struct ScenarioInputs {
    pub raster: RasterInput,
    /// A list of zones (`ZoneSpec`), a GeoJSON Feature or FeatureCollection, or `{"labels": raster}`.
    #[schema(value_type = ZonesDoc)]
    pub zones: Box<RawValue>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub zone_options: Option<ZoneOptions>,
    pub evidence: EvidenceSpec,
    /// How many scenarios to draw: at least 1, at most the service's `--max-scenarios`.
    pub count: u64,
    /// Key of the random streams (default 0): the same seed, inputs and version give the same
    /// scenarios, whatever the number of threads.
    #[serde(default)]
    pub seed: u64,
    /// Also list each scenario's event cells (default false).
    #[serde(default)]
    pub cells: bool,
    /// Thresholds k: for each, the summary gives how many zones hold at least k events.
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub at_least: Vec<u64>,
    /// Ids of the zones whose pairwise correlations the summary gives (at most 50); the first
    /// 50 zones in request order when absent, none when empty.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub correlation: Option<Vec<String>>,
}

/// One scenario as sent (described for the schema; encoded straight from the draws).
#[derive(Serialize, ToSchema)]
pub struct ScenarioOut {
    /// The event count of every zone, keyed by zone id, in request order.
    pub zones: std::collections::BTreeMap<String, u64>,
    /// Row-major indices of the cells holding an event, ascending (when `cells` was asked).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub cells: Option<Vec<u32>>,
}

/// A zone's count over the scenarios.
#[derive(Clone, Debug, Serialize, Deserialize, PartialEq, ToSchema)]
pub struct ScenarioZoneOut {
    pub id: String,
    /// Mean count over the scenarios.
    pub mean: f64,
    /// Standard deviation over the scenarios (divisor count - 1); null for one scenario.
    pub sd: Option<f64>,
}

/// How many zones hold at least `k` events, over the scenarios.
#[derive(Clone, Debug, Serialize, Deserialize, PartialEq, ToSchema)]
pub struct AtLeastOut {
    pub k: u64,
    /// `scenarios[i]`: the number of scenarios in which exactly i zones hold at least k events
    /// (up to the largest i seen).
    pub scenarios: Vec<u64>,
    /// Mean number of zones holding at least k events.
    pub mean: f64,
}

/// Pairwise correlations of zone counts over the scenarios.
#[derive(Clone, Debug, Serialize, Deserialize, PartialEq, ToSchema)]
pub struct CorrelationOut {
    pub zones: Vec<String>,
    /// `matrix[i][j]`: the sample correlation of the counts of `zones[i]` and `zones[j]`; null
    /// where either count does not vary over the scenarios.
    pub matrix: Vec<Vec<Option<f64>>>,
}

/// What the scenarios show together.
#[derive(Clone, Debug, Serialize, Deserialize, PartialEq, ToSchema)]
pub struct ScenarioSummaryOut {
    pub count: u64,
    pub seed: u64,
    /// Every zone, in request order.
    pub zones: Vec<ScenarioZoneOut>,
    pub at_least: Vec<AtLeastOut>,
    pub correlation: CorrelationOut,
}

/// The `scenarios` output.
#[derive(Serialize, ToSchema)]
pub struct ScenariosDocument {
    #[schema(value_type = Vec<ScenarioOut>)]
    pub samples: ScenarioList,
    pub summary: ScenarioSummaryOut,
    /// Bound on the total variation distance between the law each scenario is drawn from and
    /// the exact conditional law of the field given the evidence.
    pub error_bound: f64,
    pub total: TotalResult,
}

/// The draws with their zones' ids, encoded as `ScenarioOut`s without copying an id per draw.
pub struct ScenarioList {
    pub ids: Vec<String>,
    pub draws: Vec<crate::engine::Scenario>,
}

impl Serialize for ScenarioList {
    fn serialize<S: serde::Serializer>(&self, s: S) -> Result<S::Ok, S::Error> {
        use serde::ser::{SerializeSeq, SerializeStruct};
        struct Zones<'a>(&'a [String], &'a [u64]);
        impl Serialize for Zones<'_> {
            fn serialize<S: serde::Serializer>(&self, s: S) -> Result<S::Ok, S::Error> {
                s.collect_map(self.0.iter().zip(self.1))
            }
        }
        struct One<'a>(&'a [String], &'a crate::engine::Scenario);
        impl Serialize for One<'_> {
            fn serialize<S: serde::Serializer>(&self, s: S) -> Result<S::Ok, S::Error> {
                let fields = 1 + usize::from(self.1.cells.is_some());
                let mut st = s.serialize_struct("ScenarioOut", fields)?;
                st.serialize_field("zones", &Zones(self.0, &self.1.zones))?;
                if let Some(cells) = &self.1.cells {
                    st.serialize_field("cells", cells)?;
                }
                st.end()
            }
        }
        let mut seq = s.serialize_seq(Some(self.draws.len()))?;
        for d in &self.draws {
            seq.serialize_element(&One(&self.ids, d))?;
        }
        seq.end()
    }
}

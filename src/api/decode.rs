//! The one decoding path: request documents (wire types) into validated engine types, shared by
//! `zonetally eval` and every process of the service. After it nothing is validated again.
//!
//! Errors carry a JSON pointer relative to the request document (the service prefixes
//! `/inputs`), the value and a hint. Engine construction errors are mapped by their kind and
//! fields, never by their text. Where a raster comes from is the caller's `RasterSource`: the
//! service resolves references from its cache, `eval` refuses them. Decoders of other formats
//! (GeoTIFF, GeoJSON) go beside the JSON ones here, each producing the same engine types.

use std::collections::HashMap;
use std::sync::Arc;

use base64::Engine as _;
use serde_json::value::RawValue;
use serde_json::Value;

use crate::engine::{
    CellSelection, EngineError, Evidence, Missing, Raster, RasterProblem, SettingProblem, Settings,
    Strata, StratumCells, Zone, ZoneProblem, ZoneSet, DEFAULT_LEVEL, DEFAULT_TOLERANCE,
    MAX_LIKELIHOOD_VALUES,
};
use crate::geo::rect::{rect_cells, RectProblem};
use crate::geo::zones::{
    parse_geometry, parse_zones, rasterize, zones_from_labels, Polygon, ZoneOptions,
};
use crate::geo::{geotiff, GeoError, GeoTransform, Grid};

use super::wire::{
    EvalRequest, EvidenceSpec, LabelZones, PosteriorInputs, RasterFile, RasterInput, RasterSpec,
    RectSpec, SampleType, StratumSpec, SummariesSpec, TotalCheckInputs,
    ZoneOptions as ZoneOptionsSpec, ZoneSpec,
};

/// Size limits checked while decoding and planning, before the large allocations.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct Limits {
    pub max_cells: u64,
    pub max_zones: usize,
    pub max_zone_cells: u64,
    /// Largest planned cost (the planner's multiply-adds).
    pub max_cost: f64,
    /// Most polygon positions over all GeoJSON zones of a request.
    pub max_vertices: u64,
    /// Most exceedance probabilities of a request: zones x thresholds.
    pub max_exceedance_values: u64,
    /// Most scenarios one `scenarios` request may draw.
    pub max_scenarios: u64,
    /// Largest estimated size of a `scenarios` output, in bytes.
    pub max_scenario_bytes: u64,
}

impl Limits {
    /// Largest raster file (GeoTIFF) accepted: a float64 raster of `max_cells` uncompressed,
    /// plus room for headers and tile padding. Follows the cell limit, not the JSON body limit.
    pub fn max_raster_file_bytes(&self) -> u64 {
        self.max_cells.saturating_mul(8).saturating_add(16 << 20)
    }
}

impl Default for Limits {
    /// The command line's limits: generous, as the user runs on their own machine.
    fn default() -> Self {
        Limits {
            max_cells: 100_000_000,
            max_zones: 1_000_000,
            max_zone_cells: 400_000_000,
            max_cost: f64::INFINITY,
            max_vertices: 100_000_000,
            max_exceedance_values: u64::MAX,
            max_scenarios: u64::MAX,
            max_scenario_bytes: u64::MAX,
        }
    }
}

/// What kind of failure a decoding error is.
#[derive(Clone, Debug, PartialEq)]
pub enum DecodeKind {
    /// The content is wrong.
    Invalid,
    /// A file or geometry was read but cannot be used as given (a rotated grid, a point zone,
    /// an unclosed ring, a probability outside [0, 1] in a GeoTIFF).
    Unusable,
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
    pub fn unusable(pointer: impl Into<String>, detail: impl Into<String>) -> DecodeError {
        DecodeError {
            pointer: pointer.into(),
            detail: detail.into(),
            kind: DecodeKind::Unusable,
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

/// Where a raster lies and how its nodata was spelled: carried from input to every output.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct Frame {
    pub grid: Grid,
    pub nodata: Option<f64>,
}

impl Frame {
    /// A frame with no georeferencing.
    pub fn plain(width: u32, height: u32) -> Frame {
        Frame {
            grid: Grid {
                width,
                height,
                transform: None,
                crs: None,
            },
            nodata: None,
        }
    }
}

/// A validated raster and its frame, as sources hold them.
#[derive(Clone, Debug)]
pub struct HeldRaster {
    pub raster: Arc<Raster>,
    pub frame: Frame,
}

/// Where rasters come from and go: references resolved, inline rasters kept, linked files read.
pub trait RasterSource: Sync {
    /// The raster held under `reference` and its key. Errors point at `/raster/ref`.
    fn resolve(&self, reference: &str) -> Result<(String, HeldRaster), DecodeError>;
    /// Keeps a decoded raster; returns its key (when this source keys rasters) and the copy held.
    fn keep(&self, raster: Raster, frame: Frame) -> (Option<String>, HeldRaster);
    /// The bytes of the file `href` names, at most `max_bytes`. Errors point at `/raster/href`.
    fn read_file(&self, href: &str, max_bytes: u64) -> Result<Vec<u8>, DecodeError>;
}

/// The command line's source: references cannot be resolved; `href` files are read from the
/// local disk (the user runs on their own machine).
pub struct LocalFiles;

impl RasterSource for LocalFiles {
    fn resolve(&self, reference: &str) -> Result<(String, HeldRaster), DecodeError> {
        Err(DecodeError::at(
            "/raster/ref",
            format!(
                "raster `{reference}` is a reference, which only the service (`zonetally serve`, POST /rasters) can resolve: put the raster inline or give its file as `href`"
            ),
        ))
    }
    fn keep(&self, raster: Raster, frame: Frame) -> (Option<String>, HeldRaster) {
        (
            None,
            HeldRaster {
                raster: Arc::new(raster),
                frame,
            },
        )
    }
    fn read_file(&self, href: &str, max_bytes: u64) -> Result<Vec<u8>, DecodeError> {
        read_bounded(std::path::Path::new(href), href, max_bytes)
    }
}

/// Reads the file at `path` (named `href` in messages), checking its size before reading.
pub fn read_bounded(
    path: &std::path::Path,
    href: &str,
    max_bytes: u64,
) -> Result<Vec<u8>, DecodeError> {
    use std::io::Read;
    let file = std::fs::File::open(path)
        .map_err(|e| DecodeError::at("/raster/href", format!("cannot open `{href}`: {e}")))?;
    let len = file
        .metadata()
        .map_err(|e| DecodeError::at("/raster/href", format!("cannot read `{href}`: {e}")))?
        .len();
    if len > max_bytes {
        return Err(DecodeError::limit(
            "/raster/href",
            format!("`{href}` is {len} bytes, above this service's limit of {max_bytes} bytes for a raster file: coarsen or split the raster"),
        ));
    }
    let mut bytes = Vec::with_capacity(len as usize);
    file.take(max_bytes + 1)
        .read_to_end(&mut bytes)
        .map_err(|e| DecodeError::at("/raster/href", format!("cannot read `{href}`: {e}")))?;
    Ok(bytes)
}

/// How one requested zone was given and what became of it, in request order.
#[derive(Clone, Debug, PartialEq)]
pub struct ZoneEntry {
    pub id: String,
    /// Nodata cells of the zone, dropped.
    pub nodata_cells: u64,
    /// Its place in the decoded `ZoneSet`; `None` when it has no valid cell.
    pub slot: Option<usize>,
    pub shape: ZoneShape,
}

/// How a zone was given, for outputs that draw it.
#[derive(Clone, Debug, PartialEq)]
pub enum ZoneShape {
    /// A cell list or a label: drawn as the outline of its cells.
    Cells,
    Rect(RectSpec),
    /// GeoJSON polygons, drawn as sent.
    Polygons(Vec<Polygon>),
}

/// The zones of a request: the engine's set (zones with at least one valid cell) and the
/// entries of every zone as requested.
#[derive(Clone, Debug)]
pub struct DecodedZones {
    pub set: Option<ZoneSet>,
    pub entries: Vec<ZoneEntry>,
}

impl DecodedZones {
    /// The zones the engine computes (none when every zone lacks a valid cell).
    pub fn engine_zones(&self) -> &[Zone] {
        self.set.as_deref().unwrap_or(&[])
    }
    /// Valid cells over all zones, counted with multiplicity.
    pub fn cell_count(&self) -> u64 {
        self.set.as_ref().map_or(0, ZoneSet::cell_count)
    }
}

/// A `zone-counts` request after validation: engine types only.
#[derive(Clone, Debug)]
pub struct Decoded {
    /// The raster's key in its source (its content hash in the service), for caching.
    pub raster_key: Option<String>,
    pub raster: Arc<Raster>,
    pub frame: Frame,
    pub zones: DecodedZones,
    pub evidence: DecodedEvidence,
    pub settings: Settings,
}

/// A `cell-posterior` request after validation.
#[derive(Clone, Debug)]
pub struct DecodedCells {
    pub raster_key: Option<String>,
    pub raster: Arc<Raster>,
    pub frame: Frame,
    pub cells: CellSelection,
    pub evidence: DecodedEvidence,
    pub settings: Settings,
}

/// Decodes a `zone-counts` request document: summaries, raster, zones, evidence, in that order.
pub fn zone_counts(
    req: EvalRequest,
    limits: &Limits,
    rasters: &dyn RasterSource,
) -> Result<Decoded, DecodeError> {
    let settings = settings(req.summaries)?;
    let (raster_key, held) = raster_input(req.raster, limits, rasters)?;
    let options = req.zone_options.unwrap_or_default();
    let zones = zones(&req.zones, &options, &held, limits, rasters)?;
    let asked = settings.thresholds().len() as u64 * zones.entries.len() as u64;
    if asked > limits.max_exceedance_values {
        return Err(DecodeError::limit(
            "/summaries/exceedance",
            format!(
                "{} thresholds for {} zones ask for {asked} exceedance probabilities, above this service's limit of {}: send fewer thresholds or fewer zones per request",
                settings.thresholds().len(),
                zones.entries.len(),
                limits.max_exceedance_values
            ),
        ));
    }
    let evidence = evidence(req.evidence, &held, limits, rasters)?;
    Ok(Decoded {
        raster_key,
        raster: held.raster,
        frame: held.frame,
        zones,
        evidence,
        settings,
    })
}

/// A `total-check` request after validation.
#[derive(Clone, Debug)]
pub struct DecodedTotal {
    pub raster_key: Option<String>,
    pub raster: Arc<Raster>,
    pub evidence: DecodedEvidence,
    /// Interval level and whether to report the pmf of the posterior total.
    pub settings: Settings,
}

/// Decodes a `total-check` request document.
pub fn total_check(
    req: TotalCheckInputs,
    limits: &Limits,
    rasters: &dyn RasterSource,
) -> Result<DecodedTotal, DecodeError> {
    let settings = Settings::new(
        req.summaries.interval.unwrap_or(DEFAULT_LEVEL),
        Vec::new(),
        DEFAULT_TOLERANCE,
        req.summaries.pmf.unwrap_or(true),
    )
    .map_err(|e| DecodeError::at("/summaries/interval", e.to_string()))?;
    let (raster_key, held) = raster_input(req.raster, limits, rasters)?;
    let evidence = evidence(req.evidence, &held, limits, rasters)?;
    Ok(DecodedTotal {
        raster_key,
        raster: held.raster,
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
    let (raster_key, held) = raster_input(req.raster, limits, rasters)?;
    let raster = Arc::clone(&held.raster);
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
    let evidence = evidence(req.evidence, &held, limits, rasters)?;
    Ok(DecodedCells {
        raster_key,
        raster,
        frame: held.frame,
        cells,
        evidence,
        settings,
    })
}

/// The raster of a request: resolved by reference or link, or decoded and kept.
fn raster_input(
    input: RasterInput,
    limits: &Limits,
    rasters: &dyn RasterSource,
) -> Result<(Option<String>, HeldRaster), DecodeError> {
    match input {
        RasterInput::Ref(r) => {
            let (key, held) = rasters.resolve(&r.reference)?;
            Ok((Some(key), held))
        }
        RasterInput::Href(h) => {
            if let Some(reference) = held_reference(&h.href) {
                if h.scale.is_some() {
                    return Err(DecodeError::at(
                        "/raster/scale",
                        "a raster held by this service was scaled when it was posted: drop `scale`",
                    ));
                }
                let (key, held) = rasters.resolve(reference).map_err(|mut e| {
                    e.pointer = "/raster/href".into();
                    e
                })?;
                return Ok((Some(key), held));
            }
            let bytes = rasters.read_file(&h.href, limits.max_raster_file_bytes())?;
            let samples = tiff_samples(&bytes, limits, "/raster/href")?;
            let (raster, frame) = probabilities(samples, h.scale, "/raster", None)?;
            Ok(rasters.keep(raster, frame))
        }
        RasterInput::File(f) => {
            let (raster, frame) = raster_file(&f, limits)?;
            Ok(rasters.keep(raster, frame))
        }
        RasterInput::Inline(spec) => {
            let (raster, frame) = raster(spec, limits)?;
            Ok(rasters.keep(raster, frame))
        }
    }
}

/// The hash in a link to a raster this service holds: `/rasters/sha256:...`, alone or at the
/// end of a URL.
fn held_reference(href: &str) -> Option<&str> {
    let at = href.rfind("/rasters/")?;
    let rest = &href[at + "/rasters/".len()..];
    rest.starts_with("sha256:").then_some(rest)
}

/// Media types accepted for a GeoTIFF given as a qualified value.
const TIFF_TYPES: [&str; 2] = ["image/tiff; application=geotiff", "image/tiff"];

/// Whether a media type names a TIFF (parameters other than `application=geotiff` ignored).
pub fn is_tiff(media_type: &str) -> bool {
    let essence = media_type.split(';').next().unwrap_or("").trim();
    essence.eq_ignore_ascii_case("image/tiff")
}

/// Decodes a GeoTIFF sent as a qualified value (`value`, `mediaType`). Pointers start at `/raster`.
pub fn raster_file(f: &RasterFile, limits: &Limits) -> Result<(Raster, Frame), DecodeError> {
    if !is_tiff(&f.media_type) {
        return Err(DecodeError::at(
            "/raster/mediaType",
            format!(
                "media type `{}` is not offered for a raster value: send `{}` (or JSON values inline)",
                f.media_type, TIFF_TYPES[0]
            ),
        ));
    }
    let bytes = base64_bytes(&f.value, limits.max_raster_file_bytes(), "/raster/value")?;
    let samples = tiff_samples(&bytes, limits, "/raster/value")?;
    probabilities(samples, f.scale, "/raster", None)
}

/// Decodes a GeoTIFF's bytes (the body of `POST /rasters`, or a file) into a raster.
pub fn raster_tiff(
    bytes: &[u8],
    scale: Option<f64>,
    limits: &Limits,
) -> Result<(Raster, Frame), DecodeError> {
    let samples = tiff_samples(bytes, limits, "")?;
    probabilities(samples, scale, "", None)
}

/// Base64 text decoded, its size checked before decoding.
fn base64_bytes(text: &str, max_bytes: u64, pointer: &str) -> Result<Vec<u8>, DecodeError> {
    let decoded_len = (text.len() as u64 / 4) * 3;
    if decoded_len > max_bytes.saturating_add(3) {
        return Err(DecodeError::limit(
            pointer,
            format!("the base64 value holds about {decoded_len} bytes, above this service's limit of {max_bytes}: post the raster to /rasters as a file"),
        ));
    }
    base64::engine::general_purpose::STANDARD
        .decode(text.trim())
        .map_err(|e| {
            DecodeError::at(
                pointer,
                format!("the value is not base64 (RFC 4648, standard alphabet, padded): {e}"),
            )
        })
}

/// Cell values as read, before they are checked: NaN marks nodata.
struct Samples {
    frame: Frame,
    values: Vec<f64>,
    /// Stored as integers (a scale is then usually needed).
    integer: bool,
}

/// The samples of a GeoTIFF; errors point at `pointer`.
fn tiff_samples(bytes: &[u8], limits: &Limits, pointer: &str) -> Result<Samples, DecodeError> {
    let read = geotiff::read(
        bytes,
        &geotiff::ReadLimits {
            max_cells: limits.max_cells,
        },
    )
    .map_err(|e| geo_error(e, pointer))?;
    let nodata = read.nodata;
    let mut values = read.samples;
    for v in values.iter_mut() {
        if Some(*v) == nodata {
            *v = f64::NAN;
        }
    }
    Ok(Samples {
        frame: Frame {
            grid: read.grid,
            nodata,
        },
        values,
        integer: matches!(
            read.sample_kind,
            geotiff::SampleKind::U8 | geotiff::SampleKind::U16
        ),
    })
}

/// A format-layer error at `pointer` (GeoJSON errors add their own pointer below it).
fn geo_error(e: GeoError, pointer: &str) -> DecodeError {
    let at = match e.pointer() {
        Some(p) => format!("{pointer}{p}"),
        None => pointer.to_string(),
    };
    let detail = e.to_string();
    match e {
        GeoError::TooManyCells { .. } | GeoError::TooManyVertices { .. } => {
            DecodeError::limit(at, detail)
        }
        _ => DecodeError::unusable(at, detail),
    }
}

/// The samples of an inline raster; pointers start at `base`.
fn inline_samples(spec: RasterSpec, limits: &Limits, base: &str) -> Result<Samples, DecodeError> {
    let cells = spec.width as u64 * spec.height as u64;
    if cells > limits.max_cells {
        return Err(DecodeError::limit(
            base,
            format!(
                "raster is {}x{} = {cells} cells, above this service's limit of {} cells: split the area or coarsen the raster",
                spec.width, spec.height, limits.max_cells
            ),
        ));
    }
    let transform = spec
        .geotransform
        .map(GeoTransform::from_gdal)
        .transpose()
        .map_err(|e| DecodeError::unusable(format!("{base}/geotransform"), e.to_string()))?;
    let nodata = spec.nodata;
    let frame = Frame {
        grid: Grid {
            width: spec.width,
            height: spec.height,
            transform,
            crs: spec.crs,
        },
        nodata,
    };
    let is_nodata = |x: f64| x.is_nan() || Some(x) == nodata;
    let values = match (spec.values, spec.values_base64) {
        (Some(_), Some(_)) => {
            return Err(DecodeError::at(
                format!("{base}/values_base64"),
                "the raster gives both `values` and `values_base64`: give one",
            ))
        }
        (Some(values), None) => {
            if spec.sample_type.is_some() {
                return Err(DecodeError::at(
                    format!("{base}/sample_type"),
                    "`sample_type` describes `values_base64`: drop it, or send the values as base64",
                ));
            }
            if values.len() as u64 != cells {
                return Err(DecodeError::at(
                    format!("{base}/values"),
                    format!(
                        "the raster has {} values, but {}x{} = {cells} cells: send one value per cell, row-major",
                        values.len(),
                        spec.width,
                        spec.height
                    ),
                ));
            }
            values
                .into_iter()
                .map(|v| v.filter(|&x| !is_nodata(x)).unwrap_or(f64::NAN))
                .collect()
        }
        (None, Some(text)) => {
            let kind = spec.sample_type.unwrap_or_default();
            let size: u64 = match kind {
                SampleType::Float32 => 4,
                SampleType::Float64 => 8,
            };
            let pointer = format!("{base}/values_base64");
            let bytes = base64_bytes(&text, cells * size, &pointer)?;
            if bytes.len() as u64 != cells * size {
                return Err(DecodeError::at(
                    pointer,
                    format!(
                        "`values_base64` holds {} bytes, but {}x{} cells of {kind:?} take {}: send {size} little-endian bytes per cell, row-major",
                        bytes.len(),
                        spec.width,
                        spec.height,
                        cells * size
                    ),
                ));
            }
            let decode = |x: f64| if is_nodata(x) { f64::NAN } else { x };
            match kind {
                SampleType::Float32 => bytes
                    .chunks_exact(4)
                    .map(|b| decode(f64::from(f32::from_le_bytes([b[0], b[1], b[2], b[3]]))))
                    .collect(),
                SampleType::Float64 => bytes
                    .chunks_exact(8)
                    .map(|b| {
                        let mut a = [0u8; 8];
                        a.copy_from_slice(b);
                        decode(f64::from_le_bytes(a))
                    })
                    .collect(),
            }
        }
        (None, None) => {
            return Err(DecodeError::at(
                base,
                "the raster lacks `values`: send `values` or `values_base64`",
            ))
        }
    };
    Ok(Samples {
        frame,
        values,
        integer: false,
    })
}

/// Checks samples as probabilities (after `scale`) and builds the raster. `cell_pointer`
/// names a bad cell's own member when there is one (JSON `values`); otherwise errors point at
/// `base`.
fn probabilities(
    samples: Samples,
    scale: Option<f64>,
    base: &str,
    cell_pointer: Option<&str>,
) -> Result<(Raster, Frame), DecodeError> {
    let Samples {
        frame,
        mut values,
        integer,
    } = samples;
    if let Some(s) = scale {
        if !(s.is_finite() && s > 0.0) {
            return Err(DecodeError::at(
                format!("{base}/scale"),
                format!("`scale` is {s}: it must be a finite positive number (0.01 for percent)"),
            ));
        }
        if s != 1.0 {
            values.iter_mut().for_each(|v| *v *= s);
        }
    }
    let Grid { width, height, .. } = frame.grid;
    let raster = Raster::from_probabilities(width, height, values).map_err(|e| match e {
        EngineError::InvalidValue { cell, value } => {
            let (row, col) = (cell / width.max(1), cell % width.max(1));
            let hint = if integer && scale.is_none() {
                ": this raster stores integers, so give `scale` (e.g. 0.01 for percent, 1/255 for bytes)"
            } else {
                ": a probability must lie in [0, 1] (use nodata for cells outside the study area)"
            };
            let shown = if scale.is_some() { " after scaling" } else { "" };
            let detail = format!(
                "the cell at row {row}, column {col} (index {cell}) has value {value}{shown}{hint}"
            );
            match cell_pointer {
                Some(p) => DecodeError::at(format!("{p}/{cell}"), detail),
                // A file's values: it was read, but cannot be used as probabilities.
                None => DecodeError::unusable(base, detail),
            }
        }
        EngineError::InvalidRaster(RasterProblem::ValueCount { .. }) => {
            DecodeError::at(format!("{base}/values"), e.to_string())
        }
        other => DecodeError::at(base, other.to_string()),
    })?;
    Ok((raster, frame))
}

/// Decodes an inline raster; `nodata` values become nodata cells. Pointers start at `/raster`.
pub fn raster(spec: RasterSpec, limits: &Limits) -> Result<(Raster, Frame), DecodeError> {
    let scale = spec.scale;
    let per_cell = spec.values.is_some().then_some("/raster/values");
    let samples = inline_samples(spec, limits, "/raster")?;
    probabilities(samples, scale, "/raster", per_cell)
}

/// Parses a JSON member with its own pointer below `base` on failure.
fn parse_member<T: serde::de::DeserializeOwned>(text: &str, base: &str) -> Result<T, DecodeError> {
    let mut de = serde_json::Deserializer::from_str(text);
    serde_path_to_error::deserialize(&mut de).map_err(|e| {
        let pointer = format!("{base}{}", super::body::pointer_of(e.path()));
        DecodeError::at(pointer, e.into_inner().to_string())
    })
}

/// Which form an object-valued `zones` takes.
#[derive(serde::Deserialize)]
struct ZonesPeek {
    #[serde(rename = "type")]
    kind: Option<serde::de::IgnoredAny>,
    labels: Option<serde::de::IgnoredAny>,
}

/// Decodes the zones in any form against their raster, checking the counts first.
fn zones(
    raw: &RawValue,
    options: &ZoneOptionsSpec,
    held: &HeldRaster,
    limits: &Limits,
    rasters: &dyn RasterSource,
) -> Result<DecodedZones, DecodeError> {
    let text = raw.get();
    let mut out = ZoneBuilder::new(&held.raster, limits);
    match text.trim_start().as_bytes().first() {
        Some(b'[') => {
            if options.id_property.is_some() || options.all_touched.is_some() {
                return Err(DecodeError::at(
                    "/zone_options",
                    "`zone_options` applies to GeoJSON zones only: drop it for a list of zones",
                ));
            }
            let specs: Vec<ZoneSpec> = parse_member(text, "/zones")?;
            out.check_count(specs.len())?;
            for (i, spec) in specs.into_iter().enumerate() {
                let base = format!("/zones/{i}");
                let (cells, shape) = match (spec.cells, spec.rect) {
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
                    (Some(c), None) => (c, ZoneShape::Cells),
                    (None, Some(r)) => (rect(&spec.id, r, &held.raster, &base)?, ZoneShape::Rect(r)),
                };
                out.add(spec.id, cells, shape, &base)?;
            }
        }
        Some(b'{') => {
            let peek: ZonesPeek = parse_member(text, "/zones")?;
            if peek.labels.is_some() && peek.kind.is_none() {
                let labels: LabelZones = parse_member(text, "/zones")?;
                label_zones(labels, held, limits, rasters, &mut out)?;
            } else {
                geojson_zones(text, options, held, limits, &mut out)?;
            }
        }
        _ => {
            return Err(DecodeError::at(
                "/zones",
                "`zones` must be a list of zones, a GeoJSON Feature or FeatureCollection, or {\"labels\": raster}",
            ))
        }
    }
    out.finish()
}

/// GeoJSON polygons, rasterised onto the raster's grid.
fn geojson_zones(
    text: &str,
    options: &ZoneOptionsSpec,
    held: &HeldRaster,
    limits: &Limits,
    out: &mut ZoneBuilder,
) -> Result<(), DecodeError> {
    let grid = held.frame.grid;
    let parsed = parse_zones(
        text.as_bytes(),
        &ZoneOptions {
            id_property: options.id_property.as_deref(),
            max_vertices: limits.max_vertices,
            raster_crs: grid.crs,
        },
    )
    .map_err(|e| geo_error(e, "/zones"))?;
    out.check_count(parsed.len())?;
    let all_touched = options.all_touched.unwrap_or(false);
    for zone in parsed {
        let cells = rasterize(&zone.polygons, &grid, all_touched);
        let base = format!("/zones{}", zone.pointer);
        out.add(zone.id, cells, ZoneShape::Polygons(zone.polygons), &base)?;
    }
    Ok(())
}

/// Zones read off a label raster on the raster's grid.
fn label_zones(
    labels: LabelZones,
    held: &HeldRaster,
    limits: &Limits,
    rasters: &dyn RasterSource,
    out: &mut ZoneBuilder,
) -> Result<(), DecodeError> {
    const BASE: &str = "/zones/labels";
    let found = label_raster(labels.labels, BASE, held, limits, rasters)?;
    out.check_count(found.len())?;
    for (label, cells) in found {
        out.add(label.to_string(), cells, ZoneShape::Cells, BASE)?;
    }
    Ok(())
}

/// The cells of each label of a label raster on the raster's grid, in increasing label order
/// (0 and nodata are no label); errors point at `base`.
fn label_raster(
    input: RasterInput,
    base: &str,
    held: &HeldRaster,
    limits: &Limits,
    rasters: &dyn RasterSource,
) -> Result<Vec<(i64, Vec<u32>)>, DecodeError> {
    let samples = match input {
        RasterInput::Inline(spec) => inline_samples(spec, limits, base)?,
        RasterInput::File(f) => {
            if !is_tiff(&f.media_type) {
                return Err(DecodeError::at(
                    format!("{base}/mediaType"),
                    format!("media type `{}` is not offered for a label raster: send `{}`", f.media_type, TIFF_TYPES[0]),
                ));
            }
            let pointer = format!("{base}/value");
            let bytes = base64_bytes(&f.value, limits.max_raster_file_bytes(), &pointer)?;
            tiff_samples(&bytes, limits, &pointer)?
        }
        RasterInput::Href(h) if held_reference(&h.href).is_none() => {
            let bytes = rasters
                .read_file(&h.href, limits.max_raster_file_bytes())
                .map_err(|mut e| {
                    e.pointer = format!("{base}/href");
                    e
                })?;
            tiff_samples(&bytes, limits, &format!("{base}/href"))?
        }
        RasterInput::Href(_) | RasterInput::Ref(_) => {
            return Err(DecodeError::at(
                base,
                "a label raster cannot be a raster held by this service (those hold probabilities): send it inline or as a GeoTIFF",
            ))
        }
    };
    let (grid, want) = (samples.frame.grid, held.frame.grid);
    if (grid.width, grid.height) != (want.width, want.height) {
        return Err(DecodeError::at(
            base,
            format!(
                "the label raster is {}x{}, the probability raster {}x{}: labels must lie on the same grid",
                grid.width, grid.height, want.width, want.height
            ),
        ));
    }
    if let (Some(a), Some(b)) = (grid.transform, want.transform) {
        if a != b {
            return Err(DecodeError::at(
                base,
                format!("the label raster's geotransform {:?} differs from the probability raster's {:?}: labels must lie on the same grid", a.to_gdal(), b.to_gdal()),
            ));
        }
    }
    zones_from_labels(&samples.values, None).map_err(|e| match e {
        GeoError::LabelNotInteger { index, value } => DecodeError::at(
            base,
            format!(
                "the label at row {}, column {} is {value}: labels are whole numbers (0 or nodata for none)",
                index as u64 / u64::from(grid.width.max(1)),
                index as u64 % u64::from(grid.width.max(1))
            ),
        ),
        other => geo_error(other, base),
    })
}

/// Collects zones in request order: drops nodata cells, keeps zones with no valid cell aside,
/// and enforces the zone and cell budgets.
struct ZoneBuilder<'a> {
    raster: &'a Raster,
    limits: &'a Limits,
    budget: u64,
    zones: Vec<Zone>,
    entries: Vec<ZoneEntry>,
    ids: std::collections::HashMap<String, usize>,
}

impl<'a> ZoneBuilder<'a> {
    fn new(raster: &'a Raster, limits: &'a Limits) -> Self {
        ZoneBuilder {
            raster,
            limits,
            budget: limits.max_zone_cells,
            zones: Vec::new(),
            entries: Vec::new(),
            ids: std::collections::HashMap::new(),
        }
    }

    fn check_count(&self, n: usize) -> Result<(), DecodeError> {
        if n > self.limits.max_zones {
            return Err(DecodeError::limit(
                "/zones",
                format!(
                    "{n} zones exceed this service's limit of {}: send them in several requests",
                    self.limits.max_zones
                ),
            ));
        }
        Ok(())
    }

    /// Adds one zone given by `cells` (row-major, any order); `base` points at the zone.
    fn add(
        &mut self,
        id: String,
        cells: Vec<u32>,
        shape: ZoneShape,
        base: &str,
    ) -> Result<(), DecodeError> {
        if cells.len() as u64 > self.budget {
            return Err(DecodeError::limit(
                base,
                format!(
                    "zones hold more than this service's limit of {} cells in all: send fewer or smaller zones",
                    self.limits.max_zone_cells
                ),
            ));
        }
        self.budget -= cells.len() as u64;
        let index = self.entries.len();
        if let Some(&first) = self.ids.get(&id) {
            return Err(DecodeError::at(
                format!("{base}/id"),
                format!("zone id `{id}` is used by zone {first} and zone {index}: give every zone its own id"),
            ));
        }
        let n = u64::from(self.raster.width()) * u64::from(self.raster.height());
        if let Some(position) = cells.iter().position(|&c| u64::from(c) >= n) {
            return Err(DecodeError::at(
                format!("{base}/cells/{position}"),
                format!(
                    "zone `{id}` has cell {}, outside the {}x{} raster (last index {})",
                    cells[position],
                    self.raster.width(),
                    self.raster.height(),
                    n - 1
                ),
            ));
        }
        let total = cells.len();
        let mut valid: Vec<u32> = cells
            .into_iter()
            .filter(|&c| self.raster.cell_problem(c).is_none())
            .collect();
        // Zones are held until the job ends: drop the slack of grown or filtered lists.
        valid.shrink_to_fit();
        let nodata_cells = (total - valid.len()) as u64;
        let slot = if valid.is_empty() {
            None
        } else {
            let zone = Zone::new(id.clone(), valid, self.raster).map_err(|e| {
                let pointer = match &e {
                    EngineError::InvalidZone {
                        problem: ZoneProblem::Repeated { .. },
                        ..
                    } if matches!(shape, ZoneShape::Cells) => format!("{base}/cells"),
                    _ => base.to_string(),
                };
                DecodeError::at(pointer, e.to_string())
            })?;
            self.zones.push(zone);
            Some(self.zones.len() - 1)
        };
        self.ids.insert(id.clone(), index);
        self.entries.push(ZoneEntry {
            id,
            nodata_cells,
            slot,
            shape,
        });
        Ok(())
    }

    fn finish(self) -> Result<DecodedZones, DecodeError> {
        if self.entries.is_empty() {
            return Err(DecodeError::at(
                "/zones",
                "no zones were given: give at least one zone",
            ));
        }
        let set = if self.zones.is_empty() {
            None
        } else {
            Some(ZoneSet::new(self.zones).map_err(|e| DecodeError::at("/zones", e.to_string()))?)
        };
        Ok(DecodedZones {
            set,
            entries: self.entries,
        })
    }
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

/// The evidence of a request: one overall total, or strata.
#[derive(Clone, Debug)]
pub enum DecodedEvidence {
    Whole(Evidence),
    Strata(Strata),
}

/// Decodes the evidence against the raster: `total` or `strata`, never both.
fn evidence(
    spec: EvidenceSpec,
    held: &HeldRaster,
    limits: &Limits,
    rasters: &dyn RasterSource,
) -> Result<DecodedEvidence, DecodeError> {
    match (spec.total, spec.strata) {
        (Some(_), Some(_)) => Err(DecodeError::unusable(
            "/evidence",
            "`total` and `strata` together are ambiguous: send one or the other (an overall total, or one total per stratum)",
        )),
        (None, None) => Err(DecodeError::at(
            "/evidence",
            "the evidence has neither `total` nor `strata`: give an overall total, or one total per stratum",
        )),
        (Some(_), None) if spec.labels.is_some() => Err(DecodeError::at(
            "/evidence/labels",
            "`labels` chooses the cells of strata by `label`, and an overall `total` has no strata: drop `labels`",
        )),
        (Some(total), None) => Ok(DecodedEvidence::Whole(total_form(
            total,
            "/evidence/total",
            &held.raster,
        )?)),
        (None, Some(list)) => {
            strata(list, spec.labels, held, limits, rasters).map(DecodedEvidence::Strata)
        }
    }
}

/// Decodes the strata: each one's cells, then its total against its own cells.
fn strata(
    list: Vec<StratumSpec>,
    labels: Option<RasterInput>,
    held: &HeldRaster,
    limits: &Limits,
    rasters: &dyn RasterSource,
) -> Result<Strata, DecodeError> {
    if list.len() > limits.max_zones {
        return Err(DecodeError::limit(
            "/evidence/strata",
            format!(
                "{} strata exceed this service's limit of {} (the zone limit): merge strata, or leave some cells unconstrained",
                list.len(),
                limits.max_zones
            ),
        ));
    }
    let raster = &*held.raster;
    let labelled = match labels {
        Some(input) => {
            if !list.iter().any(|s| s.label.is_some()) {
                return Err(DecodeError::at(
                    "/evidence/labels",
                    "no stratum is chosen by `label`: drop `labels`, or give strata a `label`",
                ));
            }
            let found = label_raster(input, "/evidence/labels", held, limits, rasters)?;
            Some(found.into_iter().collect::<HashMap<i64, Vec<u32>>>())
        }
        None => None,
    };
    let valid = raster.stats().valid;
    let mut vertices = limits.max_vertices;
    let mut held_cells = 0u64;
    let mut parts = Vec::with_capacity(list.len());
    for (i, s) in list.into_iter().enumerate() {
        let at = format!("/evidence/strata/{i}");
        let chosen = [
            s.cells.is_some(),
            s.rect.is_some(),
            s.geometry.is_some(),
            s.label.is_some(),
        ];
        let n = chosen.iter().filter(|&&c| c).count();
        if n != 1 {
            return Err(DecodeError::at(
                at,
                format!(
                    "stratum `{}` gives {n} of `cells`, `rect`, `geometry` and `label`: choose its cells by exactly one",
                    s.id
                ),
            ));
        }
        let (cells, field) = if let Some(c) = s.cells {
            (c, "cells")
        } else if let Some(r) = s.rect {
            (rect(&s.id, r, raster, &at)?, "rect")
        } else if let Some(g) = &s.geometry {
            let pointer = format!("{at}/geometry");
            let (polygons, used) =
                parse_geometry(g.get().as_bytes(), vertices).map_err(|e| geo_error(e, &pointer))?;
            vertices -= used;
            let cells = rasterize(&polygons, &held.frame.grid, false);
            (
                valid_cells(&s.id, cells, raster, "geometry", &pointer)?,
                "geometry",
            )
        } else {
            let label = s.label.unwrap_or_default();
            let pointer = format!("{at}/label");
            let Some(map) = &labelled else {
                return Err(DecodeError::at(
                    pointer,
                    format!(
                        "stratum `{}` is chosen by label {label}, but the evidence has no `labels` raster: give `evidence.labels`",
                        s.id
                    ),
                ));
            };
            let Some(cells) = map.get(&label) else {
                let mut held: Vec<i64> = map.keys().copied().collect();
                held.sort_unstable();
                let shown: Vec<String> = held.iter().take(10).map(i64::to_string).collect();
                let more = if held.len() > 10 { ", ..." } else { "" };
                return Err(DecodeError::at(
                    pointer,
                    format!(
                        "stratum `{}` is chosen by label {label}, which no cell of `evidence.labels` holds: use one of its {} labels ({}{more})",
                        s.id,
                        held.len(),
                        shown.join(", ")
                    ),
                ));
            };
            (
                valid_cells(&s.id, cells.clone(), raster, "label", &pointer)?,
                "label",
            )
        };
        // Disjoint strata hold at most every valid cell: more means some overlap, refused
        // before anything larger is built.
        held_cells += cells.len() as u64;
        if held_cells > valid {
            return Err(DecodeError::unusable(
                format!("{at}/{field}"),
                format!(
                    "the strata up to `{}` hold {held_cells} cells, more than the raster's {valid} valid cells: strata must be disjoint and hold valid cells only",
                    s.id
                ),
            ));
        }
        let cells = StratumCells::new(s.id, cells, raster).map_err(|e| {
            DecodeError::at(
                format!("{at}/{field}"),
                e.to_string().replacen("zone", "stratum", 1),
            )
        })?;
        let e = total_form(s.total, &format!("{at}/total"), cells.raster())?;
        parts.push((cells, e));
    }
    Strata::new(parts).map_err(|e| match e {
        EngineError::ImpossibleEvidence(_) => {
            DecodeError::unusable("/evidence/strata", e.to_string())
        }
        _ => DecodeError::at("/evidence/strata", e.to_string()),
    })
}

/// The valid cells of a stratum chosen by an area (a geometry or a label): nodata cells are not
/// part of the raster, so they are left out; a stratum left with none is refused.
fn valid_cells(
    id: &str,
    mut cells: Vec<u32>,
    raster: &Raster,
    by: &str,
    pointer: &str,
) -> Result<Vec<u32>, DecodeError> {
    let covered = cells.len();
    cells.retain(|&c| raster.cell_problem(c).is_none());
    if cells.is_empty() {
        return Err(DecodeError::at(
            pointer,
            format!(
                "stratum `{id}`'s {by} holds no valid cell ({covered} cells, all nodata or none at all): check that it lies on the raster, in the raster's CRS"
            ),
        ));
    }
    Ok(cells)
}

/// Decodes one total in each of its forms, every mistake reported at its own field under `at`.
fn total_form(total: Value, at: &str, raster: &Raster) -> Result<Evidence, DecodeError> {
    let at_root = at.to_string();
    let at_root = at_root.as_str();
    // Evidence the raster cannot produce was read but cannot be used (422); malformed
    // evidence is invalid input (400).
    let engine = |at: &str| {
        let at = at.to_string();
        move |e: EngineError| match e {
            EngineError::ImpossibleTotal(_) | EngineError::ImpossibleEvidence(_) => {
                DecodeError::unusable(at, e.to_string())
            }
            _ => DecodeError::at(at, e.to_string()),
        }
    };
    match total {
        Value::Number(_) => {
            let m = whole(&total, at_root, "total")?;
            Evidence::exact_total(m, raster).map_err(engine(at_root))
        }
        Value::Object(map) => {
            let keys: Vec<&str> = map.keys().map(String::as_str).collect();
            let field = |name: &str| -> Result<&Value, DecodeError> {
                map.get(name).ok_or_else(|| {
                    DecodeError::at(
                        format!("{at_root}/{name}"),
                        format!("`{name}` is missing: {}", FORMS_HINT),
                    )
                })
            };
            let known = |allowed: &[&str]| -> Result<(), DecodeError> {
                match keys.iter().find(|k| !allowed.contains(k)) {
                    Some(k) => Err(DecodeError::at(
                        format!("{at_root}/{k}"),
                        format!(
                            "unknown field `{k}` next to `{}`: {FORMS_HINT}",
                            allowed.join("`, `")
                        ),
                    )),
                    None => Ok(()),
                }
            };
            if map.contains_key("min") || map.contains_key("max") {
                known(&["min", "max"])?;
                let min = whole(field("min")?, &format!("{at_root}/min"), "min")?;
                let max = whole(field("max")?, &format!("{at_root}/max"), "max")?;
                Evidence::range(min, max, raster).map_err(engine(at_root))
            } else if map.contains_key("detected") || map.contains_key("detection") {
                known(&["detected", "detection"])?;
                let detected = whole(
                    field("detected")?,
                    &format!("{at_root}/detected"),
                    "detected",
                )?;
                let rate = field("detection")?;
                let detection = rate.as_f64().ok_or_else(|| {
                    DecodeError::at(
                        format!("{at_root}/detection"),
                        format!("detection rate {rate} must be a number in (0, 1], e.g. 0.85"),
                    )
                })?;
                // A bad rate belongs to the rate's field, an impossible count to the count's.
                let at = if detection > 0.0 && detection <= 1.0 {
                    "detected"
                } else {
                    "detection"
                };
                Evidence::detected(detected, detection, raster)
                    .map_err(engine(&format!("{at_root}/{at}")))
            } else if map.contains_key("likelihood") {
                known(&["likelihood"])?;
                let at = format!("{at_root}/likelihood");
                let Some(l) = field("likelihood")?.as_object() else {
                    return Err(DecodeError::at(
                        at,
                        "the likelihood must be an object {\"offset\": total of the first value, \"values\": [P(observation | total), ...]}",
                    ));
                };
                if let Some(k) = l.keys().find(|k| *k != "offset" && *k != "values") {
                    return Err(DecodeError::at(
                        format!("{at}/{k}"),
                        format!("unknown field `{k}`: the likelihood has `offset` and `values`"),
                    ));
                }
                let offset = match l.get("offset") {
                    Some(v) => whole(v, &format!("{at}/offset"), "offset")?,
                    None => 0,
                };
                let Some(values) = l.get("values").and_then(Value::as_array) else {
                    return Err(DecodeError::at(
                        format!("{at}/values"),
                        "`values` must be an array of P(observation | total = offset + index), non-negative and not all zero",
                    ));
                };
                if values.len() > MAX_LIKELIHOOD_VALUES {
                    return Err(DecodeError::at(
                        format!("{at}/values"),
                        format!(
                            "the likelihood lists {} values: at most {MAX_LIKELIHOOD_VALUES} are accepted",
                            values.len()
                        ),
                    ));
                }
                let mut read = Vec::with_capacity(values.len());
                for (i, v) in values.iter().enumerate() {
                    match v.as_f64() {
                        Some(x) if x >= 0.0 => read.push(x),
                        _ => {
                            return Err(DecodeError::at(
                                format!("{at}/values/{i}"),
                                format!("likelihood value {v} must be a number >= 0"),
                            ))
                        }
                    }
                }
                Evidence::likelihood(offset, read, raster).map_err(engine(&at))
            } else {
                Err(DecodeError::at(
                    at_root,
                    format!(
                        "the total has fields `{}`, which name no form of evidence: {FORMS_HINT}",
                        keys.join("`, `")
                    ),
                ))
            }
        }
        other => Err(DecodeError::at(
            at_root,
            format!("the total is {other}: {FORMS_HINT}"),
        )),
    }
}

const FORMS_HINT: &str = "give a count (318), a range {\"min\": 300, \"max\": 340}, a detected count {\"detected\": 318, \"detection\": 0.85} or a likelihood {\"likelihood\": {\"offset\": 300, \"values\": [...]}}";

/// A count: a non-negative whole number, written as an integer or as a float with no fraction
/// (`318.0`).
fn whole(v: &Value, at: &str, name: &str) -> Result<u64, DecodeError> {
    if let Some(n) = v.as_u64() {
        return Ok(n);
    }
    let hint = |why: &str| DecodeError::at(at, format!("{name} {v} {why}"));
    match v.as_f64() {
        Some(x) if x < 0.0 => Err(hint("is negative: a count of events is >= 0")),
        Some(x) if x.fract() != 0.0 => Err(hint(
            "is not a whole number: give a count of events, e.g. 318",
        )),
        // Below 2^64 every whole f64 converts exactly.
        Some(x) if x < 18_446_744_073_709_551_616.0 => Ok(x as u64),
        Some(_) => Err(hint("is too large: a count must fit in 64 bits")),
        None => Err(hint("is not a number: give a count of events, e.g. 318")),
    }
}

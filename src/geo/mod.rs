//! The geospatial format layer: GeoTIFF rasters in and out, GeoJSON zones in, zone outlines out.
//!
//! Everything here is pure and synchronous. Functions take the bytes or values they are handed
//! and return owned results or a [`GeoError`]; nothing in this module opens files, sockets or
//! runtimes, nor knows about HTTP (the caller owns transport and maps errors to responses).
//! Every decoder here sits on a request path, so no input may panic it and every size is
//! checked before memory is reserved for it.
//!
//! Shared types: [`GeoTransform`] (north-up cell-to-map mapping), [`Grid`] (raster shape plus
//! optional georeferencing) and the one error enum [`GeoError`].

pub mod geotiff;
pub mod outline;
pub mod rect;
pub mod zones;

use thiserror::Error;

/// North-up affine mapping from cell (row, col) to map coordinates:
/// `x = origin_x + col * cell_width`, `y = origin_y - row * cell_height`, both sizes `> 0`.
/// The origin is the outer corner of cell (0, 0), as in a GDAL geotransform.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct GeoTransform {
    pub origin_x: f64,
    pub origin_y: f64,
    pub cell_width: f64,
    pub cell_height: f64,
}

impl GeoTransform {
    /// A transform after checking that every term is finite and both cell sizes are positive.
    pub fn new(
        origin_x: f64,
        origin_y: f64,
        cell_width: f64,
        cell_height: f64,
    ) -> Result<Self, GeoError> {
        if !origin_x.is_finite() || !origin_y.is_finite() {
            return Err(GeoError::Transform {
                problem: "the origin is not finite".into(),
                value: format!("({origin_x}, {origin_y})"),
                hint: "give the map coordinates of the raster's top-left corner",
            });
        }
        if !(cell_width.is_finite() && cell_width > 0.0) {
            return Err(GeoError::Transform {
                problem: "the cell width must be finite and positive".into(),
                value: cell_width.to_string(),
                hint: "a raster whose columns run west (negative width) must be flipped first",
            });
        }
        if !(cell_height.is_finite() && cell_height > 0.0) {
            return Err(GeoError::Transform {
                problem: "the cell height must be finite and positive (north-up)".into(),
                value: cell_height.to_string(),
                hint: "a south-up raster (rows running north) must be flipped to north-up first",
            });
        }
        Ok(Self {
            origin_x,
            origin_y,
            cell_width,
            cell_height,
        })
    }

    /// Map coordinates of the centre of cell (row, col).
    pub fn cell_centre(&self, row: u32, col: u32) -> (f64, f64) {
        (
            self.origin_x + (f64::from(col) + 0.5) * self.cell_width,
            self.origin_y - (f64::from(row) + 0.5) * self.cell_height,
        )
    }

    /// From the six GDAL geotransform terms `[x0, dx, rx, y0, ry, dy]` (`dy` negative for
    /// north-up). Rotation or shear (`rx`, `ry` non-zero) is refused: no reprojection here.
    pub fn from_gdal(terms: [f64; 6]) -> Result<Self, GeoError> {
        let [x0, dx, rx, y0, ry, dy] = terms;
        if rx != 0.0 || ry != 0.0 {
            return Err(GeoError::Rotated {
                row_rotation: rx,
                column_rotation: ry,
            });
        }
        Self::new(x0, y0, dx, -dy)
    }

    /// The six GDAL geotransform terms; the inverse of [`GeoTransform::from_gdal`].
    pub fn to_gdal(&self) -> [f64; 6] {
        [
            self.origin_x,
            self.cell_width,
            0.0,
            self.origin_y,
            0.0,
            -self.cell_height,
        ]
    }
}

/// A raster's shape and, when known, where it lies (`transform`) and in which CRS (`crs`, an
/// EPSG code).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Grid {
    pub width: u32,
    pub height: u32,
    pub transform: Option<GeoTransform>,
    pub crs: Option<u32>,
}

impl Grid {
    /// Number of cells, `width * height` (cannot overflow: both are `u32`).
    pub fn cell_count(&self) -> u64 {
        u64::from(self.width) * u64::from(self.height)
    }
}

/// Everything that can go wrong decoding or encoding a GeoTIFF or GeoJSON document.
///
/// Messages are lowercase, carry the offending value and say how to fix the input. GeoJSON
/// variants carry a JSON pointer (RFC 6901) to the offending member when one is known.
#[derive(Debug, Error, Clone, PartialEq)]
pub enum GeoError {
    #[error("the geotransform is not usable: {problem} (got {value}): {hint}")]
    Transform {
        problem: String,
        value: String,
        hint: &'static str,
    },
    #[error(
        "the raster is rotated or sheared (row rotation term {row_rotation}, column rotation \
         term {column_rotation}); only north-up rasters are read: warp it to north-up first"
    )]
    Rotated {
        row_rotation: f64,
        column_rotation: f64,
    },
    #[error(
        "the GeoTIFF claims {width}x{height} = {cells:e} pixels, above the limit of {limit} \
         cells: coarsen or tile the raster"
    )]
    TooManyCells {
        width: u64,
        height: u64,
        cells: f64,
        limit: u64,
    },
    #[error("the GeoTIFF could not be decoded: {detail}: {hint}")]
    TiffDecode { detail: String, hint: &'static str },
    #[error("the GeoTIFF uses {feature} = {value}, which is not supported: {hint}")]
    TiffUnsupported {
        feature: &'static str,
        value: String,
        hint: &'static str,
    },
    #[error("the GeoTIFF tag {name} ({tag}) is malformed: {problem}: {hint}")]
    TiffTag {
        tag: u16,
        name: &'static str,
        problem: String,
        hint: &'static str,
    },
    #[error(
        "the GeoTIFF has {bands} bands; one band is expected: split the bands and send the \
         one to use"
    )]
    BandCount { bands: u32 },
    #[error("the GeoTIFF could not be written: {detail}")]
    TiffEncode { detail: String },
    #[error(
        "band {band} has {found} values but the {width}x{height} grid has {expected} cells: \
         give every band one value per cell, row-major"
    )]
    BandLength {
        band: usize,
        found: usize,
        expected: u64,
        width: u32,
        height: u32,
    },
    #[error("cannot write {bands} bands: between 1 and {max} bands can be written")]
    WriteBandCount { bands: usize, max: usize },
    #[error("the GeoJSON is not valid JSON at line {line}, column {column}: {detail}")]
    JsonSyntax {
        line: usize,
        column: usize,
        detail: String,
    },
    #[error("{} {problem} (got {found}): {hint}", at(pointer))]
    GeoJson {
        pointer: Option<String>,
        problem: String,
        found: String,
        hint: &'static str,
    },
    #[error(
        "{} the geometry type {found} cannot be a zone: zones are areas; buffer points and \
         lines into polygons first",
        at(pointer)
    )]
    NotAnArea {
        pointer: Option<String>,
        found: String,
    },
    #[error("{} the ring is invalid: {problem} (got {found}): {hint}", at(pointer))]
    InvalidRing {
        pointer: Option<String>,
        problem: &'static str,
        found: String,
        hint: &'static str,
    },
    #[error(
        "{} the coordinate {value} is not a usable map coordinate (finite, magnitude at most \
         {limit:e}): check the units and the CRS",
        at(pointer)
    )]
    BadCoordinate {
        pointer: Option<String>,
        value: f64,
        limit: f64,
    },
    #[error(
        "{} the zones are in EPSG:{found} but the raster is in EPSG:{raster}; zones are not \
         reprojected: reproject them to EPSG:{raster} first",
        at(pointer)
    )]
    CrsMismatch {
        pointer: Option<String>,
        found: u32,
        raster: u32,
    },
    #[error(
        "{} the GeoJSON has more than {limit} vertices in total: simplify the zones or send \
         fewer at a time",
        at(pointer)
    )]
    TooManyVertices { pointer: Option<String>, limit: u64 },
    #[error(
        "{} the feature has no zone id ({wanted}): give every feature a string or number id",
        at(pointer)
    )]
    MissingZoneId {
        pointer: Option<String>,
        wanted: String,
    },
    #[error(
        "{} the zone id {id:?} is used again (first at {first}): give every zone its own id",
        at(pointer)
    )]
    DuplicateZoneId {
        pointer: Option<String>,
        id: String,
        first: String,
    },
    #[error(
        "the label raster has {found} values but {expected} were expected: give one label \
         per cell"
    )]
    LabelLength { found: usize, expected: usize },
    #[error(
        "cell {index} holds the label {value}, which is not an integer: label rasters hold \
         whole-number zone ids (0 and nodata for no zone)"
    )]
    LabelNotInteger { index: usize, value: f64 },
    #[error(
        "cell index {index} is outside the {width}x{height} grid: cell indices are row-major \
         and below {cells}"
    )]
    CellOutOfGrid {
        index: u64,
        width: u32,
        height: u32,
        cells: u64,
    },
    #[error("the grid has no geotransform: {what} needs cell positions in map coordinates")]
    NoTransform { what: &'static str },
}

/// The "at /pointer:" prefix of GeoJSON messages; empty for the document as a whole.
fn at(pointer: &Option<String>) -> String {
    match pointer {
        Some(p) if !p.is_empty() => format!("at {p}:"),
        _ => "in the document:".to_string(),
    }
}

impl GeoError {
    /// The JSON pointer of the offending GeoJSON member, when the error has one.
    pub fn pointer(&self) -> Option<&str> {
        match self {
            GeoError::GeoJson { pointer, .. }
            | GeoError::NotAnArea { pointer, .. }
            | GeoError::InvalidRing { pointer, .. }
            | GeoError::BadCoordinate { pointer, .. }
            | GeoError::CrsMismatch { pointer, .. }
            | GeoError::TooManyVertices { pointer, .. }
            | GeoError::MissingZoneId { pointer, .. }
            | GeoError::DuplicateZoneId { pointer, .. } => pointer.as_deref(),
            _ => None,
        }
    }
}

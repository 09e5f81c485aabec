//! Validated inputs of the engine: the probability raster, the zones and the settings.
//!
//! Everything here is checked once, at construction; the kernels trust these types and never
//! re-validate. Construction errors carry the offending value and a hint, in the words a
//! caller can show to a person.

use super::error::EngineError;

/// Marker stored in the raster for a nodata cell: outside the study area, holds no event.
const NODATA: f64 = f64::NAN;

/// Index of a cell in row-major order (row 0 at the top).
#[derive(Clone, Copy, Debug, PartialEq, Eq, PartialOrd, Ord, Hash)]
pub struct CellIndex(pub u32);

/// A width x height grid of per-cell event probabilities, row-major, row 0 at the top.
#[derive(Clone, Debug)]
pub struct Raster {
    width: u32,
    height: u32,
    /// Probability in [0, 1], or NaN for nodata.
    values: Vec<f64>,
    stats: RasterStats,
}

/// Counts and moments of a raster, computed once at construction.
#[derive(Clone, Copy, Debug, Default, PartialEq)]
pub struct RasterStats {
    /// Cells with a probability (not nodata).
    pub valid: u64,
    /// Cells with p = 1: an event for certain.
    pub certain: u64,
    /// Cells with 0 < p < 1.
    pub free: u64,
    /// Sum of p over valid cells: the prior mean of the total.
    pub sum_p: f64,
    /// Sum of p(1-p): the prior variance of the total.
    pub sum_var: f64,
}

impl Raster {
    /// Builds a raster from row-major values; `None` marks nodata.
    ///
    /// Occurs as an error when the size does not match, the raster is empty or larger than
    /// `u32` indices allow, or a value is not a probability.
    pub fn new(width: u32, height: u32, values: Vec<Option<f64>>) -> Result<Raster, EngineError> {
        check_shape(width, height, values.len())?;
        let mut out = Vec::with_capacity(values.len());
        for (i, v) in values.into_iter().enumerate() {
            match v {
                None => out.push(NODATA),
                Some(p) if (0.0..=1.0).contains(&p) => out.push(p),
                Some(p) => {
                    return Err(EngineError::InvalidValue {
                        cell: i as u32,
                        detail: format!(
                            "cell {i} has value {p}: a probability must lie in [0, 1] (use nodata for cells outside the study area)"
                        ),
                    })
                }
            }
        }
        Ok(Self::from_checked(width, height, out))
    }

    /// Builds a raster from row-major values where NaN marks nodata, validating in place (no
    /// copy: large generated rasters need not exist twice).
    ///
    /// Occurs as an error on the same conditions as `new`.
    pub fn from_probabilities(
        width: u32,
        height: u32,
        values: Vec<f64>,
    ) -> Result<Raster, EngineError> {
        check_shape(width, height, values.len())?;
        if let Some(i) = values
            .iter()
            .position(|p| !p.is_nan() && !(0.0..=1.0).contains(p))
        {
            let p = values[i];
            return Err(EngineError::InvalidValue {
                cell: i as u32,
                detail: format!(
                    "cell {i} has value {p}: a probability must lie in [0, 1] (use nodata for cells outside the study area)"
                ),
            });
        }
        Ok(Self::from_checked(width, height, values))
    }

    fn from_checked(width: u32, height: u32, values: Vec<f64>) -> Raster {
        let mut stats = RasterStats::default();
        for &p in &values {
            if p.is_nan() {
                continue;
            }
            stats.valid += 1;
            if p >= 1.0 {
                stats.certain += 1;
            } else if p > 0.0 {
                stats.free += 1;
                stats.sum_var += p * (1.0 - p);
            }
            stats.sum_p += p;
        }
        Raster {
            width,
            height,
            values,
            stats,
        }
    }

    pub fn width(&self) -> u32 {
        self.width
    }
    pub fn height(&self) -> u32 {
        self.height
    }
    pub fn len(&self) -> usize {
        self.values.len()
    }
    pub fn is_empty(&self) -> bool {
        self.values.is_empty()
    }
    pub fn stats(&self) -> &RasterStats {
        &self.stats
    }
    /// The probability of a cell, or `None` for nodata.
    pub fn get(&self, cell: CellIndex) -> Option<f64> {
        let p = self.values[cell.0 as usize];
        (!p.is_nan()).then_some(p)
    }
    /// Raw values: probabilities, NaN for nodata.
    pub fn values(&self) -> &[f64] {
        &self.values
    }
    /// Bytes held by the values.
    pub fn heap_bytes(&self) -> usize {
        self.values.len() * std::mem::size_of::<f64>()
    }
    /// Row and column of a cell.
    pub fn row_col(&self, cell: CellIndex) -> (u32, u32) {
        (cell.0 / self.width, cell.0 % self.width)
    }
}

/// Occurs as an error when the size does not match, the raster is empty or larger than `u32`
/// indices allow.
fn check_shape(width: u32, height: u32, len: usize) -> Result<(), EngineError> {
    let expected = (width as u64) * (height as u64);
    if width == 0 || height == 0 {
        return Err(EngineError::InvalidRaster(format!(
            "raster is {width}x{height}: width and height must both be at least 1"
        )));
    }
    if expected > u32::MAX as u64 {
        return Err(EngineError::InvalidRaster(format!(
            "raster is {width}x{height} = {expected} cells: at most {} cells are supported",
            u32::MAX
        )));
    }
    if len as u64 != expected {
        return Err(EngineError::InvalidRaster(format!(
            "raster is {width}x{height} = {expected} cells but {len} values were given"
        )));
    }
    Ok(())
}

/// A named set of cells. Cells are distinct, valid (not nodata) and sorted.
#[derive(Clone, Debug, PartialEq)]
pub struct Zone {
    id: String,
    cells: Vec<u32>,
}

impl Zone {
    /// Checks a zone against its raster.
    ///
    /// Occurs as an error when the zone is empty, a cell lies outside the raster, a cell is
    /// nodata, or a cell is listed twice.
    pub fn new(
        id: impl Into<String>,
        cells: Vec<u32>,
        raster: &Raster,
    ) -> Result<Zone, EngineError> {
        let id = id.into();
        let (w, h) = (raster.width(), raster.height());
        let last = raster.len() as u64 - 1;
        if cells.is_empty() {
            return Err(EngineError::InvalidZone {
                zone: id.clone(),
                position: None,
                detail: format!("zone `{id}` has no cells: give at least one cell"),
            });
        }
        for (pos, &c) in cells.iter().enumerate() {
            if c as u64 > last {
                return Err(EngineError::InvalidZone {
                    zone: id.clone(),
                    position: Some(pos),
                    detail: format!(
                        "zone `{id}` has cell {c}, outside the {w}x{h} raster (last index {last})"
                    ),
                });
            }
            if raster.values[c as usize].is_nan() {
                return Err(EngineError::InvalidZone {
                    zone: id.clone(),
                    position: Some(pos),
                    detail: format!(
                        "zone `{id}` has cell {c}, which is nodata (outside the study area): remove it from the zone"
                    ),
                });
            }
        }
        let mut sorted = cells;
        sorted.sort_unstable();
        if let Some(w2) = sorted.windows(2).find(|w2| w2[0] == w2[1]) {
            return Err(EngineError::InvalidZone {
                zone: id.clone(),
                position: None,
                detail: format!(
                    "zone `{id}` lists cell {} more than once: list each cell once",
                    w2[0]
                ),
            });
        }
        Ok(Zone { id, cells: sorted })
    }

    /// An unnamed block of cells already known to be valid, distinct and sorted (internal use).
    pub(crate) fn block(cells: Vec<u32>) -> Zone {
        Zone {
            id: String::new(),
            cells,
        }
    }

    pub fn id(&self) -> &str {
        &self.id
    }
    /// The zone's cells, sorted ascending.
    pub fn cells(&self) -> &[u32] {
        &self.cells
    }
    pub fn len(&self) -> usize {
        self.cells.len()
    }
    pub fn is_empty(&self) -> bool {
        self.cells.is_empty()
    }
}

/// Checks that zone ids are unique. Occurs as an error naming the first repeated id.
pub fn check_unique_ids(zones: &[Zone]) -> Result<(), EngineError> {
    let mut seen = std::collections::HashSet::with_capacity(zones.len());
    for (i, z) in zones.iter().enumerate() {
        if !seen.insert(z.id()) {
            return Err(EngineError::InvalidZone {
                zone: z.id().to_string(),
                position: None,
                detail: format!(
                    "zone id `{}` is used twice (second time at zone {i}): give each zone its own id",
                    z.id()
                ),
            });
        }
    }
    Ok(())
}

/// Default accuracy target: every reported probability within this of the exact value.
pub const DEFAULT_TOLERANCE: f64 = 1e-13;
/// Default credible level of the equal-tailed interval.
pub const DEFAULT_LEVEL: f64 = 0.9;
/// Loosest tolerance a request may ask for; beyond it the summaries would be meaningless.
pub const MAX_TOLERANCE: f64 = 1e-3;
/// Tightest tolerance: below it the truncation budget falls under f64 rounding.
pub const MIN_TOLERANCE: f64 = 1e-15;

/// What to report for each zone.
#[derive(Clone, Debug, PartialEq)]
pub struct Settings {
    /// Credible level of the equal-tailed interval, in (0, 1).
    pub level: f64,
    /// Thresholds k for the exceedance probabilities P(N >= k).
    pub thresholds: Vec<u64>,
    /// Accuracy target for the truncation (see `DEFAULT_TOLERANCE`).
    pub tolerance: f64,
    /// Whether the pmf itself is reported.
    pub pmf: bool,
}

impl Default for Settings {
    fn default() -> Self {
        Settings {
            level: DEFAULT_LEVEL,
            thresholds: Vec::new(),
            tolerance: DEFAULT_TOLERANCE,
            pmf: true,
        }
    }
}

impl Settings {
    /// Occurs as an error when the level is not in (0, 1) or the tolerance is out of range.
    pub fn new(
        level: f64,
        thresholds: Vec<u64>,
        tolerance: f64,
        pmf: bool,
    ) -> Result<Settings, EngineError> {
        if !(level > 0.0 && level < 1.0) {
            return Err(EngineError::InvalidSetting {
                field: "interval",
                detail: format!(
                    "interval level {level} must lie strictly between 0 and 1, e.g. 0.9"
                ),
            });
        }
        if !(MIN_TOLERANCE..=MAX_TOLERANCE).contains(&tolerance) {
            return Err(EngineError::InvalidSetting {
                field: "tolerance",
                detail: format!(
                    "tolerance {tolerance} must lie in [{MIN_TOLERANCE:e}, {MAX_TOLERANCE:e}]; the default is {DEFAULT_TOLERANCE:e}"
                ),
            });
        }
        Ok(Settings {
            level,
            thresholds,
            tolerance,
            pmf,
        })
    }
}

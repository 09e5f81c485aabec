//! Validated inputs of the engine: the probability raster, the zones and the settings.
//!
//! Everything here is checked once, at construction; the kernels trust these types and never
//! re-validate. Construction errors carry the offending value and a hint, in the words a
//! caller can show to a person.

use std::ops::Deref;

use super::error::{CellProblem, EngineError, Missing, RasterProblem, SettingProblem, ZoneProblem};

/// Marker stored in the raster for a nodata cell: outside the study area, holds no event.
const NODATA: f64 = f64::NAN;

/// Index of a cell in row-major order (row 0 at the top).
#[derive(Clone, Copy, Debug, PartialEq, Eq, PartialOrd, Ord, Hash)]
#[repr(transparent)]
pub struct CellIndex(pub u32);

impl From<CellIndex> for u32 {
    fn from(c: CellIndex) -> u32 {
        c.0
    }
}

impl CellIndex {
    /// The index as a position in the raster's values.
    #[inline]
    pub fn index(self) -> usize {
        self.0 as usize
    }
}

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
                Some(value) => {
                    return Err(EngineError::InvalidValue {
                        cell: i as u32,
                        value,
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
            return Err(EngineError::InvalidValue {
                cell: i as u32,
                value: values[i],
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
        let p = self.values[cell.index()];
        (!p.is_nan()).then_some(p)
    }

    /// Why `cell` cannot be used in a zone or a cell list, if it cannot.
    pub fn cell_problem(&self, cell: u32) -> Option<CellProblem> {
        match self.values.get(cell as usize) {
            None => Some(CellProblem::Outside {
                width: self.width,
                height: self.height,
            }),
            Some(p) if p.is_nan() => Some(CellProblem::Nodata),
            Some(_) => None,
        }
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
    let problem = if width == 0 || height == 0 {
        RasterProblem::Empty { width, height }
    } else if expected > u32::MAX as u64 {
        RasterProblem::TooManyCells { width, height }
    } else if len as u64 != expected {
        RasterProblem::ValueCount {
            width,
            height,
            given: len,
        }
    } else {
        return Ok(());
    };
    Err(EngineError::InvalidRaster(problem))
}

/// A named set of cells. Cells are distinct, valid (not nodata) and sorted.
#[derive(Clone, Debug, PartialEq)]
pub struct Zone {
    id: String,
    cells: Vec<CellIndex>,
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
        let invalid = |zone: String, problem| EngineError::InvalidZone { zone, problem };
        if cells.is_empty() {
            return Err(invalid(id, ZoneProblem::Empty));
        }
        if let Some((position, cell, problem)) = cells
            .iter()
            .enumerate()
            .find_map(|(pos, &c)| raster.cell_problem(c).map(|p| (pos, c, p)))
        {
            return Err(invalid(
                id,
                ZoneProblem::Cell {
                    position,
                    cell,
                    problem,
                },
            ));
        }
        let mut sorted = cells;
        sorted.sort_unstable();
        if let Some(w2) = sorted.windows(2).find(|w2| w2[0] == w2[1]) {
            return Err(invalid(id, ZoneProblem::Repeated { cell: w2[0] }));
        }
        Ok(Zone {
            id,
            cells: sorted.into_iter().map(CellIndex).collect(),
        })
    }

    /// An unnamed block of cells already known to be valid, distinct and sorted (internal use).
    pub(crate) fn block(cells: Vec<CellIndex>) -> Zone {
        Zone {
            id: String::new(),
            cells,
        }
    }

    pub fn id(&self) -> &str {
        &self.id
    }
    /// The zone's cells, sorted ascending.
    pub fn cells(&self) -> &[CellIndex] {
        &self.cells
    }
    /// The zone's cells as plain row-major indices, sorted ascending.
    pub fn indices(&self) -> impl Iterator<Item = u32> + '_ {
        self.cells.iter().map(|c| c.0)
    }
    pub fn len(&self) -> usize {
        self.cells.len()
    }
    pub fn is_empty(&self) -> bool {
        self.cells.is_empty()
    }
}

/// Checks that there is at least one zone and that zone ids are unique. Occurs as an error
/// naming the first repeated id.
pub fn check_zones(zones: &[Zone]) -> Result<(), EngineError> {
    if zones.is_empty() {
        return Err(EngineError::NothingToDo(Missing::Zones));
    }
    let mut seen = std::collections::HashMap::with_capacity(zones.len());
    for (i, z) in zones.iter().enumerate() {
        if let Some(&first) = seen.get(z.id()) {
            return Err(EngineError::InvalidZone {
                zone: z.id().to_string(),
                problem: ZoneProblem::DuplicateId { first, second: i },
            });
        }
        seen.insert(z.id(), i);
    }
    Ok(())
}

/// A checked list of zones: at least one, ids unique. The engine's entry points that take a
/// `ZoneSet` do not check again.
#[derive(Clone, Debug, PartialEq)]
pub struct ZoneSet(Vec<Zone>);

impl ZoneSet {
    /// Occurs as an error for an empty list or a repeated id.
    pub fn new(zones: Vec<Zone>) -> Result<ZoneSet, EngineError> {
        check_zones(&zones)?;
        Ok(ZoneSet(zones))
    }
    /// Cells over all zones, counted with multiplicity.
    pub fn cell_count(&self) -> u64 {
        self.0.iter().map(|z| z.len() as u64).sum()
    }
}

impl Deref for ZoneSet {
    type Target = [Zone];
    fn deref(&self) -> &[Zone] {
        &self.0
    }
}

/// Default accuracy target: every reported probability within this of the exact value.
pub const DEFAULT_TOLERANCE: f64 = 1e-13;
/// Default credible level of the equal-tailed interval.
pub const DEFAULT_LEVEL: f64 = 0.9;
/// Loosest tolerance a request may ask for; beyond it the summaries would be meaningless.
pub const MAX_TOLERANCE: f64 = 1e-3;
/// Tightest tolerance: below it the truncation budget falls under f64 rounding.
pub const MIN_TOLERANCE: f64 = 1e-15;

/// What to report for each zone. Built checked by `Settings::new`; fields are read-only.
#[derive(Clone, Debug, PartialEq)]
pub struct Settings {
    level: f64,
    thresholds: Vec<u64>,
    tolerance: f64,
    pmf: bool,
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
            return Err(EngineError::InvalidSetting(SettingProblem::Level(level)));
        }
        if !(MIN_TOLERANCE..=MAX_TOLERANCE).contains(&tolerance) {
            return Err(EngineError::InvalidSetting(SettingProblem::Tolerance {
                value: tolerance,
                min: MIN_TOLERANCE,
                max: MAX_TOLERANCE,
                default: DEFAULT_TOLERANCE,
            }));
        }
        Ok(Settings {
            level,
            thresholds,
            tolerance,
            pmf,
        })
    }
    /// Credible level of the equal-tailed interval, in (0, 1).
    pub fn level(&self) -> f64 {
        self.level
    }
    /// Thresholds k for the exceedance probabilities P(N >= k).
    pub fn thresholds(&self) -> &[u64] {
        &self.thresholds
    }
    /// Accuracy target for the truncation (see `DEFAULT_TOLERANCE`).
    pub fn tolerance(&self) -> f64 {
        self.tolerance
    }
    /// Whether the pmf itself is reported.
    pub fn pmf(&self) -> bool {
        self.pmf
    }
}

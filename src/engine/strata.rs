//! Evidence per stratum: disjoint sets of cells (districts), each with its own evidence on its
//! own total; cells in no stratum are unconstrained.
//!
//! Given the strata's evidence the strata are independent (their cells are, and each
//! observation depends on its own stratum's total only), so a zone's law is the convolution over
//! strata of the law of (zone within the stratum) given that stratum's evidence, convolved with
//! the prior law of the zone's unconstrained cells. Each stratum runs the whole engine on its own
//! raster of its cells (normaliser, plan, one tree pass); zones straddling strata are combined at
//! the end. The posterior of the raster's true total is the convolution of the strata's
//! posteriors with the prior law of every unconstrained cell.
//!
//! Worst case: the sum of the strata's passes, plus per zone the convolutions of its parts
//! (widths times widths) and the product tree of its unconstrained cells.

use std::collections::HashMap;

use super::control::Control;
use super::error::EngineError;
use super::evidence::Evidence;
use super::execute::{execute, summary_of};
use super::law::{convolve, Law};
use super::model::{CellIndex, Raster, Settings, Zone};
use super::normaliser::{prior_interval, Normaliser, TotalCheck, TotalPosterior, IMPLAUSIBLE_TAIL};
use super::plan::plan;
use super::posterior::{cell_posterior, CellPosterior};
use super::rounding::gamma;
use super::sets::{trims_for, Cells};
use super::summary::ZoneSummary;

/// Mass the prior law of a zone's unconstrained cells may drop, in all: far below the
/// tightest tolerance, so it never decides a bound.
const PRIOR_DROP: f64 = 1e-19;

/// One stratum's cells, as a raster of its own (1 x n, in ascending raster order).
#[derive(Clone, Debug)]
pub struct StratumCells {
    pub id: String,
    cells: Vec<CellIndex>,
    raster: Raster,
}

impl StratumCells {
    /// Checks a stratum's cells against the raster: non-empty, inside, valid, each once.
    ///
    /// Occurs as `InvalidZone` (the stratum named as the zone) for the same faults as a zone.
    pub fn new(
        id: impl Into<String>,
        cells: Vec<u32>,
        raster: &Raster,
    ) -> Result<StratumCells, EngineError> {
        let zone = Zone::new(id, cells, raster)?;
        let values: Vec<f64> = zone
            .cells()
            .iter()
            .map(|c| raster.values()[c.index()])
            .collect();
        let sub = Raster::from_probabilities(values.len() as u32, 1, values)?;
        Ok(StratumCells {
            id: zone.id().to_string(),
            cells: zone.cells().to_vec(),
            raster: sub,
        })
    }

    /// The stratum's first cell in raster order.
    pub fn first_cell(&self) -> u32 {
        self.cells[0].0
    }

    /// The stratum's own raster, against which its evidence is checked.
    pub fn raster(&self) -> &Raster {
        &self.raster
    }

    /// The stratum's cells in ascending raster order: cell i of its own raster is `cells()[i]`.
    pub fn cells(&self) -> &[CellIndex] {
        &self.cells
    }
}

/// Disjoint strata, each with its evidence checked against its own raster.
#[derive(Clone, Debug)]
pub struct Strata {
    parts: Vec<(StratumCells, Evidence)>,
}

impl Strata {
    /// Occurs as `ImpossibleEvidence` when two strata share a cell (naming both and the cell),
    /// and as `InvalidEvidence` when two strata share an id or none is given.
    pub fn new(parts: Vec<(StratumCells, Evidence)>) -> Result<Strata, EngineError> {
        if parts.is_empty() {
            return Err(EngineError::InvalidEvidence(
                "the strata list is empty: give at least one stratum, or an overall `total`".into(),
            ));
        }
        let mut owner: HashMap<u32, usize> = HashMap::new();
        let mut ids: HashMap<&str, usize> = HashMap::new();
        for (i, (s, _)) in parts.iter().enumerate() {
            if let Some(j) = ids.insert(&s.id, i) {
                return Err(EngineError::InvalidEvidence(format!(
                    "stratum id `{}` is used twice (strata {j} and {i}): give each stratum its own id",
                    s.id
                )));
            }
            for c in &s.cells {
                if let Some(&j) = owner.get(&c.0) {
                    return Err(EngineError::ImpossibleEvidence(format!(
                        "strata `{}` and `{}` both hold cell {}: strata must be disjoint",
                        parts[j].0.id, s.id, c.0
                    )));
                }
                owner.insert(c.0, i);
            }
        }
        Ok(Strata { parts })
    }

    pub fn len(&self) -> usize {
        self.parts.len()
    }

    /// Each stratum and its evidence, in the strata's order.
    pub fn parts(&self) -> &[(StratumCells, Evidence)] {
        &self.parts
    }

    pub fn is_empty(&self) -> bool {
        self.parts.is_empty()
    }

    /// How many cells each stratum holds, in the strata's order.
    pub fn cell_counts(&self) -> Vec<usize> {
        self.parts.iter().map(|p| p.0.cells.len()).collect()
    }

    /// Cells held by some stratum.
    pub fn cell_count(&self) -> usize {
        self.parts.iter().map(|p| p.0.cells.len()).sum()
    }
}

/// What a run under strata reports: the zones, the check of each stratum and of the whole.
#[derive(Clone, Debug)]
pub struct StrataEvaluation {
    pub zones: Vec<ZoneSummary>,
    /// (stratum id, its total check), in the strata's order.
    pub strata: Vec<(String, TotalCheck)>,
    pub total: TotalCheck,
}

/// A normalised pmf with its certified L1 bound.
struct Part {
    offset: u64,
    pmf: Vec<f64>,
    bound: f64,
}

/// The prior law of `cells` (untilted), as a part.
fn prior_part(raster: &Raster, cells: &[CellIndex]) -> Part {
    let law = Cells {
        values: raster.values(),
        t: 1.0,
        eps: PRIOR_DROP / trims_for(cells.len()) as f64,
        fft_min: usize::MAX,
    }
    .law_of(cells);
    let ones = cells
        .iter()
        .filter(|c| raster.values()[c.index()] >= 1.0)
        .count() as u64;
    Part {
        offset: law.lo + ones,
        bound: 2.0 * law.dropped + gamma(law.rounding + 1),
        pmf: law.values,
    }
}

/// The convolution of parts, normalised, with its bound.
fn combine(parts: Vec<Part>) -> Part {
    let mut acc = Law::unit();
    let mut offset = 0;
    let mut errors = 0.0;
    for p in parts {
        offset += p.offset;
        errors += p.bound;
        let law = Law {
            lo: 0,
            values: p.pmf,
            dropped: 0.0,
            rounding: 0,
            abs_err: 0.0,
        };
        acc = convolve(&acc, &law, usize::MAX);
    }
    let sum: f64 = acc.values.iter().sum();
    let len = acc.len() as u64;
    // ||a' * b' - a * b||_1 <= ||a' - a||_1 + ||b' - b||_1 (+ their product) for probability
    // vectors; normalising at most doubles an L1 error; the convolutions' and the sum's roundings
    // are relative.
    let bound = 2.0 * (errors * (1.0 + errors) + gamma(acc.rounding + len + 2));
    Part {
        offset,
        pmf: acc.values.iter().map(|v| v / sum).collect(),
        bound: bound.min(2.0),
    }
}

/// Runs every zone under the strata's evidence.
///
/// Occurs as `Cancelled` when `control` asks, or as `ImpossibleEvidence` from a stratum's
/// normaliser.
pub fn execute_strata(
    raster: &Raster,
    zones: &[Zone],
    strata: &Strata,
    settings: &Settings,
    control: &Control,
) -> Result<StrataEvaluation, EngineError> {
    let inner = Settings::new(settings.level(), Vec::new(), settings.tolerance(), true)?;
    let mut parts: Vec<Vec<Part>> = zones.iter().map(|_| Vec::new()).collect();
    let mut checks = Vec::with_capacity(strata.len());
    let mut total_parts = Vec::with_capacity(strata.len() + 1);
    // Each raster cell's stratum (NONE outside every one) and its index in that stratum.
    const NONE: u32 = u32::MAX;
    let mut owner = vec![NONE; raster.len()];
    let mut local = vec![0u32; raster.len()];
    for (si, (s, _)) in strata.parts.iter().enumerate() {
        for (i, c) in s.cells.iter().enumerate() {
            owner[c.index()] = si as u32;
            local[c.index()] = i as u32;
        }
    }
    // Each zone's cells per stratum, in one pass over the zones: (zone, local cells).
    let mut by_stratum: Vec<Vec<(usize, Vec<u32>)>> = vec![Vec::new(); strata.len()];
    for (zi, z) in zones.iter().enumerate() {
        let mut open: HashMap<u32, Vec<u32>> = HashMap::new();
        for c in z.cells() {
            let si = owner[c.index()];
            if si != NONE {
                open.entry(si).or_default().push(local[c.index()]);
            }
        }
        for (si, cells) in open {
            by_stratum[si as usize].push((zi, cells));
        }
    }
    let in_stratum: Vec<bool> = owner.iter().map(|&o| o != NONE).collect();
    for ((s, evidence), members) in strata.parts.iter().zip(by_stratum) {
        control.check()?;
        let mut owners = Vec::with_capacity(members.len());
        let mut sub_zones = Vec::with_capacity(members.len());
        for (zi, cells) in members {
            owners.push(zi);
            sub_zones.push(Zone::new(zones[zi].id(), cells, &s.raster)?);
        }
        let n = Normaliser::of(&s.raster, evidence, control)?;
        if !sub_zones.is_empty() {
            let p = plan(&s.raster, &sub_zones);
            let got = execute(&p, &s.raster, &sub_zones, &n, &inner, control)?;
            for (zi, g) in owners.into_iter().zip(got) {
                parts[zi].push(Part {
                    offset: g.offset,
                    pmf: g.pmf,
                    bound: g.error_bound,
                });
            }
        }
        total_parts.push(match &n.check.posterior {
            Some(p) => Part {
                offset: p.offset,
                pmf: p.pmf.clone(),
                bound: p.error_bound,
            },
            None => Part {
                offset: n.check.observed.unwrap_or(0),
                pmf: vec![1.0],
                bound: 0.0,
            },
        });
        checks.push((s.id.clone(), n.check.clone()));
    }
    control.check()?;
    let summaries = zones
        .iter()
        .zip(parts)
        .map(|(z, mut own)| {
            let free: Vec<CellIndex> = z
                .cells()
                .iter()
                .copied()
                .filter(|c| !in_stratum[c.index()])
                .collect();
            if !free.is_empty() {
                own.push(prior_part(raster, &free));
            }
            let c = combine(own);
            summary_of(raster, z, c.offset, c.pmf, settings, c.bound)
        })
        .collect();
    let unconstrained: Vec<CellIndex> = (0..raster.len() as u32)
        .map(CellIndex)
        .filter(|c| !in_stratum[c.index()] && !raster.values()[c.index()].is_nan())
        .collect();
    if !unconstrained.is_empty() {
        total_parts.push(prior_part(raster, &unconstrained));
    }
    let total = combine(total_parts);
    let stats = raster.stats();
    let low = |c: &TotalCheck| c.p_at_most.min(c.p_at_least);
    let worst = checks
        .iter()
        .min_by(|a, b| low(&a.1).total_cmp(&low(&b.1)))
        .expect("at least one stratum");
    let warning = (low(&worst.1) < IMPLAUSIBLE_TAIL).then(|| {
        format!(
            "the evidence of stratum `{}` is implausible under this raster: it may be miscalibrated there ({})",
            worst.0,
            worst.1.warning.clone().unwrap_or_default()
        )
    });
    let overall = TotalCheck {
        evidence: "strata",
        observed: None,
        prior_mean: stats.sum_p,
        prior_sd: stats.sum_var.sqrt(),
        prior_interval: prior_interval(raster, control)?,
        prior_level: super::normaliser::PRIOR_LEVEL,
        z_score: None,
        p_at_most: worst.1.p_at_most,
        p_at_least: worst.1.p_at_least,
        log_likelihood: checks.iter().map(|c| c.1.log_likelihood).sum(),
        warning,
        posterior: Some(TotalPosterior {
            offset: total.offset,
            pmf: total.pmf,
            error_bound: total.bound,
        }),
    };
    Ok(StrataEvaluation {
        zones: summaries,
        strata: checks,
        total: overall,
    })
}

/// P(cell has an event | the strata's evidence) for `cells`, in their order: within its stratum
/// for a cell in one (its stratum's cell posterior), its prior p for an unconstrained cell.
///
/// Occurs as `Cancelled` when `control` asks, or as `ImpossibleEvidence` from a stratum's
/// normaliser.
pub fn cell_posterior_strata(
    raster: &Raster,
    cells: &[u32],
    strata: &Strata,
    settings: &Settings,
    control: &Control,
) -> Result<CellPosterior, EngineError> {
    let mut posterior: HashMap<u32, f64> = HashMap::with_capacity(cells.len());
    let mut worst = 0.0f64;
    let wanted: std::collections::HashSet<u32> = cells.iter().copied().collect();
    for (s, evidence) in &strata.parts {
        control.check()?;
        let local: Vec<u32> = s
            .cells
            .iter()
            .enumerate()
            .filter(|(_, c)| wanted.contains(&c.0))
            .map(|(i, _)| i as u32)
            .collect();
        if local.is_empty() {
            continue;
        }
        let n = Normaliser::of(&s.raster, evidence, control)?;
        let got = cell_posterior(&s.raster, Some(&local), &n, settings, control)?;
        worst = worst.max(got.error_bound);
        for (l, (_, _, q)) in local.iter().zip(got.cells) {
            posterior.insert(s.cells[*l as usize].0, q);
        }
    }
    let values = raster.values();
    Ok(CellPosterior {
        cells: cells
            .iter()
            .map(|&c| {
                let p = values[c as usize];
                (c, p, posterior.get(&c).copied().unwrap_or(p))
            })
            .collect(),
        error_bound: worst,
    })
}

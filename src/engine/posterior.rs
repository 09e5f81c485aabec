//! The cell posterior: P(cell has an event | total) for many cells at once.
//!
//! Cells are grouped into blocks of `CELL_BLOCK` along the raster and planned as zones; the
//! union tree runs over the blocks, and within a block each cell's leave-one-out law comes from
//! running prefix and suffix folds, so no cell pays for a tree node of its own. Planning is
//! separate from running (`plan_cells`, then `posterior`), so callers can check the cost first.
//!
//! Worst case: the tree pass over the blocks plus O(block^2) per block for the leave-one-out
//! folds; memory the tree's plus one block's folds per thread.

use std::collections::HashMap;

use super::certify::{budget, certify, trims_of, Sum, MAX_L1};
use super::control::Control;
use super::error::{EngineError, Missing};
use super::law::{Law, FFT_MIN_LEN};
use super::membership::Membership;
use super::model::{CellIndex, Raster, Settings, Zone};
use super::normaliser::{Normaliser, Regime};
use super::plan::{plan, Plan};
use super::rounding::ROUNDINGS_PER_CELL;
use super::sets::Cells;
use super::tilt::{is_free, tilted};
use super::tree::Tree;

/// Cells per leaf block: the leave-one-out work per block is O(block x (block + range)), so 32
/// keeps it below the tree's own cost per cell.
const CELL_BLOCK: usize = 32;
/// Multiply-adds per cell charged for the leave-one-out folds within its block: the suffix
/// folds, the two outside values and the running fold each cost about one block width.
const LEAVE_ONE_OUT_COST: f64 = 3.0 * CELL_BLOCK as f64;

/// Posterior event probabilities of single cells.
#[derive(Clone, Debug, PartialEq)]
pub struct CellPosterior {
    /// (cell, prior p, posterior P(event | total)) for each requested cell, in request order.
    pub cells: Vec<(u32, f64, f64)>,
    /// Largest certified error bound (L1 over the two outcomes) over the cells.
    pub error_bound: f64,
}

/// The cells to report, checked against their raster: every one inside it and not nodata.
#[derive(Clone, Debug, PartialEq)]
pub struct CellSelection {
    cells: Vec<CellIndex>,
}

impl CellSelection {
    /// The listed cells (all valid cells when `None`), in the given order.
    ///
    /// Occurs as `InvalidCell` when a cell is outside the raster or nodata, as `NothingToDo` for
    /// an empty list (or a raster with no valid cell).
    pub fn new(raster: &Raster, cells: Option<&[u32]>) -> Result<CellSelection, EngineError> {
        let cells: Vec<CellIndex> = match cells {
            Some(list) => {
                if let Some((position, cell, problem)) = list
                    .iter()
                    .enumerate()
                    .find_map(|(i, &c)| raster.cell_problem(c).map(|p| (i, c, p)))
                {
                    return Err(EngineError::InvalidCell {
                        position,
                        cell,
                        problem,
                    });
                }
                list.iter().map(|&c| CellIndex(c)).collect()
            }
            None => (0..raster.len() as u32)
                .map(CellIndex)
                .filter(|&c| raster.get(c).is_some())
                .collect(),
        };
        if cells.is_empty() {
            return Err(EngineError::NothingToDo(Missing::Cells));
        }
        Ok(CellSelection { cells })
    }

    pub fn len(&self) -> usize {
        self.cells.len()
    }
    pub fn is_empty(&self) -> bool {
        self.cells.is_empty()
    }
}

/// The cell posterior as planned: the selection, its blocks of free cells and their union tree.
#[derive(Clone, Debug, PartialEq)]
pub struct CellPlan {
    selection: CellSelection,
    blocks: Vec<Zone>,
    plan: Plan,
    estimated_cost: f64,
}

impl CellPlan {
    /// The cells asked for, in request order.
    pub fn requested(&self) -> impl Iterator<Item = u32> + '_ {
        self.selection.cells.iter().map(|c| c.0)
    }

    /// Estimated multiply-adds for the whole computation, normaliser included.
    pub fn estimated_cost(&self) -> f64 {
        self.estimated_cost
    }
    /// How many cells are reported.
    pub fn cells(&self) -> usize {
        self.selection.len()
    }
}

/// Plans the posterior of `selection`: distinct free cells in raster order, cut into blocks.
pub fn plan_cells(raster: &Raster, selection: CellSelection) -> CellPlan {
    let values = raster.values();
    let mut free: Vec<CellIndex> = selection
        .cells
        .iter()
        .copied()
        .filter(|&c| is_free(values[c.index()]))
        .collect();
    free.sort_unstable();
    free.dedup();
    let blocks: Vec<Zone> = free
        .chunks(CELL_BLOCK)
        .map(|c| Zone::block(c.to_vec()))
        .collect();
    let plan = plan(raster, &blocks);
    let estimated_cost = plan.estimated_cost + LEAVE_ONE_OUT_COST * free.len() as f64;
    CellPlan {
        selection,
        blocks,
        plan,
        estimated_cost,
    }
}

/// P(cell has an event | total) for `cells` (all valid cells when `None`), in the given order:
/// checks the cells, plans and runs.
///
/// Occurs as `InvalidCell` when a cell is outside the raster or nodata, as `NothingToDo` for an
/// empty list, `Cancelled` when asked.
pub fn cell_posterior(
    raster: &Raster,
    cells: Option<&[u32]>,
    normaliser: &Normaliser,
    settings: &Settings,
    control: &Control,
) -> Result<CellPosterior, EngineError> {
    let planned = plan_cells(raster, CellSelection::new(raster, cells)?);
    posterior(raster, &planned, normaliser, settings, control)
}

/// Runs a planned cell posterior. Occurs as `Cancelled` when `control` asks.
pub fn posterior(
    raster: &Raster,
    planned: &CellPlan,
    normaliser: &Normaliser,
    settings: &Settings,
    control: &Control,
) -> Result<CellPosterior, EngineError> {
    let values = raster.values();
    let list = &planned.selection.cells;
    let tilt = match normaliser.regime {
        Regime::Tilted(t) => t,
        Regime::AllEmpty | Regime::AllFull => {
            let full = normaliser.regime == Regime::AllFull;
            let post = |p: f64| {
                if p >= 1.0 || (full && p > 0.0) {
                    1.0
                } else {
                    0.0
                }
            };
            return Ok(CellPosterior {
                cells: list
                    .iter()
                    .map(|&c| (c.0, values[c.index()], post(values[c.index()])))
                    .collect(),
                error_bound: 0.0,
            });
        }
    };
    let blocks = &planned.blocks;
    let mut posterior = HashMap::with_capacity(blocks.len() * CELL_BLOCK);
    let mut worst = 0.0f64;
    if !blocks.is_empty() {
        let plan = &planned.plan;
        control.plan_work(planned.estimated_cost as u64);
        let membership = Membership::of(plan, raster, blocks);
        let trims = trims_of(plan, blocks, membership.outside.len());
        let target = normaliser.target;
        let tree = Tree {
            plan,
            zones: blocks,
            membership: &membership,
            cells: Cells {
                values,
                t: tilt.t,
                eps: budget(settings.tolerance(), trims),
                fft_min: FFT_MIN_LEN,
            },
            target,
            slack: normaliser.slack.as_ref(),
            whole_leaves: true,
            control,
        };
        let results = tree.run(&|zone, _own, outside| {
            leave_one_out(blocks[zone].cells(), values, tilt.t, outside, normaliser)
        })?;
        for block in results {
            for (c, p, bound) in block {
                worst = worst.max(bound);
                posterior.insert(c, p);
            }
        }
    }
    let cells = list
        .iter()
        .map(|&c| {
            let p = values[c.index()];
            let post = if is_free(p) { posterior[&c] } else { p };
            (c.0, p, post)
        })
        .collect();
    Ok(CellPosterior {
        cells,
        error_bound: worst,
    })
}

/// Posterior of each cell of a block from the block's outside law: (cell, posterior, bound).
fn leave_one_out(
    block: &[CellIndex],
    values: &[f64],
    t: f64,
    outside: Option<&Law>,
    normaliser: &Normaliser,
) -> Vec<(CellIndex, f64, f64)> {
    let target = normaliser.target;
    let pairs: Vec<(f64, f64)> = block
        .iter()
        .map(|&c| tilted(values[c.index()], t))
        .collect();
    let Some(o) = outside else {
        // Nothing outside the block reaches the target: no information, the largest bound.
        return block.iter().map(|&c| (c, 0.5, MAX_L1)).collect();
    };
    // suffix[i] = law of cells i+1.. of the block.
    let b = block.len();
    let mut suffix = vec![Law::unit(); b];
    for i in (0..b.saturating_sub(1)).rev() {
        let mut next = suffix[i + 1].clone();
        next.add_cells([pairs[i + 1]]);
        suffix[i] = next;
    }
    // f = outside law folded with cells 0..i-1, held on the whole range the block can need,
    // [target - b, target], zero where the outside law was not kept.
    let lo = target.saturating_sub(b as u64);
    let mut f = Law {
        lo,
        values: (lo..=target).map(|j| o.at(j)).collect(),
        ..o.clone()
    };
    let mut out = Vec::with_capacity(b);
    for (i, &c) in block.iter().enumerate() {
        let suf = &suffix[i];
        let at = |j: u64| -> f64 {
            (0..suf.len() as u64)
                .map(|k| {
                    if j >= k {
                        f.at(j - k) * suf.values[k as usize]
                    } else {
                        0.0
                    }
                })
                .sum()
        };
        let (q, r) = pairs[i];
        let g1 = if target >= 1 { q * at(target - 1) } else { 0.0 };
        let g0 = r * at(target);
        let s = g0 + g1;
        let c_bound = certify(
            normaliser,
            &Sum {
                s,
                rounding: f.rounding + suf.rounding + suf.len() as u64 + 1,
                len: 2,
                fft: 2.0 * f.abs_err,
                dropped: f.dropped,
            },
        );
        out.push((c, if s > 0.0 { g1 / s } else { q }, c_bound.bound));
        // Fold cell i into f, keeping f's range: values below the range are never needed again.
        let lo = f.lo;
        let mut next = f.values.clone();
        for j in (0..next.len()).rev() {
            let below = if j > 0 { f.values[j - 1] } else { 0.0 };
            next[j] = f.values[j] * r + below * q;
        }
        f = Law {
            lo,
            values: next,
            dropped: f.dropped,
            rounding: f.rounding + ROUNDINGS_PER_CELL,
            abs_err: f.abs_err,
        };
    }
    out
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::engine::execute::tests::random_raster;
    use crate::engine::reference::conditional_pmf;
    use rand::SeedableRng;
    use rand_chacha::ChaCha8Rng;

    #[test]
    fn cell_posterior_matches_singleton_zones() {
        let mut rng = ChaCha8Rng::seed_from_u64(5);
        let r = random_raster(&mut rng, 30, 20, true);
        let st = r.stats();
        let total = (st.sum_p + 2.0 * st.sum_var.sqrt()).round() as u64;
        let control = Control::new();
        let norm = Normaliser::new(&r, total, &control).unwrap();
        let post = cell_posterior(&r, None, &norm, &Settings::default(), &control).unwrap();
        assert_eq!(post.cells.len() as u64, st.valid);
        let mut sum = 0.0;
        for &(c, p, q) in &post.cells {
            // reference: engine::reference::conditional_pmf on the singleton zone
            let want = conditional_pmf(&r, &[c], total).unwrap();
            assert!(
                (q - want[1]).abs() <= 1e-13,
                "cell {c} (p {p}): {q} vs {}",
                want[1]
            );
            sum += q;
        }
        // reference: closed form, the posterior means of a partition sum to the observed total
        assert!((sum - total as f64).abs() < 1e-9);
        assert!(post.error_bound < 1e-11);
    }
}

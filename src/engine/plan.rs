//! The planner: groups zones into a union tree, as plain data, with its estimated cost.
//!
//! Zones are ordered along a Hilbert curve through their centroids, so that neighbours in the
//! order are neighbours on the ground and the unions of subtrees stay compact; the ordered list is
//! then split recursively where the cell weight halves, not the zone count, so a few large zones
//! do not unbalance the tree. Planning allocates only the tree and a bitset over the raster, and
//! runs nothing: `execute` is separate and takes the plan as given.

use super::model::{Raster, Zone};

/// Order of the Hilbert curve: centroids are snapped to a 2^16 x 2^16 grid, finer than any raster
/// we accept is wide.
const HILBERT_ORDER: u32 = 16;
/// Window half-width, in tilted sd, assumed by the cost model (the executor trims by mass; 9.5 sd
/// is what a 1e-20 mass budget keeps for a near-Gaussian law).
pub(crate) const COST_WINDOW_SD: f64 = 9.5;
/// Multiply-adds per cell charged for folding cells into leaf laws (about `LEAF_CELLS` / 2 plus
/// the pairwise levels above).
const COST_PER_CELL: f64 = 48.0;

#[derive(Clone, Debug, PartialEq)]
pub struct PlanNode {
    pub parent: Option<usize>,
    /// Left and right children of an inner node.
    pub children: Option<(usize, usize)>,
    /// The zone (index into the request's zones) of a leaf.
    pub zone: Option<usize>,
    /// Cells in the subtree's zones, counted with multiplicity.
    pub weight: u64,
    pub depth: u32,
    /// Estimated multiply-adds of this node's own work.
    pub cost: f64,
}

#[derive(Clone, Debug, PartialEq)]
pub struct Plan {
    pub nodes: Vec<PlanNode>,
    pub root: usize,
    /// Whether any cell belongs to more than one zone.
    pub overlapping: bool,
    /// Cells that belong to at least one zone.
    pub covered: u64,
    /// Estimated multiply-adds for the whole evaluation, normaliser included.
    pub estimated_cost: f64,
}

impl Plan {
    /// Leaves in left-to-right order.
    pub fn leaf_order(&self) -> Vec<usize> {
        let mut out = Vec::new();
        let mut stack = vec![self.root];
        while let Some(n) = stack.pop() {
            match self.nodes[n].children {
                Some((l, r)) => {
                    stack.push(r);
                    stack.push(l);
                }
                None => out.extend(self.nodes[n].zone),
            }
        }
        out
    }

    pub fn depth(&self) -> u32 {
        self.nodes.iter().map(|n| n.depth).max().unwrap_or(0)
    }
}

/// Position along the Hilbert curve of order `HILBERT_ORDER` (the classic xy-to-d walk).
fn hilbert(mut x: u32, mut y: u32) -> u64 {
    let n: u32 = 1 << HILBERT_ORDER;
    let mut d: u64 = 0;
    let mut s = n / 2;
    while s > 0 {
        let rx = u32::from(x & s > 0);
        let ry = u32::from(y & s > 0);
        d += (s as u64) * (s as u64) * ((3 * rx) ^ ry) as u64;
        if ry == 0 {
            if rx == 1 {
                x = n - 1 - x;
                y = n - 1 - y;
            }
            std::mem::swap(&mut x, &mut y);
        }
        s /= 2;
    }
    d
}

/// Plans the union tree for `zones` on `raster` (an empty plan for no zones).
pub fn plan(raster: &Raster, zones: &[Zone]) -> Plan {
    if zones.is_empty() {
        return Plan {
            nodes: Vec::new(),
            root: 0,
            overlapping: false,
            covered: 0,
            estimated_cost: 0.0,
        };
    }
    let (w, h) = (raster.width() as f64, raster.height() as f64);
    let scale = ((1u64 << HILBERT_ORDER) - 1) as f64 / w.max(h);
    let mut keyed: Vec<(u64, usize)> = zones
        .iter()
        .enumerate()
        .map(|(i, z)| {
            let (mut sr, mut sc) = (0.0, 0.0);
            for c in z.indices() {
                sr += (c / raster.width()) as f64;
                sc += (c % raster.width()) as f64;
            }
            let n = z.len() as f64;
            let key = hilbert(
                ((sc / n + 0.5) * scale) as u32,
                ((sr / n + 0.5) * scale) as u32,
            );
            (key, i)
        })
        .collect();
    keyed.sort_unstable();
    let order: Vec<usize> = keyed.into_iter().map(|(_, i)| i).collect();

    // Overlap detection and coverage with one bit per raster cell.
    let mut seen = vec![0u64; raster.len().div_ceil(64)];
    let mut overlapping = false;
    let mut covered = 0u64;
    for z in zones {
        for c in z.indices() {
            let (word, bit) = ((c / 64) as usize, 1u64 << (c % 64));
            if seen[word] & bit != 0 {
                overlapping = true;
            } else {
                seen[word] |= bit;
                covered += 1;
            }
        }
    }

    let stats = raster.stats();
    let var_per_cell = if stats.free > 0 {
        stats.sum_var / stats.free as f64
    } else {
        0.0
    };
    let mut nodes = Vec::with_capacity(2 * zones.len());
    let root = build(&order, zones, None, 0, var_per_cell, &mut nodes);
    let free_share = stats.free as f64 / raster.len() as f64;
    let normaliser = raster.len() as f64 * free_share * COST_PER_CELL * 2.0;
    let outside = (stats.valid.saturating_sub(covered)) as f64 * COST_PER_CELL;
    let estimated_cost = nodes.iter().map(|n| n.cost).sum::<f64>() + normaliser + outside;
    Plan {
        nodes,
        root,
        overlapping,
        covered,
        estimated_cost,
    }
}

/// Estimated window width of a law over `cells` cells.
pub(crate) fn window(cells: u64, var_per_cell: f64) -> f64 {
    let sd = (cells as f64 * var_per_cell).sqrt();
    (2.0 * COST_WINDOW_SD * sd + 1.0).min(cells as f64 + 1.0)
}

fn build(
    order: &[usize],
    zones: &[Zone],
    parent: Option<usize>,
    depth: u32,
    var: f64,
    nodes: &mut Vec<PlanNode>,
) -> usize {
    let id = nodes.len();
    let weight: u64 = order.iter().map(|&z| zones[z].len() as u64).sum();
    nodes.push(PlanNode {
        parent,
        children: None,
        zone: None,
        weight,
        depth,
        cost: 0.0,
    });
    if order.len() == 1 {
        let cells = weight as f64;
        nodes[id].zone = Some(order[0]);
        let w = window(weight, var);
        nodes[id].cost = cells * COST_PER_CELL + w * w;
        return id;
    }
    // Split where the prefix weight first reaches half, keeping both sides non-empty.
    let mut acc = 0u64;
    let mut cut = 1;
    for (i, &z) in order.iter().enumerate() {
        acc += zones[z].len() as u64;
        if 2 * acc >= weight {
            cut = (i + 1).clamp(1, order.len() - 1);
            break;
        }
    }
    let l = build(&order[..cut], zones, Some(id), depth + 1, var, nodes);
    let r = build(&order[cut..], zones, Some(id), depth + 1, var, nodes);
    let (wl, wr) = (window(nodes[l].weight, var), window(nodes[r].weight, var));
    // Bottom-up convolution of the children plus the two top-down outside laws.
    nodes[id].cost = wl * wr + 2.0 * (wl * wr);
    nodes[id].children = Some((l, r));
    id
}

#[cfg(test)]
mod tests {
    use super::*;

    fn raster(w: u32, h: u32) -> Raster {
        Raster::from_probabilities(w, h, vec![0.1; (w * h) as usize]).unwrap()
    }

    fn rect(r: &Raster, id: &str, row: u32, col: u32, rows: u32, cols: u32) -> Zone {
        let cells = (row..row + rows)
            .flat_map(|y| (col..col + cols).map(move |x| y * r.width() + x))
            .collect();
        Zone::new(id, cells, r).unwrap()
    }

    #[test]
    fn hilbert_visits_a_small_grid_once() {
        // reference: common practice, the order-1 Hilbert curve visits (0,0),(0,1),(1,1),(1,0)
        let mut ds: Vec<u64> = (0..4u32)
            .flat_map(|x| (0..4u32).map(move |y| hilbert(x, y)))
            .collect();
        ds.sort_unstable();
        ds.dedup();
        assert_eq!(ds.len(), 16);
    }

    #[test]
    fn plan_is_balanced_by_weight_and_spatial() {
        let r = raster(40, 40);
        // One large zone and eight small ones along the bottom.
        let mut zones = vec![rect(&r, "big", 0, 0, 20, 40)];
        for i in 0..8 {
            zones.push(rect(&r, &format!("s{i}"), 30, i * 5, 5, 5));
        }
        let p = plan(&r, &zones);
        assert_eq!(p.nodes.len(), 2 * zones.len() - 1);
        assert!(!p.overlapping);
        assert_eq!(p.covered, 800 + 200);
        let (l, rr) = p.nodes[p.root].children.unwrap();
        // Weight split: the big zone (800 cells) alone on one side against the 200 small cells.
        let sides = [p.nodes[l].weight, p.nodes[rr].weight];
        assert!(sides.contains(&800), "sides {sides:?}");
        // Small zones stay in Hilbert order: every leaf appears once.
        let mut leaves = p.leaf_order();
        leaves.sort_unstable();
        assert_eq!(leaves, (0..9).collect::<Vec<_>>());
        assert_eq!(p, plan(&r, &zones), "planning is deterministic");
    }

    #[test]
    fn plan_detects_overlap() {
        let r = raster(10, 10);
        let zones = vec![rect(&r, "a", 0, 0, 5, 5), rect(&r, "b", 3, 3, 5, 5)];
        let p = plan(&r, &zones);
        assert!(p.overlapping);
        assert_eq!(p.covered, 25 + 25 - 4);
        assert!(p.estimated_cost > 0.0);
    }
}

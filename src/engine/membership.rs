//! Cell membership of a plan: which node convolves each free cell in.
//!
//! Each cell is assigned to the lowest common ancestor (LCA) of the zones holding it; the cells
//! assigned within a subtree are private to it. For overlapping zones a node c also needs its
//! *fringe*: cells of the sibling's union whose zones reach outside the parent, so that
//! D_c = U_sib \ U_c is the sibling's private law plus the fringe. Disjoint zones need none of
//! this: a leaf's own zone is its private set, read in place.
//!
//! Worst case: time O(memberships x tree depth), memory 12 bytes per raster cell (owner, count,
//! CSR start) plus one u32 per membership of a shared cell.

use super::model::{CellIndex, Raster, Zone};
use super::plan::Plan;
use super::tilt::is_free;

/// No node: a cell in no zone.
const NONE: u32 = u32::MAX;

/// What each node of a plan convolves in.
pub(crate) struct Membership {
    /// Free cells assigned to each node (the LCA of their zones). For disjoint zones a leaf's
    /// list stays empty and the zone's own cells are read instead (no copy).
    pub assigned: Vec<Vec<CellIndex>>,
    /// Whether leaves read their zone's cells in place (disjoint zones).
    pub by_zone: bool,
    /// Free cells of each leaf's zone assigned elsewhere (shared with other zones).
    pub shared: Vec<Vec<CellIndex>>,
    /// Fringe cells of each non-root node c: in U_sib, not in U_c, assigned above the parent.
    pub fringe: Vec<Vec<CellIndex>>,
    /// Free cells in no zone.
    pub outside: Vec<CellIndex>,
}

fn parent(plan: &Plan, node: usize) -> usize {
    plan.nodes[node]
        .parent
        .expect("only the root has no parent, and no walk passes above it")
}

fn lca(plan: &Plan, mut a: usize, mut b: usize) -> usize {
    let n = &plan.nodes;
    while n[a].depth > n[b].depth {
        a = parent(plan, a);
    }
    while n[b].depth > n[a].depth {
        b = parent(plan, b);
    }
    while a != b {
        a = parent(plan, a);
        b = parent(plan, b);
    }
    a
}

fn leaf_of_zone(plan: &Plan, zones: usize) -> Vec<usize> {
    let mut leaf = vec![0usize; zones];
    for (i, n) in plan.nodes.iter().enumerate() {
        if let Some(z) = n.zone {
            leaf[z] = i;
        }
    }
    leaf
}

impl Membership {
    /// The membership of `zones` under `plan`.
    pub fn of(plan: &Plan, raster: &Raster, zones: &[Zone]) -> Membership {
        if plan.overlapping {
            overlapping(plan, raster, zones)
        } else {
            disjoint(plan, raster, zones)
        }
    }
}

fn disjoint(plan: &Plan, raster: &Raster, zones: &[Zone]) -> Membership {
    let values = raster.values();
    let nodes = plan.nodes.len();
    let mut seen = vec![0u64; raster.len().div_ceil(64)];
    for zone in zones {
        for &c in zone.cells() {
            seen[c.index() / 64] |= 1 << (c.0 % 64);
        }
    }
    let outside = (0..raster.len() as u32)
        .filter(|&c| seen[(c / 64) as usize] & (1 << (c % 64)) == 0 && is_free(values[c as usize]))
        .map(CellIndex)
        .collect();
    Membership {
        assigned: vec![Vec::new(); nodes],
        by_zone: true,
        shared: vec![Vec::new(); nodes],
        fringe: vec![Vec::new(); nodes],
        outside,
    }
}

fn overlapping(plan: &Plan, raster: &Raster, zones: &[Zone]) -> Membership {
    let values = raster.values();
    let nodes = plan.nodes.len();
    let leaf = leaf_of_zone(plan, zones.len());
    let mut assigned = vec![Vec::new(); nodes];
    let mut shared = vec![Vec::new(); nodes];
    let mut fringe = vec![Vec::new(); nodes];
    // Assign each cell to the LCA of its zones.
    let mut owner = vec![NONE; raster.len()];
    let mut count = vec![0u32; raster.len()];
    for (z, zone) in zones.iter().enumerate() {
        for &c in zone.cells() {
            let o = &mut owner[c.index()];
            *o = if *o == NONE {
                leaf[z] as u32
            } else {
                lca(plan, *o as usize, leaf[z]) as u32
            };
            count[c.index()] += 1;
        }
    }
    let mut outside = Vec::new();
    for (c, &o) in owner.iter().enumerate() {
        if !is_free(values[c]) {
            continue;
        }
        if o == NONE {
            outside.push(CellIndex(c as u32));
        } else {
            assigned[o as usize].push(CellIndex(c as u32));
        }
    }
    // Zones of each cell in more than one zone (CSR over the cells, counts first).
    let mut start = vec![0u32; raster.len() + 1];
    for c in 0..raster.len() {
        start[c + 1] = start[c] + if count[c] > 1 { count[c] } else { 0 };
    }
    let mut members = vec![0u32; start[raster.len()] as usize];
    let mut fill = start.clone();
    for (z, zone) in zones.iter().enumerate() {
        for &c in zone.cells() {
            let i = c.index();
            if count[i] > 1 {
                members[fill[i] as usize] = leaf[z] as u32;
                fill[i] += 1;
            }
            if owner[i] as usize != leaf[z] && is_free(values[i]) {
                shared[leaf[z]].push(c);
            }
        }
    }
    // The Steiner tree of each shared cell's leaves below its owner: a node on it whose sibling
    // is not on it sees the cell in its sibling's union but not in its own.
    let mut steiner: Vec<usize> = Vec::new();
    for c in 0..raster.len() {
        if count[c] < 2 || !is_free(values[c]) {
            continue;
        }
        let w = owner[c] as usize;
        steiner.clear();
        for &l in &members[start[c] as usize..start[c + 1] as usize] {
            let mut v = l as usize;
            while v != w {
                steiner.push(v);
                v = parent(plan, v);
            }
        }
        steiner.sort_unstable();
        steiner.dedup();
        for &v in &steiner {
            let p = parent(plan, v);
            if p == w {
                continue;
            }
            let (l, r) = plan.nodes[p].children.expect("a parent has children");
            let sib = if l == v { r } else { l };
            if steiner.binary_search(&sib).is_err() {
                fringe[sib].push(CellIndex(c as u32));
            }
        }
    }
    Membership {
        assigned,
        by_zone: false,
        shared,
        fringe,
        outside,
    }
}

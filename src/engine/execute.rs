//! The union-tree executor: every zone's conditional law from one shared pass over the tree.
//!
//! For a node v with union U_v, the executor holds the tilted law of the cells *outside* U_v,
//! restricted to the count values that can still matter (those that combine with U_v's count to
//! reach the observed total). Children get their outside law from the parent's by convolving in
//! the cells that are in the sibling's union but not in their own:
//!
//! - each cell is assigned to the lowest common ancestor of the zones that contain it; the cells
//!   assigned within a subtree are private to it, and their law P_v is built bottom-up by
//!   convolving the children's laws (for disjoint zones this is the union's whole law);
//! - D_c = U_sib \ U_c is P_sib plus the "fringe": cells of the sibling's union whose zones also
//!   reach outside the parent; the fringe's law comes from a product tree of its own;
//! - the outside law of c is (outside of parent) * D_c, computed only on c's range, then trimmed.
//!
//! At a leaf, g(k) = L_S(k) O_S(m - k) with L_S the zone's own law, and the pmf is g / sum g.
//! Every kernel only drops non-negative mass, so sum g is a lower bound of P~(total = m); the
//! normaliser's certified upper bound turns the gap into each zone's `error_bound`, whatever the
//! windows were. Trimming budgets only decide how wide windows are.
//!
//! Worst case: time O(sum over nodes of range x law width) plus O(cells x 64) for the leaves, and
//! memory O(sum over nodes of law widths) plus one u32 per raster cell for overlapping zones.

use rayon::prelude::*;

use super::control::Control;
use super::error::EngineError;
use super::law::{convolve, convolve_range, gamma, restrict, Law, FFT_MIN_LEN, UNIT_ROUNDOFF};
use super::model::{Raster, Settings, Zone};
use super::normaliser::{Normaliser, Regime};
use super::plan::{plan, Plan};
use super::sets::{trims_for, Cells};
use super::summary::{summarise, ZoneSummary};
use super::tilt::{is_free, tilted, Tilt};

/// No node: a cell in no zone.
const NONE: u32 = u32::MAX;
/// Share of the tolerance all trims together may spend. The absolute contract alone would allow
/// about 1/4 of it; the relative one (1e-9 for reported values >= 1e-10) needs the dropped mass a
/// further 1e-19 / 1e-13 below, since a value 1e-10 of the peak can absorb all of it.
const TRIM_SHARE: f64 = 0.25e-6;
/// Each retry divides the trimming budget by this (a retry happens only when a zone's measured
/// truncation exceeds the tolerance, which the budget makes rare).
const RETRY_FACTOR: f64 = 1e-4;
const MAX_ATTEMPTS: usize = 3;
/// Largest share of the total's tilted variance a zone may hold for FFT to be used at all.
const TAIL_SHARE: f64 = 1.0 / 16.0;
/// Cells per leaf block in `cell_posterior`: the leave-one-out work per block is
/// O(block x (block + range)), so 32 keeps it below the tree's own cost per cell.
const CELL_BLOCK: usize = 32;

/// Posterior event probabilities of single cells.
#[derive(Clone, Debug, PartialEq)]
pub struct CellPosterior {
    /// (cell, prior p, posterior P(event | total)) for each requested cell, in request order.
    pub cells: Vec<(u32, f64, f64)>,
    /// Largest certified error bound (L1 over the two outcomes) over the cells.
    pub error_bound: f64,
}

/// Membership structure of a plan: what each node convolves in.
struct Sets {
    /// Cells assigned to each node (the LCA of their zones), free cells only. For disjoint zones
    /// a leaf's list stays empty and the zone's own cells are read instead (no copy).
    assigned: Vec<Vec<u32>>,
    by_zone: bool,
    /// Free cells of each leaf's zone assigned elsewhere (shared with other zones).
    shared: Vec<Vec<u32>>,
    /// Fringe cells of each non-root node c: in U_sib, not in U_c, assigned above the parent.
    fringe: Vec<Vec<u32>>,
    /// Free cells in no zone.
    outside: Vec<u32>,
}

fn lca(plan: &Plan, mut a: usize, mut b: usize) -> usize {
    let n = &plan.nodes;
    while n[a].depth > n[b].depth {
        a = n[a].parent.expect("deeper node has a parent");
    }
    while n[b].depth > n[a].depth {
        b = n[b].parent.expect("deeper node has a parent");
    }
    while a != b {
        a = n[a].parent.expect("distinct nodes below the root");
        b = n[b].parent.expect("distinct nodes below the root");
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

fn build_sets(plan: &Plan, raster: &Raster, zones: &[Zone]) -> Sets {
    let values = raster.values();
    let nodes = plan.nodes.len();
    let leaf = leaf_of_zone(plan, zones.len());
    let mut assigned = vec![Vec::new(); nodes];
    let mut shared = vec![Vec::new(); nodes];
    let mut fringe = vec![Vec::new(); nodes];
    if !plan.overlapping {
        let mut seen = vec![0u64; raster.len().div_ceil(64)];
        for zone in zones {
            for &c in zone.cells() {
                seen[(c / 64) as usize] |= 1 << (c % 64);
            }
        }
        let outside = (0..raster.len() as u32)
            .filter(|&c| {
                seen[(c / 64) as usize] & (1 << (c % 64)) == 0 && is_free(values[c as usize])
            })
            .collect();
        return Sets {
            assigned,
            by_zone: true,
            shared,
            fringe,
            outside,
        };
    }
    // Overlapping zones: assign each cell to the LCA of its zones.
    let mut owner = vec![NONE; raster.len()];
    let mut count = vec![0u32; raster.len()];
    for (z, zone) in zones.iter().enumerate() {
        for &c in zone.cells() {
            let o = &mut owner[c as usize];
            *o = if *o == NONE {
                leaf[z] as u32
            } else {
                lca(plan, *o as usize, leaf[z]) as u32
            };
            count[c as usize] += 1;
        }
    }
    let mut outside = Vec::new();
    for (c, &o) in owner.iter().enumerate() {
        if !is_free(values[c]) {
            continue;
        }
        if o == NONE {
            outside.push(c as u32);
        } else {
            assigned[o as usize].push(c as u32);
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
            let c = c as usize;
            if count[c] > 1 {
                members[fill[c] as usize] = leaf[z] as u32;
                fill[c] += 1;
            }
            if owner[c] as usize != leaf[z] && is_free(values[c]) {
                shared[leaf[z]].push(c as u32);
            }
        }
    }
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
                v = plan.nodes[v]
                    .parent
                    .expect("a leaf below its LCA has a parent");
            }
        }
        steiner.sort_unstable();
        steiner.dedup();
        for &v in &steiner {
            let p = plan.nodes[v]
                .parent
                .expect("steiner nodes lie below the LCA");
            if p == w {
                continue;
            }
            let (l, r) = plan.nodes[p].children.expect("a parent has children");
            let sib = if l == v { r } else { l };
            if steiner.binary_search(&sib).is_err() {
                fringe[sib].push(c as u32);
            }
        }
    }
    Sets {
        assigned,
        by_zone: false,
        shared,
        fringe,
        outside,
    }
}

/// Bottom-up results of a subtree.
enum Built {
    Leaf {
        zone: usize,
        /// Law of the private cells (those assigned here).
        private: Law,
        /// Law of the zone's own cells.
        own: Law,
        /// Outside values needed: [lo, hi].
        range: (u64, u64),
    },
    Inner {
        node: usize,
        private: Law,
        /// D laws of the children; `None` means "the sibling's private law" (no fringe).
        d: [Option<Law>; 2],
        range: (u64, u64),
        kids: Box<[Built; 2]>,
    },
}

impl Built {
    fn private(&self) -> &Law {
        match self {
            Built::Leaf { private, .. } | Built::Inner { private, .. } => private,
        }
    }
    fn range(&self) -> (u64, u64) {
        match self {
            Built::Leaf { range, .. } | Built::Inner { range, .. } => *range,
        }
    }
}

struct Pass<'a> {
    plan: &'a Plan,
    zones: &'a [Zone],
    /// Keep each leaf's whole range [target - cells, target] (the cell posterior's leave-one-out
    /// reads all of it) instead of the range its trimmed law needs.
    whole_leaves: bool,
    sets: &'a Sets,
    cells: Cells<'a>,
    target: u64,
    control: &'a Control,
}

impl Pass<'_> {
    fn trimmed(&self, mut law: Law) -> Law {
        law.trim(self.cells.eps);
        law
    }

    /// The free cells assigned to `node` (for disjoint zones, a leaf's whole zone).
    fn assigned(&self, node: usize) -> &[u32] {
        match (self.sets.by_zone, self.plan.nodes[node].zone) {
            (true, Some(z)) => self.zones[z].cells(),
            _ => &self.sets.assigned[node],
        }
    }

    fn up(&self, node: usize) -> Result<Built, EngineError> {
        self.control.check()?;
        let n = &self.plan.nodes[node];
        // A zone's own law is read in its tails, so it is always built by direct convolution.
        let direct = Cells {
            fft_min: usize::MAX,
            ..self.cells
        };
        let builder = if n.children.is_none() {
            &direct
        } else {
            &self.cells
        };
        let own_cells = builder.law_of(self.assigned(node));
        let built = match n.children {
            None => {
                let zone = n.zone.expect("a leaf holds a zone");
                let shared = &self.sets.shared[node];
                let own = if shared.is_empty() {
                    own_cells.clone()
                } else {
                    self.trimmed(convolve(&own_cells, &direct.law_of(shared), usize::MAX))
                };
                let range = if self.whole_leaves {
                    let cells = self.assigned(node).len() as u64;
                    (self.target.saturating_sub(cells), self.target)
                } else {
                    (
                        self.target.saturating_sub(own.hi()),
                        self.target.saturating_sub(own.lo),
                    )
                };
                Built::Leaf {
                    zone,
                    private: own_cells,
                    own,
                    range,
                }
            }
            Some((l, r)) => {
                let (bl, br) = if n.weight >= 1 << 14 {
                    rayon::join(|| self.up(l), || self.up(r))
                } else {
                    (self.up(l), self.up(r))
                };
                let (bl, br) = (bl?, br?);
                let mut private =
                    self.trimmed(convolve(bl.private(), br.private(), self.cells.fft_min));
                if !self.assigned(node).is_empty() {
                    private = self.trimmed(convolve(&private, &own_cells, self.cells.fft_min));
                }
                let d_of = |child: usize, sib: &Built| -> Option<Law> {
                    let f = &self.sets.fringe[child];
                    (!f.is_empty()).then(|| {
                        self.trimmed(convolve(
                            sib.private(),
                            &self.cells.law_of(f),
                            self.cells.fft_min,
                        ))
                    })
                };
                let d = [d_of(l, &br), d_of(r, &bl)];
                let dl = d[0].as_ref().unwrap_or(br.private());
                let dr = d[1].as_ref().unwrap_or(bl.private());
                let (rl, rr) = (bl.range(), br.range());
                let lo =
                    rl.0.saturating_sub(dl.hi())
                        .min(rr.0.saturating_sub(dr.hi()));
                let hi = rl.1.saturating_sub(dl.lo).max(rr.1.saturating_sub(dr.lo));
                Built::Inner {
                    node,
                    private,
                    d,
                    range: (lo, hi),
                    kids: Box::new([bl, br]),
                }
            }
        };
        self.control.advance((n.cost / 2.0) as u64);
        Ok(built)
    }

    /// Walks down with the outside law of `built`'s node, calling `finish` at each leaf.
    fn down<T: Send, F>(
        &self,
        built: Built,
        outside: Option<Law>,
        finish: &F,
    ) -> Result<Vec<T>, EngineError>
    where
        F: Fn(usize, &Law, Option<&Law>) -> T + Sync,
    {
        self.control.check()?;
        match built {
            Built::Leaf { zone, own, .. } => Ok(vec![finish(zone, &own, outside.as_ref())]),
            Built::Inner { node, d, kids, .. } => {
                let [bl, br] = *kids;
                let [dl, dr] = d;
                let child_outside = |child: &Built, d: Option<&Law>, sib: &Built| -> Option<Law> {
                    let d = d.unwrap_or(sib.private());
                    let (lo, hi) = child.range();
                    let o = outside.as_ref()?;
                    convolve_range(o, d, lo, hi, self.cells.fft_min).map(|law| self.trimmed(law))
                };
                let ol = child_outside(&bl, dl.as_ref(), &br);
                let or = child_outside(&br, dr.as_ref(), &bl);
                drop(outside);
                self.control
                    .advance((self.plan.nodes[node].cost / 2.0) as u64);
                let weight = self.plan.nodes[node].weight;
                let (a, b) = if weight >= 1 << 14 {
                    rayon::join(|| self.down(bl, ol, finish), || self.down(br, or, finish))
                } else {
                    (self.down(bl, ol, finish), self.down(br, or, finish))
                };
                let mut a = a?;
                a.extend(b?);
                Ok(a)
            }
        }
    }
}

/// The numerators g(k) = L(k) O(target - k) of one zone, with what their bound needs.
struct Numerators {
    lo: u64,
    g: Vec<f64>,
    /// Roundings behind each value.
    rounding: u64,
    /// Bound on the summed absolute error from FFT steps.
    fft: f64,
    /// Mass trimmed anywhere in the history of L and O.
    dropped: f64,
}

fn numerators(own: &Law, outside: Option<&Law>, target: u64) -> Numerators {
    let Some(o) = outside else {
        return Numerators {
            lo: own.lo,
            g: vec![0.0; own.len()],
            rounding: own.rounding,
            fft: 0.0,
            dropped: 1.0,
        };
    };
    let g = (0..own.len())
        .map(|i| {
            let k = own.lo + i as u64;
            if k > target {
                0.0
            } else {
                own.values[i] * o.at(target - k)
            }
        })
        .collect();
    // sum_k |L(k) dO| + |dL(k) O| <= E_O sum L + len E_L max O, with sum L, max O <= 1.
    let fft = o.abs_err + own.len() as f64 * own.abs_err;
    Numerators {
        lo: own.lo,
        g,
        rounding: own.rounding + o.rounding + 1,
        fft,
        dropped: own.dropped + o.dropped,
    }
}

/// Certified L1 bound of the pmf g / sum g, and the measured truncation share (for retries).
///
/// With g~ the numerators in exact arithmetic (every kernel only drops non-negative mass, so
/// g~ <= g + e where e is the FFT error, summing to at most `fft`),
/// ||g~/sum g~ - g/Z||_1 <= 2 (Z - sum g~ + 2 fft) / Z. The deficit Z - sum g~ is bounded two
/// ways, both rigorous: a posteriori by the normaliser's bracket on Z less the computed sum, and
/// a priori by the mass trimmed along the way (each trimmed unit meets a complementary law whose
/// values are at most 1). The smaller is used; the rounding term gamma(2k + len + 2) covers the
/// relative error of the values and of their normalisation.
fn certify(
    normaliser: &Normaliser,
    s: f64,
    k: u64,
    len: usize,
    z_mid: f64,
    fft: f64,
    dropped: f64,
) -> (f64, f64) {
    let chain = k + len as u64;
    let lower_sum = s * (1.0 - gamma(chain));
    let posterior_gap = (normaliser.z_hi - lower_sum).max(0.0);
    let gap = posterior_gap.min(dropped * (1.0 + 1e-9)) + 2.0 * fft;
    let truncation = 2.0 * gap / normaliser.z_lo;
    let rounding = gamma(2 * k + len as u64 + 2);
    // What the windows measurably lost, beyond what rounding alone could explain.
    let measured = (2.0 * (z_mid - s) / z_mid - 4.0 * gamma(chain)).max(0.0);
    (
        (truncation + rounding) * (1.0 + 8.0 * UNIT_ROUNDOFF),
        measured,
    )
}

fn budget(tolerance: f64, trims: u64) -> f64 {
    TRIM_SHARE * tolerance / trims.max(1) as f64
}

fn trims_of(plan: &Plan, zones: &[Zone], outside: usize) -> u64 {
    let zone_trims: u64 = zones.iter().map(|z| 2 * trims_for(z.len())).sum();
    zone_trims + 8 * plan.nodes.len() as u64 + trims_for(outside)
}

/// Executes `plan` for `zones`: one summary per zone, in the zones' order.
///
/// Occurs as `Cancelled` when `control` asks.
pub fn execute(
    plan: &Plan,
    raster: &Raster,
    zones: &[Zone],
    normaliser: &Normaliser,
    settings: &Settings,
    control: &Control,
) -> Result<Vec<ZoneSummary>, EngineError> {
    execute_with(
        plan,
        raster,
        zones,
        normaliser,
        settings,
        control,
        FFT_MIN_LEN,
    )
}

/// `execute` with the FFT threshold chosen by the caller (tests force the FFT path with 1).
pub(crate) fn execute_with(
    plan: &Plan,
    raster: &Raster,
    zones: &[Zone],
    normaliser: &Normaliser,
    settings: &Settings,
    control: &Control,
    fft_min: usize,
) -> Result<Vec<ZoneSummary>, EngineError> {
    control.plan_work(plan.estimated_cost as u64);
    if zones.is_empty() {
        return Ok(Vec::new());
    }
    let values = raster.values();
    let ones = |z: &Zone| {
        z.cells()
            .iter()
            .filter(|&&c| values[c as usize] >= 1.0)
            .count() as u64
    };
    let tilt = match normaliser.regime {
        Regime::Tilted(t) => t,
        Regime::AllEmpty | Regime::AllFull => {
            let full = normaliser.regime == Regime::AllFull;
            return Ok(zones
                .iter()
                .map(|z| {
                    let k = if full {
                        z.cells()
                            .iter()
                            .filter(|&&c| values[c as usize] > 0.0)
                            .count() as u64
                    } else {
                        ones(z)
                    };
                    summary_of(raster, z, k, vec![1.0], settings, 0.0)
                })
                .collect());
        }
    };
    let sets = build_sets(plan, raster, zones);
    control.check()?;
    let fft_min = if tail_sensitive(zones, values, &tilt) {
        usize::MAX
    } else {
        fft_min
    };
    let trims = trims_of(plan, zones, sets.outside.len());
    let z_mid = 0.5 * (normaliser.z_lo + normaliser.z_hi);
    let mut eps = budget(settings.tolerance, trims);
    let mut attempt = 0;
    loop {
        attempt += 1;
        let results = run_tree(
            plan,
            (zones, false),
            &sets,
            values,
            tilt,
            normaliser.target,
            (eps, fft_min),
            control,
            &|zone, own, outside| {
                let n = numerators(own, outside, normaliser.target);
                let s: f64 = n.g.iter().sum();
                let (bound, measured) = certify(
                    normaliser,
                    s,
                    n.rounding,
                    n.g.len(),
                    z_mid,
                    n.fft,
                    n.dropped,
                );
                (zone, n.lo, n.g, s, bound, measured)
            },
        )?;
        let worst = results.iter().map(|r| r.5).fold(0.0, f64::max);
        if worst > settings.tolerance && attempt < MAX_ATTEMPTS {
            eps *= RETRY_FACTOR;
            continue;
        }
        let mut out: Vec<Option<ZoneSummary>> = vec![None; zones.len()];
        let summaries: Vec<(usize, ZoneSummary)> = results
            .into_par_iter()
            .map(|(zone, lo, g, s, bound, _)| {
                let z = &zones[zone];
                let (offset, pmf) = normalised(lo, g, s);
                (
                    zone,
                    summary_of(raster, z, offset + ones(z), pmf, settings, bound.min(2.0)),
                )
            })
            .collect();
        for (zone, s) in summaries {
            out[zone] = Some(s);
        }
        return Ok(out
            .into_iter()
            .map(|s| s.expect("every zone has a leaf"))
            .collect());
    }
}

/// Whether some zone holds so much of the total's variance that its pmf reads the outside law in
/// that law's tails, where FFT noise (absolute, about u log2 N of the peak) would cost relative
/// accuracy. Below `TAIL_SHARE` of the variance, every pmf value >= 1e-10 reads the outside law
/// within exp(-23 / 16) of its peak, so the noise stays under 1e-11 relative.
fn tail_sensitive(zones: &[Zone], values: &[f64], tilt: &Tilt) -> bool {
    zones.par_iter().any(|z| {
        let var: f64 = z
            .cells()
            .iter()
            .map(|&c| values[c as usize])
            .filter(|&p| is_free(p))
            .map(|p| {
                let (q, r) = tilted(p, tilt.t);
                q * r
            })
            .sum();
        var > TAIL_SHARE * tilt.var
    })
}

/// Trims exact zeros from both ends and divides by the sum.
fn normalised(lo: u64, g: Vec<f64>, s: f64) -> (u64, Vec<f64>) {
    if s <= 0.0 {
        return (lo, vec![1.0]);
    }
    let first = g.iter().position(|&x| x > 0.0).unwrap_or(0);
    let last = g.iter().rposition(|&x| x > 0.0).unwrap_or(0);
    (
        lo + first as u64,
        g[first..=last].iter().map(|&x| x / s).collect(),
    )
}

#[allow(clippy::too_many_arguments)]
fn run_tree<T: Send, F>(
    plan: &Plan,
    (zones, whole_leaves): (&[Zone], bool),
    sets: &Sets,
    values: &[f64],
    tilt: Tilt,
    target: u64,
    (eps, fft_min): (f64, usize),
    control: &Control,
    finish: &F,
) -> Result<Vec<T>, EngineError>
where
    F: Fn(usize, &Law, Option<&Law>) -> T + Sync,
{
    let pass = Pass {
        plan,
        zones,
        whole_leaves,
        sets,
        cells: Cells {
            values,
            t: tilt.t,
            eps,
            fft_min,
        },
        target,
        control,
    };
    let (built, outside) = rayon::join(|| pass.up(plan.root), || pass.cells.law_of(&sets.outside));
    let built = built?;
    let (lo, hi) = built.range();
    let outside = restrict(outside, lo, hi).map(|l| pass.trimmed(l));
    pass.down(built, outside, finish)
}

pub(crate) fn summary_of(
    raster: &Raster,
    z: &Zone,
    offset: u64,
    pmf: Vec<f64>,
    settings: &Settings,
    bound: f64,
) -> ZoneSummary {
    let (mean, sd, mode, median, interval, exceedance) =
        summarise(offset, &pmf, settings.level, &settings.thresholds);
    let (mut pm, mut pv) = (0.0, 0.0);
    for &c in z.cells() {
        let p = raster.values()[c as usize];
        pm += p;
        pv += p * (1.0 - p);
    }
    ZoneSummary {
        id: z.id().to_string(),
        cells: z.len(),
        offset,
        pmf: if settings.pmf { pmf } else { Vec::new() },
        mean,
        sd,
        mode,
        median,
        interval,
        exceedance,
        prior_mean: pm,
        prior_sd: pv.sqrt(),
        error_bound: bound,
    }
}

/// P(cell has an event | total) for `cells` (all valid cells when `None`), in the given order.
///
/// Cells are grouped into blocks of `CELL_BLOCK` along the raster; the union tree runs over the
/// blocks, and within a block each cell's leave-one-out law comes from running prefix and suffix
/// folds, so no cell pays for a tree node of its own. Occurs as `InvalidZone` when a cell is
/// outside the raster or nodata, as `NothingToDo` for an empty list, `Cancelled` when asked.
pub fn cell_posterior(
    raster: &Raster,
    cells: Option<&[u32]>,
    normaliser: &Normaliser,
    settings: &Settings,
    control: &Control,
) -> Result<CellPosterior, EngineError> {
    let values = raster.values();
    let list: Vec<u32> = match cells {
        Some(c) => {
            for (i, &cell) in c.iter().enumerate() {
                if cell as usize >= values.len() || values[cell as usize].is_nan() {
                    let why = if (cell as usize) < values.len() {
                        "is nodata"
                    } else {
                        "is outside the raster"
                    };
                    return Err(EngineError::InvalidZone {
                        zone: "cells".into(),
                        position: Some(i),
                        detail: format!(
                            "cell {cell} {why} ({}x{} raster, last index {}): list valid cells only",
                            raster.width(),
                            raster.height(),
                            values.len() - 1
                        ),
                    });
                }
            }
            c.to_vec()
        }
        None => (0..values.len() as u32)
            .filter(|&c| !values[c as usize].is_nan())
            .collect(),
    };
    if list.is_empty() {
        return Err(EngineError::NothingToDo(
            "the cell list is empty: give at least one cell".into(),
        ));
    }
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
                    .map(|&c| (c, values[c as usize], post(values[c as usize])))
                    .collect(),
                error_bound: 0.0,
            });
        }
    };
    // Distinct free cells in raster order, cut into blocks.
    let mut free: Vec<u32> = list
        .iter()
        .copied()
        .filter(|&c| is_free(values[c as usize]))
        .collect();
    free.sort_unstable();
    free.dedup();
    let mut posterior = std::collections::HashMap::with_capacity(free.len());
    let mut worst = 0.0f64;
    if !free.is_empty() {
        let blocks: Vec<Zone> = free
            .chunks(CELL_BLOCK)
            .map(|c| Zone::block(c.to_vec()))
            .collect();
        let plan = plan(raster, &blocks);
        control.plan_work(plan.estimated_cost as u64);
        let sets = build_sets(&plan, raster, &blocks);
        let trims = trims_of(&plan, &blocks, sets.outside.len());
        let eps = budget(settings.tolerance, trims);
        let target = normaliser.target;
        let z_mid = 0.5 * (normaliser.z_lo + normaliser.z_hi);
        let results = run_tree(
            &plan,
            (&blocks, true),
            &sets,
            values,
            tilt,
            target,
            (eps, FFT_MIN_LEN),
            control,
            &|zone, _own, outside| {
                leave_one_out(
                    blocks[zone].cells(),
                    values,
                    tilt.t,
                    outside,
                    target,
                    normaliser,
                    z_mid,
                )
            },
        )?;
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
            let p = values[c as usize];
            let post = if is_free(p) { posterior[&c] } else { p };
            (c, p, post)
        })
        .collect();
    Ok(CellPosterior {
        cells,
        error_bound: worst,
    })
}

/// Posterior of each cell of a block from the block's outside law: (cell, posterior, bound).
fn leave_one_out(
    block: &[u32],
    values: &[f64],
    t: f64,
    outside: Option<&Law>,
    target: u64,
    normaliser: &Normaliser,
    z_mid: f64,
) -> Vec<(u32, f64, f64)> {
    let pairs: Vec<(f64, f64)> = block
        .iter()
        .map(|&c| tilted(values[c as usize], t))
        .collect();
    let Some(o) = outside else {
        return block.iter().map(|&c| (c, 0.5, 2.0)).collect();
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
        let k = f.rounding + suf.rounding + suf.len() as u64 + 1;
        let (bound, _) = certify(normaliser, s, k, 2, z_mid, 2.0 * f.abs_err, f.dropped);
        out.push((c, if s > 0.0 { g1 / s } else { q }, bound.min(2.0)));
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
            rounding: f.rounding + super::law::ROUNDINGS_PER_CELL,
            abs_err: f.abs_err,
        };
    }
    out
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::engine::reference::conditional_pmf;
    use rand::{Rng, SeedableRng};
    use rand_chacha::ChaCha8Rng;

    fn random_raster(rng: &mut ChaCha8Rng, w: u32, h: u32, special: bool) -> Raster {
        let values = (0..w * h)
            .map(|_| {
                let u: f64 = rng.gen();
                if special && u < 0.03 {
                    f64::NAN
                } else if special && u < 0.05 {
                    0.0
                } else if special && u < 0.06 {
                    1.0
                } else {
                    0.0005 + 0.4 * rng.gen::<f64>().powi(2)
                }
            })
            .collect();
        Raster::from_probabilities(w, h, values).unwrap()
    }

    fn random_zones(rng: &mut ChaCha8Rng, r: &Raster, n: usize, overlap: bool) -> Vec<Zone> {
        let valid: Vec<u32> = (0..r.len() as u32)
            .filter(|&c| r.get(crate::engine::CellIndex(c)).is_some())
            .collect();
        if !overlap {
            // A partition of a random subset of the valid cells into n zones.
            let mut zones: Vec<Vec<u32>> = vec![Vec::new(); n];
            for &c in &valid {
                let z = rng.gen_range(0..n + 1);
                if z < n {
                    zones[z].push(c);
                }
            }
            return zones
                .into_iter()
                .enumerate()
                .filter(|(_, c)| !c.is_empty())
                .map(|(i, c)| Zone::new(format!("z{i}"), c, r).unwrap())
                .collect();
        }
        (0..n)
            .map(|i| {
                let size = rng.gen_range(1..=valid.len().min(60));
                let start = rng.gen_range(0..valid.len());
                let cells: Vec<u32> = (0..size)
                    .map(|k| valid[(start + k * 3) % valid.len()])
                    .collect::<std::collections::BTreeSet<_>>()
                    .into_iter()
                    .collect();
                Zone::new(format!("o{i}"), cells, r).unwrap()
            })
            .collect()
    }

    /// The tree executor against the naive one-cell-at-a-time reference.
    fn check(r: &Raster, zones: &[Zone], total: u64, tolerance: f64) {
        check_with(r, zones, total, tolerance, FFT_MIN_LEN);
    }

    fn check_with(r: &Raster, zones: &[Zone], total: u64, tolerance: f64, fft_min: usize) {
        let control = Control::new();
        let settings = Settings {
            tolerance,
            ..Settings::default()
        };
        let norm = Normaliser::new(r, total, &control).unwrap();
        let p = plan(r, zones);
        let got = execute_with(&p, r, zones, &norm, &settings, &control, fft_min).unwrap();
        for (z, s) in zones.iter().zip(&got) {
            // reference: engine::reference::conditional_pmf, plain full-support folds
            let want = conditional_pmf(r, z.cells(), total).unwrap();
            let mut l1 = 0.0;
            for (k, &w) in want.iter().enumerate() {
                let k = k as u64;
                let g = if k >= s.offset {
                    s.pmf.get((k - s.offset) as usize).copied().unwrap_or(0.0)
                } else {
                    0.0
                };
                l1 += (g - w).abs();
                if tolerance <= 1e-13 {
                    assert!((g - w).abs() <= 1e-13, "zone {} k {k}: {g} vs {w}", s.id);
                    if w >= 1e-10 {
                        assert!(
                            (g - w).abs() <= 1e-9 * w,
                            "zone {} k {k}: {g} vs {w} relative",
                            s.id
                        );
                    }
                }
            }
            assert!(
                l1 <= s.error_bound,
                "zone {}: L1 {l1:e} above bound {:e}",
                s.id,
                s.error_bound
            );
            // The bound is the tolerance plus a worst-case rounding term of about 3e-15 per cell.
            let rounding = 1e-14 * r.stats().valid as f64;
            // (With FFT forced on narrow laws, its absolute error terms dominate instead.)
            assert!(
                fft_min < FFT_MIN_LEN || s.error_bound <= tolerance + rounding,
                "zone {}: bound {:e}",
                s.id,
                s.error_bound
            );
        }
    }

    #[test]
    fn tree_matches_reference_on_partitions() {
        let mut rng = ChaCha8Rng::seed_from_u64(7);
        for (w, h, n) in [
            (1, 1, 1),
            (2, 1, 1),
            (3, 5, 2),
            (13, 11, 7),
            (40, 30, 23),
            (60, 50, 97),
        ] {
            for special in [false, true] {
                let r = random_raster(&mut rng, w, h, special);
                let zones = random_zones(&mut rng, &r, n, false);
                if zones.is_empty() {
                    continue;
                }
                let st = r.stats();
                let mean = st.sum_p;
                let sd = st.sum_var.sqrt();
                let lo = st.certain;
                let hi = st.certain + st.free;
                for shift in [-3.0, 0.0, 1.5, 8.0] {
                    let total =
                        ((mean + shift * sd).round() as i64).clamp(lo as i64, hi as i64) as u64;
                    check(&r, &zones, total, 1e-13);
                }
                check(&r, &zones, lo, 1e-13);
                check(&r, &zones, hi, 1e-13);
            }
        }
    }

    #[test]
    fn tree_matches_reference_on_overlapping_zones() {
        let mut rng = ChaCha8Rng::seed_from_u64(11);
        for (w, h, n) in [(5, 5, 3), (20, 20, 17), (50, 40, 41)] {
            let r = random_raster(&mut rng, w, h, true);
            let mut zones = random_zones(&mut rng, &r, n, true);
            let dup = Zone::new("dup", zones[0].cells().to_vec(), &r).unwrap();
            zones.push(dup);
            let st = r.stats();
            let total = (st.sum_p + 1.5 * st.sum_var.sqrt()).round() as u64;
            check(&r, &zones, total.min(st.certain + st.free), 1e-13);
            check(&r, &zones, total.min(st.certain + st.free), 1e-6);
        }
    }

    #[test]
    fn fft_path_matches_reference() {
        // FFT forced from 64-wide laws up, so the small rasters here exercise it at every level.
        let mut rng = ChaCha8Rng::seed_from_u64(13);
        // Many small zones (FFT allowed) and a few large ones (the executor falls back to direct).
        for (w, h, n) in [(60, 50, 3), (80, 70, 41)] {
            let r = random_raster(&mut rng, w, h, true);
            let zones = random_zones(&mut rng, &r, n, false);
            let st = r.stats();
            for shift in [0.0, 1.5, -4.0] {
                let total = (st.sum_p + shift * st.sum_var.sqrt()).round() as u64;
                check_with(&r, &zones, total, 1e-13, 64);
            }
            let over = random_zones(&mut rng, &r, n, true);
            check_with(
                &r,
                &over,
                (st.sum_p + 1.5 * st.sum_var.sqrt()).round() as u64,
                1e-13,
                64,
            );
        }
    }

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

//! Scenarios: independent draws of the whole 0/1 event field from its law given the evidence.
//!
//! One balanced tree over the free cells (0 < p < 1), ordered so that cells lying in the same
//! set of zones (an atom) are adjacent, holds the tilted law of the count under every node.
//! A draw takes the free total from the posterior of the total (or the exact total), then
//! splits each node's count between its children from P(left = j | node = c) proportional to
//! L(j) R(c - j), top-down; inside a leaf block, cells are drawn one by one from their
//! conditional Bernoulli laws (Chen, Dempster & Liu 1994). Tilting leaves these conditional laws
//! unchanged and keeps every law's values in range. Zone counts are read at the atoms, so a
//! draw without event cells stops there.
//!
//! Each draw has its own random stream (ChaCha8, stream = the draw's index, key = the seed), so
//! the draws do not depend on the number of threads that compute them.
//!
//! Worst case: building is one product tree over the free cells with direct convolutions
//! (O(cells x 16) folds plus the squares of the law widths at each level); memory is the tree's
//! laws, O(cells + widths x nodes above the leaves). A draw costs O(sum over visited nodes of
//! the law width); with event cells, plus O(16 x count) per leaf block holding events.

use std::collections::HashMap;

use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use rayon::prelude::*;

use super::control::Control;
use super::error::EngineError;
use super::evidence::Evidence;
use super::law::{convolve, Law};
use super::model::{Raster, Zone};
use super::normaliser::{Normaliser, Regime};
use super::rounding::{gamma, ROUNDINGS_PER_CELL};
use super::strata::Strata;
use super::tilt::{is_free, tilted};

/// Cells of a leaf block, drawn one by one: its prefix laws cost 16 x count per draw, less
/// than the tree nodes a finer split would add (common practice for product trees).
const LEAF_CELLS: usize = 16;
/// Mass all trims of the tree may drop together (tilted, so the laws sum to 1): it enters the
/// error bound divided by the law's value at the drawn total, far below any other term.
const DROP_BUDGET: f64 = 1e-18;
/// Draws per unit of cancellation check and progress.
const CHUNK: usize = 64;

/// One draw: the event count of every zone (in the zones' order) and, when asked, the raster
/// indices of the cells holding an event (ascending, certain cells included).
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct Scenario {
    pub zones: Vec<u64>,
    pub cells: Option<Vec<u32>>,
}

enum Kind {
    Leaf,
    Inner(Box<[Node; 2]>),
}

struct Node {
    /// Positions [start, end) of `Sampler::order`.
    start: usize,
    end: usize,
    /// The atom this node is the topmost node of, when its cells all lie in one atom.
    atom: Option<u32>,
    law: Law,
    kind: Kind,
}

/// Everything the draws of one part of the raster share: the tree, the atoms' zones, the law
/// of the part's free total.
struct Tree {
    /// Free cells in tree order, and their tilted (q, 1 - q).
    order: Vec<u32>,
    pairs: Vec<(f64, f64)>,
    /// Each atom's zones.
    atom_zones: Vec<Vec<u32>>,
    /// Cells with p = 1 per zone, and all of them (ascending).
    base: Vec<u64>,
    certain_cells: Vec<u32>,
    root: Option<Node>,
    /// (free total, cumulative probability) of the free total each draw starts from.
    totals: Vec<(u64, f64)>,
    /// Bound on the total variation distance between the law one draw follows and the exact
    /// law of the part's field (first order in the unit roundoff).
    error_bound: f64,
}

/// Where the free total of a part comes from.
enum Start<'a> {
    /// The evidence, through its normaliser.
    Evidence(&'a Normaliser),
    /// No evidence: the prior law of the part's total, which the tree's root holds (tilt 1).
    Prior,
}

/// One part of the raster drawn independently of the others: the whole raster, a stratum, or
/// the cells in no stratum. Cells and zones are numbered within the part.
struct Piece {
    tree: Tree,
    /// Raster index of each of the part's cells (`None`: the part is the raster).
    cells: Option<Vec<u32>>,
    /// The request's index of each of the part's zones (`None`: the same zones).
    zones: Option<Vec<u32>>,
}

/// Everything the draws share: one tree per independent part of the raster.
pub struct Sampler {
    pieces: Vec<Piece>,
    zones: usize,
    /// Bound on the total variation distance between the law one draw follows and the exact
    /// conditional law of the field (first order in the unit roundoff): the sum of the parts'.
    pub error_bound: f64,
}

impl Sampler {
    /// Builds the tree of `raster`'s free cells for `zones` under the evidence `normaliser`
    /// was computed for.
    ///
    /// Occurs as `Cancelled` when `control` asks.
    pub fn new(
        raster: &Raster,
        zones: &[Zone],
        normaliser: &Normaliser,
        control: &Control,
    ) -> Result<Sampler, EngineError> {
        let tree = Tree::new(raster, zones, Start::Evidence(normaliser), control)?;
        Ok(Sampler {
            error_bound: tree.error_bound,
            pieces: vec![Piece {
                tree,
                cells: None,
                zones: None,
            }],
            zones: zones.len(),
        })
    }

    /// Builds one tree per stratum, under that stratum's evidence, and one for the cells in no
    /// stratum, under their prior law: given the strata's evidence these parts are independent
    /// (see `strata`), so a draw is one draw of each.
    ///
    /// Occurs as `ImpossibleEvidence` when a stratum's evidence has no prior mass, and as
    /// `Cancelled` when `control` asks.
    pub fn strata(
        raster: &Raster,
        zones: &[Zone],
        strata: &Strata,
        control: &Control,
    ) -> Result<Sampler, EngineError> {
        let values = raster.values();
        let mut in_stratum = vec![false; values.len()];
        let mut parts: Vec<(Raster, Vec<u32>, Option<&Evidence>)> = Vec::new();
        for (stratum, evidence) in strata.parts() {
            let cells: Vec<u32> = stratum.cells().iter().map(|c| c.0).collect();
            for &c in &cells {
                in_stratum[c as usize] = true;
            }
            parts.push((stratum.raster().clone(), cells, Some(evidence)));
        }
        let rest: Vec<u32> = (0..values.len() as u32)
            .filter(|&i| !in_stratum[i as usize] && !values[i as usize].is_nan())
            .collect();
        drop(in_stratum);
        if !rest.is_empty() {
            let p = rest.iter().map(|&i| values[i as usize]).collect();
            parts.push((
                Raster::from_probabilities(rest.len() as u32, 1, p)?,
                rest,
                None,
            ));
        }
        let mut local = vec![u32::MAX; values.len()];
        let mut pieces = Vec::with_capacity(parts.len());
        for (sub, cells, evidence) in parts {
            for (i, &c) in cells.iter().enumerate() {
                local[c as usize] = i as u32;
            }
            let mut own = Vec::new();
            let mut index = Vec::new();
            for (z, zone) in zones.iter().enumerate() {
                let inside: Vec<u32> = zone
                    .cells()
                    .iter()
                    .map(|c| local[c.index()])
                    .filter(|&l| l != u32::MAX)
                    .collect();
                if !inside.is_empty() {
                    own.push(Zone::new(zone.id(), inside, &sub)?);
                    index.push(z as u32);
                }
            }
            for &c in &cells {
                local[c as usize] = u32::MAX;
            }
            let tree = match evidence {
                Some(evidence) => {
                    let normaliser = Normaliser::of(&sub, evidence, control)?;
                    Tree::new(&sub, &own, Start::Evidence(&normaliser), control)?
                }
                None => Tree::new(&sub, &own, Start::Prior, control)?,
            };
            pieces.push(Piece {
                tree,
                cells: Some(cells),
                zones: Some(index),
            });
        }
        Ok(Sampler {
            error_bound: pieces.iter().map(|p| p.tree.error_bound).sum(),
            pieces,
            zones: zones.len(),
        })
    }

    /// Draw number `index` of the stream keyed by `seed`.
    pub fn draw(&self, seed: u64, index: u64, cells: bool) -> Scenario {
        let mut rng = ChaCha8Rng::seed_from_u64(seed);
        rng.set_stream(index);
        let mut zones = vec![0u64; self.zones];
        let mut all = cells.then(Vec::new);
        for piece in &self.pieces {
            let (counts, drawn) = piece.tree.draw(&mut rng, cells);
            for (z, c) in counts.into_iter().enumerate() {
                let at = piece.zones.as_ref().map_or(z, |index| index[z] as usize);
                zones[at] += c;
            }
            if let (Some(all), Some(drawn)) = (&mut all, drawn) {
                match &piece.cells {
                    Some(map) => all.extend(drawn.iter().map(|&c| map[c as usize])),
                    None => all.extend(drawn),
                }
            }
        }
        let cells = all.map(|mut c| {
            c.sort_unstable();
            c
        });
        Scenario { zones, cells }
    }
}

impl Tree {
    fn new(
        raster: &Raster,
        zones: &[Zone],
        start: Start,
        control: &Control,
    ) -> Result<Tree, EngineError> {
        let values = raster.values();
        let t = match start {
            Start::Evidence(Normaliser {
                regime: Regime::Tilted(tilt),
                ..
            }) => tilt.t,
            _ => 1.0,
        };
        // Each cell's zones, then atoms numbered in the order of their first cell.
        let mut member: Vec<Vec<u32>> = vec![Vec::new(); values.len()];
        let mut base = vec![0u64; zones.len()];
        for (z, zone) in zones.iter().enumerate() {
            for c in zone.cells() {
                let p = values[c.index()];
                if is_free(p) {
                    member[c.index()].push(z as u32);
                } else if p == 1.0 {
                    base[z] += 1;
                }
            }
        }
        let mut ids: HashMap<Vec<u32>, u32> = HashMap::new();
        let mut atom_zones: Vec<Vec<u32>> = Vec::new();
        let mut keyed: Vec<(u32, u32)> = Vec::new();
        let mut certain_cells = Vec::new();
        for (i, &p) in values.iter().enumerate() {
            if p == 1.0 {
                certain_cells.push(i as u32);
            }
            if !is_free(p) {
                continue;
            }
            let zs = std::mem::take(&mut member[i]);
            let next = atom_zones.len() as u32;
            let id = *ids.entry(zs.clone()).or_insert_with(|| {
                atom_zones.push(zs);
                next
            });
            keyed.push((id, i as u32));
        }
        drop(member);
        control.check()?;
        keyed.sort_unstable();
        let order: Vec<u32> = keyed.iter().map(|k| k.1).collect();
        let atom_of: Vec<u32> = keyed.iter().map(|k| k.0).collect();
        let pairs: Vec<(f64, f64)> = order
            .iter()
            .map(|&i| tilted(values[i as usize], t))
            .collect();
        // Positions where a new atom starts (after the first).
        let starts: Vec<usize> = (1..atom_of.len())
            .filter(|&i| atom_of[i] != atom_of[i - 1])
            .collect();
        let nodes = 2 * (order.len().div_ceil(LEAF_CELLS) + starts.len() + 1);
        let builder = Builder {
            pairs: &pairs,
            atom_of: &atom_of,
            starts: &starts,
            eps: DROP_BUDGET / nodes as f64,
            control,
        };
        let root = if order.is_empty() {
            None
        } else {
            Some(builder.build(0, order.len(), false)?)
        };
        let free = order.len() as u64;
        let certain = certain_cells.len() as u64;
        // The law of the free total each draw starts from.
        let (weights, mut bound) = match start {
            Start::Prior => match &root {
                None => (vec![(0, 1.0)], 0.0),
                Some(r) => (
                    (r.law.lo..=r.law.hi()).map(|k| (k, r.law.at(k))).collect(),
                    0.0,
                ),
            },
            Start::Evidence(n) => match (&n.regime, &n.check.posterior) {
                (Regime::AllEmpty, _) => (vec![(0, 1.0)], 0.0),
                (Regime::AllFull, _) => (vec![(free, 1.0)], 0.0),
                (_, None) => (vec![(n.target, 1.0)], 0.0),
                (_, Some(post)) => (
                    post.pmf
                        .iter()
                        .enumerate()
                        .map(|(i, &w)| ((post.offset + i as u64).saturating_sub(certain), w))
                        .collect(),
                    post.error_bound,
                ),
            },
        };
        // Totals the tree cannot reach (trimmed away) are left out; their mass enters the bound.
        let reachable = |k: u64| match &root {
            None => k == 0,
            Some(r) => k == 0 || k == free || r.law.at(k) > 0.0,
        };
        let all: f64 = weights.iter().map(|w| w.1).sum();
        let kept: Vec<(u64, f64)> = weights
            .into_iter()
            .filter(|&(k, w)| w > 0.0 && reachable(k))
            .collect();
        let kept_mass: f64 = kept.iter().map(|w| w.1).sum();
        if kept_mass.is_nan() || kept_mass <= 0.0 {
            return Err(EngineError::ImpossibleEvidence(
                "no total the evidence allows is reachable by the scenario tree: the evidence sits too far in the raster's tails to draw from".into(),
            ));
        }
        bound += (all - kept_mass).max(0.0) / all;
        let mut acc = 0.0;
        let mut totals = Vec::with_capacity(kept.len());
        for (k, w) in kept {
            acc += w / kept_mass;
            // Trimming: the draws follow the exact law restricted to the kept fields.
            if let Some(r) = &root {
                if k > 0 && k < free {
                    bound += w / kept_mass * r.law.dropped / r.law.at(k);
                }
            }
            totals.push((k, acc));
        }
        if let Some(last) = totals.last_mut() {
            last.1 = 1.0;
        }
        if let Some(r) = &root {
            bound += r.rounding_bound();
        }
        Ok(Tree {
            order,
            pairs,
            atom_zones,
            base,
            certain_cells,
            root,
            totals,
            error_bound: bound * (1.0 + 1e-6),
        })
    }

    /// One draw of the part's field from `rng`: its zones' counts and, when asked, its event
    /// cells (unordered).
    fn draw(&self, rng: &mut ChaCha8Rng, cells: bool) -> (Vec<u64>, Option<Vec<u32>>) {
        let u: f64 = rng.gen();
        let at = self.totals.partition_point(|t| t.1 <= u);
        let k = self.totals[at.min(self.totals.len() - 1)].0;
        let mut walk = Walk {
            tree: self,
            rng,
            atoms: vec![0u64; self.atom_zones.len()],
            cells: cells.then(|| self.certain_cells.clone()),
            scratch: Vec::new(),
        };
        if let Some(root) = &self.root {
            walk.down(root, k.min(self.order.len() as u64), false);
        }
        let mut zones = self.base.clone();
        for (a, &c) in walk.atoms.iter().enumerate() {
            if c > 0 {
                for &z in &self.atom_zones[a] {
                    zones[z as usize] += c;
                }
            }
        }
        (zones, walk.cells)
    }
}

/// Work of one split, in the planner's units (multiply-adds at the rate `zone-counts` runs
/// them): its window of j values, the random draw and the walk. Set so that the planned cost
/// of S250k-scenarios follows its measured time as the planned cost of `zone-counts` follows
/// its own (an estimate, not a bound).
const SPLIT_WORK: f64 = 24.0;
/// Work per cell of a leaf block holding events, in the same units and set the same way: the
/// prefix laws, the draws and the sort of the event cells.
const CELL_WORK: f64 = 24.0;

/// The planner's estimate of multiply-adds for building the tree over `free` cells and drawing
/// `count` scenarios of at most `events` events each (`cells`: with their event cells). Building
/// folds each cell into its leaf law and convolves up about log2(free) levels; a draw splits at
/// most every node above the leaves, and with event cells also runs the prefix laws of the
/// leaves holding events.
pub fn scenario_cost(free: u64, count: u64, events: u64, cells: bool) -> f64 {
    let n = free as f64;
    let leaves = (free.div_ceil(LEAF_CELLS as u64)) as f64;
    let levels = n.max(2.0).log2();
    let build = n * LEAF_CELLS as f64 + leaves * levels * SPLIT_WORK * SPLIT_WORK;
    let mut draw = 2.0 * leaves * SPLIT_WORK;
    if cells {
        let e = events.min(free) as f64;
        draw += LEAF_CELLS as f64 * CELL_WORK * (e + leaves.min(e));
    }
    build + count as f64 * draw
}

/// Draws `count` scenarios (indices 0 .. count) on the current rayon pool.
///
/// Occurs as `Cancelled` when `control` asks (checked every 64 draws).
pub fn scenarios(
    sampler: &Sampler,
    count: u64,
    seed: u64,
    cells: bool,
    control: &Control,
) -> Result<Vec<Scenario>, EngineError> {
    control.plan_work(count);
    let chunks: Vec<u64> = (0..count.div_ceil(CHUNK as u64)).collect();
    let parts: Result<Vec<Vec<Scenario>>, EngineError> = chunks
        .par_iter()
        .map(|&c| {
            control.check()?;
            let from = c * CHUNK as u64;
            let to = (from + CHUNK as u64).min(count);
            let got: Vec<Scenario> = (from..to).map(|i| sampler.draw(seed, i, cells)).collect();
            control.advance(to - from);
            Ok(got)
        })
        .collect();
    Ok(parts?.into_iter().flatten().collect())
}

struct Builder<'a> {
    pairs: &'a [(f64, f64)],
    atom_of: &'a [u32],
    starts: &'a [usize],
    eps: f64,
    control: &'a Control,
}

impl Builder<'_> {
    fn build(&self, a: usize, b: usize, in_atom: bool) -> Result<Node, EngineError> {
        let single = self.atom_of[a] == self.atom_of[b - 1];
        let atom = (single && !in_atom).then_some(self.atom_of[a]);
        if single && b - a <= LEAF_CELLS {
            let mut law = Law::unit();
            law.add_cells(self.pairs[a..b].iter().copied());
            law.trim(self.eps);
            return Ok(Node {
                start: a,
                end: b,
                atom,
                law,
                kind: Kind::Leaf,
            });
        }
        let mid = if single {
            a + (b - a) / 2
        } else {
            // The atom boundary inside (a, b) nearest the middle.
            let m = a + (b - a) / 2;
            let i = self.starts.partition_point(|&s| s <= a);
            let j = self.starts.partition_point(|&s| s < b);
            let inside = &self.starts[i..j];
            let at = inside.partition_point(|&s| s < m);
            let after = inside.get(at).copied();
            let before = at.checked_sub(1).map(|k| inside[k]);
            match (before, after) {
                (Some(x), Some(y)) => {
                    if m - x <= y - m {
                        x
                    } else {
                        y
                    }
                }
                (Some(x), None) => x,
                (None, Some(y)) => y,
                (None, None) => m,
            }
        };
        let (l, r) = if b - a >= 1 << 14 {
            rayon::join(|| self.build(a, mid, single), || self.build(mid, b, single))
        } else {
            (self.build(a, mid, single), self.build(mid, b, single))
        };
        let (l, r) = (l?, r?);
        self.control.check()?;
        // Direct convolution: every value keeps its relative accuracy, which the draws' ratios
        // need in the tails.
        let mut law = convolve(&l.law, &r.law, usize::MAX);
        law.trim(self.eps);
        Ok(Node {
            start: a,
            end: b,
            atom,
            law,
            kind: Kind::Inner(Box::new([l, r])),
        })
    }
}

impl Node {
    /// First-order bound on the total variation the roundings of this subtree's laws add to a
    /// draw: each split's weights carry the relative errors of its two children's values (and
    /// one product), each leaf's sequential draws those of their prefix laws.
    fn rounding_bound(&self) -> f64 {
        match &self.kind {
            Kind::Leaf => {
                let n = (self.end - self.start) as u64;
                n as f64 * 2.0 * gamma(ROUNDINGS_PER_CELL * n + 3)
            }
            Kind::Inner(kids) => {
                let [l, r] = &**kids;
                2.0 * (gamma(l.law.rounding) + gamma(r.law.rounding) + gamma(2))
                    + l.rounding_bound()
                    + r.rounding_bound()
            }
        }
    }
}

/// One draw in progress.
struct Walk<'a> {
    tree: &'a Tree,
    rng: &'a mut ChaCha8Rng,
    atoms: Vec<u64>,
    cells: Option<Vec<u32>>,
    scratch: Vec<f64>,
}

impl Walk<'_> {
    /// `in_atom`: an ancestor already credited this node's atom.
    fn down(&mut self, node: &Node, c: u64, in_atom: bool) {
        if c == 0 {
            return;
        }
        let in_atom = in_atom || node.atom.is_some();
        if let Some(a) = node.atom {
            self.atoms[a as usize] += c;
            if self.cells.is_none() {
                return;
            }
        }
        let size = (node.end - node.start) as u64;
        // A full node inside an atom: every cell holds an event. Above the atoms, the walk goes
        // on down (each split then gives every child its whole size) to credit each atom.
        if c >= size && in_atom {
            if let Some(cells) = &mut self.cells {
                cells.extend_from_slice(&self.tree.order[node.start..node.end]);
            }
            return;
        }
        match &node.kind {
            Kind::Leaf => self.leaf(node, c),
            Kind::Inner(kids) => {
                let [l, r] = &**kids;
                let j = self.split(&l.law, &r.law, c, (l.end - l.start) as u64, size);
                self.down(l, j, in_atom);
                self.down(r, c - j, in_atom);
            }
        }
    }

    /// Draws the left child's count j given the node's count c, P(j) proportional to
    /// L(j) R(c - j).
    fn split(&mut self, l: &Law, r: &Law, c: u64, nl: u64, size: u64) -> u64 {
        let lo = l.lo.max(c.saturating_sub(r.hi()));
        let hi = l.hi().min(c.saturating_sub(r.lo));
        let fallback = (c * nl / size).clamp(c.saturating_sub(size - nl), nl.min(c));
        if lo > hi || c < r.lo {
            return fallback;
        }
        self.scratch.clear();
        let mut sum = 0.0;
        for j in lo..=hi {
            sum += l.at(j) * r.at(c - j);
            self.scratch.push(sum);
        }
        if !(sum > 0.0 && sum.is_finite()) {
            return fallback;
        }
        let u = self.rng.gen::<f64>() * sum;
        let at = self.scratch.partition_point(|&s| s <= u);
        lo + at.min(self.scratch.len() - 1) as u64
    }

    /// Draws which of a leaf block's cells hold its `c` events, last cell first, each from
    /// P(x_i = 1 | the first i + 1 cells hold rem) = q_i P_i(rem - 1) / P_{i+1}(rem), where P_i
    /// is the law of the first i cells, kept up to c.
    fn leaf(&mut self, node: &Node, c: u64) {
        let Some(cells) = &mut self.cells else {
            return;
        };
        let pairs = &self.tree.pairs[node.start..node.end];
        let n = pairs.len();
        let w = c as usize + 1;
        let prefix = &mut self.scratch;
        prefix.clear();
        prefix.resize((n + 1) * w, 0.0);
        prefix[0] = 1.0;
        for (i, &(q, r)) in pairs.iter().enumerate() {
            let (done, next) = prefix.split_at_mut((i + 1) * w);
            let prev = &done[i * w..];
            next[0] = prev[0] * r;
            for k in 1..w {
                next[k] = prev[k] * r + prev[k - 1] * q;
            }
        }
        let mut rem = c as usize;
        for i in (0..n).rev() {
            if rem == 0 {
                break;
            }
            let (q, r) = pairs[i];
            let prev = &prefix[i * w..(i + 1) * w];
            let one = q * prev[rem - 1];
            let zero = r * prev[rem];
            let event = rem > i || self.rng.gen::<f64>() * (one + zero) < one;
            if event {
                cells.push(self.tree.order[node.start + i]);
                rem -= 1;
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::engine::{Evidence, StratumCells};
    use statrs::distribution::{ChiSquared, ContinuousCDF};

    /// Exact conditional probabilities of every 0/1 field over `p` (bit i = cell i) that
    /// `allowed` keeps, by enumeration: the fields' prior probabilities, renormalised.
    fn enumerate(p: &[f64], allowed: impl Fn(u32) -> bool) -> Vec<f64> {
        let n = p.len();
        let mut probs: Vec<f64> = (0..1u32 << n)
            .map(|x| {
                if !allowed(x) {
                    return 0.0;
                }
                (0..n)
                    .map(|i| if x >> i & 1 == 1 { p[i] } else { 1.0 - p[i] })
                    .product()
            })
            .collect();
        let z: f64 = probs.iter().sum();
        probs.iter_mut().for_each(|v| *v /= z);
        probs
    }

    /// The raster's probabilities, nodata as 0 (never an event).
    fn probabilities(raster: &Raster) -> Vec<f64> {
        raster
            .values()
            .iter()
            .map(|&v| if v.is_nan() { 0.0 } else { v })
            .collect()
    }

    /// Checks every draw's field against `allowed` and its zone counts against its cells, then
    /// the fields' frequencies against `exact` (chi-square, not rejected at 1e-3).
    fn check_fields(
        draws: &[Scenario],
        zones: &[Zone],
        exact: &[f64],
        allowed: impl Fn(u32) -> bool,
    ) {
        let mut observed = vec![0u64; exact.len()];
        for d in draws {
            let x = bits(d);
            assert!(allowed(x), "a drawn field breaks the evidence");
            for (zone, &count) in zones.iter().zip(&d.zones) {
                assert_eq!(
                    count,
                    zone_count(x as usize, zone) as u64,
                    "zone count and cells disagree"
                );
            }
            observed[x as usize] += 1;
        }
        let expected: Vec<f64> = exact.iter().map(|e| e * draws.len() as f64).collect();
        let pv = chi_square_p(&observed, &expected);
        assert!(pv > 1e-3, "chi-square p-value {pv}");
    }

    /// Pearson's statistic over the fields, pooling those expected fewer than 5 times into
    /// one class (common practice), and its p-value from statrs' chi-square law.
    fn chi_square_p(observed: &[u64], expected: &[f64]) -> f64 {
        let (mut stat, mut classes) = (0.0, 0usize);
        let (mut po, mut pe) = (0.0, 0.0);
        for (&o, &e) in observed.iter().zip(expected) {
            if e == 0.0 {
                assert_eq!(o, 0, "a field of probability zero was drawn");
                continue;
            }
            if e < 5.0 {
                po += o as f64;
                pe += e;
                continue;
            }
            stat += (o as f64 - e).powi(2) / e;
            classes += 1;
        }
        if pe > 0.0 {
            stat += (po - pe).powi(2) / pe;
            classes += 1;
        }
        // reference: statrs::distribution::ChiSquared, upper tail
        1.0 - ChiSquared::new((classes - 1) as f64).unwrap().cdf(stat)
    }

    fn small() -> (Raster, Vec<Zone>) {
        // 12 cells, one nodata, one certain, one impossible; two overlapping zones.
        let values = vec![
            Some(0.3),
            Some(0.7),
            Some(0.05),
            None,
            Some(0.5),
            Some(1.0),
            Some(0.2),
            Some(0.9),
            Some(0.0),
            Some(0.45),
            Some(0.6),
            Some(0.15),
        ];
        let raster = Raster::new(4, 3, values).unwrap();
        let zones = vec![
            Zone::new("a", vec![0, 1, 4, 5, 6], &raster).unwrap(),
            Zone::new("b", vec![1, 2, 6, 7, 10, 11], &raster).unwrap(),
        ];
        (raster, zones)
    }

    /// Field of a scenario as a bit pattern over the raster's cells.
    fn bits(s: &Scenario) -> u32 {
        s.cells.as_ref().unwrap().iter().fold(0, |x, &c| x | 1 << c)
    }

    #[test]
    fn whole_fields_follow_their_exact_conditional_law() {
        let (raster, zones) = small();
        let p = probabilities(&raster);
        let control = Control::new();
        for (evidence, allowed) in [
            (
                Evidence::exact_total(4, &raster).unwrap(),
                Box::new(|t: u32| t == 4) as Box<dyn Fn(u32) -> bool>,
            ),
            (
                Evidence::range(2, 5, &raster).unwrap(),
                Box::new(|t: u32| (2..=5).contains(&t)),
            ),
        ] {
            let n = Normaliser::of(&raster, &evidence, &control).unwrap();
            let sampler = Sampler::new(&raster, &zones, &n, &control).unwrap();
            assert!(sampler.error_bound < 1e-12, "{}", sampler.error_bound);
            let draws = scenarios(&sampler, 20_000, 7, true, &control).unwrap();
            let field = |x: u32| allowed(x.count_ones());
            // reference: brute-force enumeration of all 2^12 fields (closed form)
            let exact = enumerate(&p, field);
            check_fields(&draws, &zones, &exact, field);
        }
    }

    #[test]
    fn fields_under_strata_follow_their_exact_conditional_law() {
        let (raster, zones) = small();
        let p = probabilities(&raster);
        let control = Control::new();
        // Stratum `a` holds exactly 2 events, `b` between 1 and 2; cells 5, 8 and 11 are in
        // no stratum (one certain, one impossible, one free).
        let a = StratumCells::new("a", vec![0, 1, 2, 4], &raster).unwrap();
        let b = StratumCells::new("b", vec![6, 7, 9, 10], &raster).unwrap();
        let ea = Evidence::exact_total(2, a.raster()).unwrap();
        let eb = Evidence::range(1, 2, b.raster()).unwrap();
        let strata = Strata::new(vec![(a, ea), (b, eb)]).unwrap();
        let sampler = Sampler::strata(&raster, &zones, &strata, &control).unwrap();
        assert!(sampler.error_bound < 1e-12, "{}", sampler.error_bound);
        let draws = scenarios(&sampler, 20_000, 5, true, &control).unwrap();
        let field = |x: u32| {
            let in_a = (x & 0b1_0111).count_ones();
            let in_b = (x & 0b110_1100_0000).count_ones();
            in_a == 2 && (1..=2).contains(&in_b)
        };
        // reference: brute-force enumeration of all 2^12 fields (closed form), kept when each
        // stratum's total satisfies its evidence
        let exact = enumerate(&p, field);
        check_fields(&draws, &zones, &exact, field);
    }

    #[test]
    fn covariance_of_overlapping_zones_matches_enumeration() {
        let (raster, zones) = small();
        let p = probabilities(&raster);
        let control = Control::new();
        let n = Normaliser::new(&raster, 5, &control).unwrap();
        let sampler = Sampler::new(&raster, &zones, &n, &control).unwrap();
        let k = 20_000usize;
        let draws = scenarios(&sampler, k as u64, 11, false, &control).unwrap();
        // reference: brute-force enumeration of all fields with total 5
        let exact = enumerate(&p, |x| x.count_ones() == 5);
        let count = |x: usize, z: &Zone| zone_count(x, z) as f64;
        let moment = |f: &dyn Fn(usize) -> f64| -> f64 {
            exact.iter().enumerate().map(|(x, w)| w * f(x)).sum()
        };
        let (ma, mb) = (
            moment(&|x| count(x, &zones[0])),
            moment(&|x| count(x, &zones[1])),
        );
        let cov = moment(&|x| (count(x, &zones[0]) - ma) * (count(x, &zones[1]) - mb));
        let var_prod =
            moment(&|x| ((count(x, &zones[0]) - ma) * (count(x, &zones[1]) - mb) - cov).powi(2));
        let sampled: f64 = draws
            .iter()
            .map(|d| (d.zones[0] as f64 - ma) * (d.zones[1] as f64 - mb))
            .sum::<f64>()
            / k as f64;
        let se = (var_prod / k as f64).sqrt();
        assert!(
            cov.abs() > 10.0 * se,
            "the zones' covariance {cov} is too weak to test"
        );
        assert!(
            (sampled - cov).abs() < 4.0 * se,
            "{sampled} vs {cov} (se {se})"
        );
        let mean_a = draws.iter().map(|d| d.zones[0] as f64).sum::<f64>() / k as f64;
        let sd_a = moment(&|x| (count(x, &zones[0]) - ma).powi(2)).sqrt();
        assert!((mean_a - ma).abs() < 4.0 * sd_a / (k as f64).sqrt());
    }

    fn zone_count(x: usize, z: &Zone) -> u32 {
        z.cells().iter().filter(|c| x >> c.0 & 1 == 1).count() as u32
    }

    #[test]
    fn draws_do_not_depend_on_the_thread_count() {
        let p: Vec<f64> = (0..5000)
            .map(|i| ((i * 7919 % 997) as f64 + 0.5) / 4000.0)
            .collect();
        let raster = Raster::from_probabilities(100, 50, p).unwrap();
        let zones: Vec<Zone> = (0..20)
            .map(|z| {
                Zone::new(format!("z{z}"), (z * 200..z * 200 + 400).collect(), &raster).unwrap()
            })
            .collect();
        let control = Control::new();
        let n = Normaliser::new(&raster, 700, &control).unwrap();
        let run = |threads: usize| {
            let pool = rayon::ThreadPoolBuilder::new()
                .num_threads(threads)
                .build()
                .unwrap();
            pool.install(|| {
                let s = Sampler::new(&raster, &zones, &n, &control).unwrap();
                scenarios(&s, 300, 42, true, &control).unwrap()
            })
        };
        let one = run(1);
        assert_eq!(one, run(2));
        for d in &one {
            assert_eq!(
                d.cells.as_ref().unwrap().len(),
                700,
                "every draw holds the total"
            );
        }
        assert_ne!(one[0], one[1], "draws of one stream differ");
    }

    #[test]
    fn a_long_run_reports_progress_and_stops_when_cancelled() {
        let p: Vec<f64> = (0..5000)
            .map(|i| ((i * 7919 % 997) as f64 + 0.5) / 4000.0)
            .collect();
        let raster = Raster::from_probabilities(100, 50, p).unwrap();
        let zones = vec![Zone::new("a", (0..2500).collect(), &raster).unwrap()];
        let control = std::sync::Arc::new(Control::new());
        let n = Normaliser::new(&raster, 700, &control).unwrap();
        let sampler = Sampler::new(&raster, &zones, &n, &control).unwrap();
        let watcher = {
            let control = control.clone();
            std::thread::spawn(move || {
                let start = std::time::Instant::now();
                while control.progress() == 0.0 {
                    assert!(start.elapsed().as_secs() < 60, "no progress was reported");
                    std::thread::yield_now();
                }
                control.cancel();
                control.progress()
            })
        };
        let pool = rayon::ThreadPoolBuilder::new()
            .num_threads(1)
            .build()
            .unwrap();
        let got = pool.install(|| scenarios(&sampler, 1_000_000, 1, true, &control));
        let seen = watcher.join().unwrap();
        assert!(
            matches!(got, Err(EngineError::Cancelled)),
            "the run was not stopped"
        );
        assert!(seen > 0.0 && seen < 0.5, "progress {seen} when cancelled");
    }
}

//! The tree pass: bottom-up private laws, top-down outside laws, one call per leaf.
//!
//! For a node v with union U_v, the pass holds the tilted law of the cells *outside* U_v (with
//! the evidence's slack count at the root, when the evidence allows several totals),
//! restricted to the count values that can still matter (those that combine with U_v's count to
//! reach the target). Children get their outside law from the parent's by convolving in
//! D_c = U_sib \ U_c: the sibling's private law, plus its fringe where zones overlap (see
//! `membership`). At each leaf the caller's `finish` receives the zone's own law and its
//! outside law; what it makes of them (a pmf, leave-one-out cell posteriors) is its business.
//!
//! Every kernel only drops non-negative mass, so whatever `finish` sums is a lower bound of the
//! exact value; the certificate (`certify`) turns that into a bound. Worst case: time
//! O(sum over nodes of range x law width) plus O(cells x 64) for the leaves; memory O(sum over
//! nodes of law widths).

use super::control::Control;
use super::error::EngineError;
use super::law::{convolve, convolve_range, restrict, Law};
use super::membership::Membership;
use super::model::{CellIndex, Zone};
use super::plan::Plan;
use super::sets::Cells;

/// Subtrees holding at least this many zone cells build their two children in parallel: below
/// it rayon's task overhead (a few microseconds) exceeds the work it would split.
const PARALLEL_WEIGHT: u64 = 1 << 14;

/// Everything one pass over a plan reads.
pub(crate) struct Tree<'a> {
    pub plan: &'a Plan,
    pub zones: &'a [Zone],
    pub membership: &'a Membership,
    /// Tilted cells, trim budget and FFT threshold.
    pub cells: Cells<'a>,
    /// The count the free cells must make up (with the slack, when there is one).
    pub target: u64,
    /// The evidence's slack law (`Normaliser::slack`), convolved into the root's outside law.
    pub slack: Option<&'a Law>,
    /// Keep each leaf's whole range [target - cells, target] (the cell posterior's leave-one-out
    /// reads all of it) instead of the range its trimmed law needs.
    pub whole_leaves: bool,
    pub control: &'a Control,
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

impl Tree<'_> {
    /// Runs the pass, calling `finish(zone, own law, outside law)` at every leaf; results come
    /// in leaf order. The outside law is `None` when no outside count can reach the target.
    pub fn run<T: Send, F>(&self, finish: &F) -> Result<Vec<T>, EngineError>
    where
        F: Fn(usize, &Law, Option<&Law>) -> T + Sync,
    {
        let (built, outside) = rayon::join(
            || self.up(self.plan.root),
            || self.cells.law_of(&self.membership.outside),
        );
        let built = built?;
        let (lo, hi) = built.range();
        let outside = match self.slack {
            Some(slack) => convolve_range(&outside, slack, lo, hi, self.cells.fft_min),
            None => restrict(outside, lo, hi),
        }
        .map(|l| self.trimmed(l));
        self.down(built, outside, finish)
    }

    fn trimmed(&self, mut law: Law) -> Law {
        law.trim(self.cells.eps);
        law
    }

    /// The free cells assigned to `node` (for disjoint zones, a leaf's whole zone).
    fn assigned(&self, node: usize) -> &[CellIndex] {
        match (self.membership.by_zone, self.plan.nodes[node].zone) {
            (true, Some(z)) => self.zones[z].cells(),
            _ => &self.membership.assigned[node],
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
                let shared = &self.membership.shared[node];
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
                let (bl, br) = if n.weight >= PARALLEL_WEIGHT {
                    rayon::join(|| self.up(l), || self.up(r))
                } else {
                    (self.up(l), self.up(r))
                };
                let (bl, br) = (bl?, br?);
                let fft_min = self.cells.fft_min;
                let mut private = self.trimmed(convolve(bl.private(), br.private(), fft_min));
                if !self.assigned(node).is_empty() {
                    private = self.trimmed(convolve(&private, &own_cells, fft_min));
                }
                let d_of = |child: usize, sib: &Built| -> Option<Law> {
                    let f = &self.membership.fringe[child];
                    (!f.is_empty()).then(|| {
                        self.trimmed(convolve(sib.private(), &self.cells.law_of(f), fft_min))
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
        // Half of a node's planned cost is the way up, half the way down.
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
                let n = &self.plan.nodes[node];
                self.control.advance((n.cost / 2.0) as u64);
                let (a, b) = if n.weight >= PARALLEL_WEIGHT {
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

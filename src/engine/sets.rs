//! The law of the count over an arbitrary set of cells, built as a balanced product tree:
//! short runs of cells are folded in one at a time, then the runs are convolved pairwise.
//!
//! Pairwise convolution keeps every intermediate law as narrow as its own spread allows, so a
//! set of n cells with tilted variance v costs about n x 64 + log2(n / 64) x (c sqrt(v))^2
//! multiply-adds instead of the n x sqrt(v) of one long fold. Every node is trimmed to the
//! same mass budget; the number of nodes is `trims_for(n)`.

use super::law::{convolve, Law};
use super::model::CellIndex;
use super::tilt::{is_free, tilted};

/// Cells folded one at a time before pairwise convolution takes over: below this the law is
/// so narrow that a convolution costs more than the folds it replaces (common practice for
/// product trees; 64 measured within 10% of the best on W250k-partition).
pub(crate) const LEAF_CELLS: usize = 64;
/// Sets at least this large split their two halves across the compute pool.
const PARALLEL_CELLS: usize = 1 << 14;

/// What the kernels need to turn a raster index into a tilted Bernoulli cell.
#[derive(Clone, Copy)]
pub(crate) struct Cells<'a> {
    pub values: &'a [f64],
    pub t: f64,
    /// Mass each trim may drop.
    pub eps: f64,
    /// Laws at least this wide on both sides are convolved by FFT (`law::FFT_MIN_LEN`).
    pub fft_min: usize,
}

impl Cells<'_> {
    /// Law of the free cells among `cells` (raster indices).
    pub fn law_of(&self, cells: &[CellIndex]) -> Law {
        self.tree(cells.len(), &|i| cells[i].index(), 0, cells.len())
    }

    /// Law of the free cells in raster positions `[a, b)`.
    pub fn law_of_span(&self, a: usize, b: usize) -> Law {
        self.tree(b, &|i| i, a, b)
    }

    fn tree<F: Fn(usize) -> usize + Sync>(&self, len: usize, index: &F, a: usize, b: usize) -> Law {
        debug_assert!(b <= len);
        if b - a <= LEAF_CELLS {
            let mut law = Law::unit();
            law.add_cells((a..b).filter_map(|i| {
                let p = self.values[index(i)];
                is_free(p).then(|| tilted(p, self.t))
            }));
            law.trim(self.eps);
            return law;
        }
        let mid = a + (b - a) / 2;
        let (l, r) = if b - a >= PARALLEL_CELLS {
            rayon::join(
                || self.tree(len, index, a, mid),
                || self.tree(len, index, mid, b),
            )
        } else {
            (self.tree(len, index, a, mid), self.tree(len, index, mid, b))
        };
        let mut law = convolve(&l, &r, self.fft_min);
        law.trim(self.eps);
        law
    }
}

/// Number of trims a product tree over `n` positions performs (its node count).
pub(crate) fn trims_for(n: usize) -> u64 {
    let leaves = n.div_ceil(LEAF_CELLS).max(1) as u64;
    2 * leaves - 1
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn product_tree_matches_one_long_fold() {
        let values: Vec<f64> = (0..1000)
            .map(|i| ((i * 7919 % 997) as f64 + 0.5) / 1000.0)
            .collect();
        let cells = Cells {
            values: &values,
            t: 0.8,
            eps: 0.0,
            fft_min: usize::MAX,
        };
        let tree = cells.law_of_span(0, values.len());
        // reference: the plain one-cell-at-a-time fold (naive reference kept for this purpose)
        let mut fold = Law::unit();
        fold.add_cells(values.iter().map(|&p| tilted(p, 0.8)));
        assert!(
            tree.len() <= fold.len(),
            "trimming with budget 0 drops only exact zeros"
        );
        let peak = fold.values.iter().cloned().fold(0.0, f64::max);
        for k in 0..fold.len() as u64 {
            let (a, b) = (tree.at(k), fold.at(k));
            assert!(
                (a - b).abs() <= 1e-13 * peak + 1e-12 * b,
                "k {k}: {a} vs {b}"
            );
        }
        assert_eq!(trims_for(1000), 31);
    }
}

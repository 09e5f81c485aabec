//! The benchmark's baselines: plain ways of computing the same conditional pmfs, kept apart from
//! the engine so that they share nothing with it but the input types and the planner's tree.
//!
//! - (a) `one_cell_tree`: the engine's union tree walked top-down, with every law built by adding
//!   cells one at a time in the untilted world (raw p), each law kept on a fixed window of
//!   `WINDOW` values centred on its untilted mean. Single-threaded.
//! - (b) `per_zone_direct`: for one zone, the law of the cells outside it built one cell at a
//!   time (same window as (a)), then P(k) ~ L_S(k) O_S(m - k). Direct convolution of
//!   non-negative terms is tail-accurate, so on the sample it serves as the exact reference.
//! - (c) `FftDeconvolution`: the law of the rest recovered as IFFT(FFT(P_T) / FFT(P_S)). Its
//!   error is absolute (about eps times the peak, amplified by 1 / min |FFT(P_S)|), which is why
//!   the engine does not do this; the benchmark reports how bad it is.
//!
//! Worst cases: adding a cell costs O(min(cells + 1, WINDOW)); (a) costs one such addition per
//! cell per tree level, (b) one per raster cell per zone, (c) two transforms of the raster's
//! size per zone. Memory: (a) holds one sorted cell list per tree node (cells x depth u32s).

use std::sync::Arc;

use rustfft::num_complex::Complex;
use rustfft::{Fft, FftPlanner};

use crate::engine::{Plan, Raster, Zone};

/// Values kept by the windowed laws of baselines (a) and (b): 5,001, centred on the mean.
pub const WINDOW: usize = 5001;
/// Half-width of `WINDOW`.
pub const HALF_WINDOW: usize = WINDOW / 2;
/// Half-width meaning "keep the full support".
pub const FULL: usize = usize::MAX;

/// A pmf over count values `offset ..`.
#[derive(Clone, Debug, PartialEq)]
pub struct Pmf {
    pub offset: u64,
    pub values: Vec<f64>,
}

impl Pmf {
    /// P(N = k), zero outside the stored values.
    pub fn at(&self, k: u64) -> f64 {
        if k < self.offset {
            return 0.0;
        }
        self.values
            .get((k - self.offset) as usize)
            .copied()
            .unwrap_or(0.0)
    }

    /// Largest |P(k) - Q(k)| over all k; infinite when either holds a non-finite value.
    pub fn max_abs_diff(&self, offset: u64, values: &[f64]) -> f64 {
        let other = Pmf {
            offset,
            values: values.to_vec(),
        };
        let lo = self.offset.min(offset);
        let hi = (self.offset + self.values.len() as u64).max(offset + values.len() as u64);
        (lo..hi)
            .map(|k| {
                let d = (self.at(k) - other.at(k)).abs();
                if d.is_finite() {
                    d
                } else {
                    f64::INFINITY
                }
            })
            .fold(0.0, f64::max)
    }
}

/// The untilted law of a count over cells added one at a time, kept on a window of
/// 2 `half` + 1 values centred on the rounded running mean; everything outside is dropped.
#[derive(Clone, Debug)]
pub struct WindowLaw {
    lo: usize,
    values: Vec<f64>,
    mean: f64,
    half: usize,
    scratch: Vec<f64>,
}

impl WindowLaw {
    /// The law of no cells (N = 0 for certain) with the given window half-width.
    pub fn unit(half: usize) -> WindowLaw {
        WindowLaw {
            lo: 0,
            values: vec![1.0],
            mean: 0.0,
            half,
            scratch: Vec::new(),
        }
    }

    pub fn lo(&self) -> usize {
        self.lo
    }

    pub fn values(&self) -> &[f64] {
        &self.values
    }

    pub fn at(&self, k: usize) -> f64 {
        if k < self.lo {
            return 0.0;
        }
        self.values.get(k - self.lo).copied().unwrap_or(0.0)
    }

    /// Adds one Bernoulli(p) cell: new(j) = old(j) (1 - p) + old(j - 1) p on the new window.
    pub fn add(&mut self, p: f64) {
        let (q, r) = (p, 1.0 - p);
        let n = self.values.len();
        let (lo, hi) = (self.lo, self.lo + n - 1);
        self.mean += p;
        let (wlo, whi) = if self.half == FULL {
            (0, usize::MAX)
        } else {
            let c = self.mean.round() as usize;
            (c.saturating_sub(self.half), c.saturating_add(self.half))
        };
        // The window's centre moves by at most one per cell and starts inside the support, so
        // the new range is never empty.
        let (nlo, nhi) = (lo.max(wlo), (hi + 1).min(whi));
        let v = &self.values;
        let out = &mut self.scratch;
        out.clear();
        out.resize(nhi - nlo + 1, 0.0);
        if nlo == lo {
            out[0] = v[0] * r;
        }
        let (a, b) = (nlo.max(lo + 1), nhi.min(hi));
        if a <= b {
            let dst = &mut out[a - nlo..=b - nlo];
            for ((o, &x), &y) in dst
                .iter_mut()
                .zip(&v[a - lo..=b - lo])
                .zip(&v[a - 1 - lo..=b - 1 - lo])
            {
                *o = x * r + y * q;
            }
        }
        if nhi == hi + 1 {
            out[hi + 1 - nlo] = v[n - 1] * q;
        }
        std::mem::swap(&mut self.values, &mut self.scratch);
        self.lo = nlo;
    }

    /// Adds every cell in `cells` (raw indices into `values`), skipping nodata.
    pub fn add_cells(&mut self, values: &[f64], cells: impl IntoIterator<Item = u32>) {
        for c in cells {
            let p = values[c as usize];
            if !p.is_nan() {
                self.add(p);
            }
        }
    }
}

/// P(k) ~ L_S(k) O(m - k) over L_S's support, normalised to sum to one.
pub fn posterior(zone: &WindowLaw, outside: &WindowLaw, total: u64) -> Pmf {
    let m = total as usize;
    let values: Vec<f64> = zone
        .values()
        .iter()
        .enumerate()
        .map(|(i, &l)| {
            let k = zone.lo() + i;
            if k > m {
                0.0
            } else {
                l * outside.at(m - k)
            }
        })
        .collect();
    normalised(zone.lo() as u64, values)
}

fn normalised(offset: u64, mut values: Vec<f64>) -> Pmf {
    let s: f64 = values.iter().sum();
    if s != 0.0 {
        values.iter_mut().for_each(|v| *v /= s);
    }
    Pmf { offset, values }
}

/// Cells of sorted `a` not in sorted `b`.
fn difference<'a>(a: &'a [u32], b: &'a [u32]) -> impl Iterator<Item = u32> + 'a {
    let mut j = 0;
    a.iter().copied().filter(move |&x| {
        while j < b.len() && b[j] < x {
            j += 1;
        }
        j >= b.len() || b[j] != x
    })
}

/// Union of two sorted, duplicate-free lists.
fn union(a: &[u32], b: &[u32]) -> Vec<u32> {
    let mut out = Vec::with_capacity(a.len() + b.len());
    let (mut i, mut j) = (0, 0);
    while i < a.len() && j < b.len() {
        match a[i].cmp(&b[j]) {
            std::cmp::Ordering::Less => {
                out.push(a[i]);
                i += 1;
            }
            std::cmp::Ordering::Greater => {
                out.push(b[j]);
                j += 1;
            }
            std::cmp::Ordering::Equal => {
                out.push(a[i]);
                i += 1;
                j += 1;
            }
        }
    }
    out.extend_from_slice(&a[i..]);
    out.extend_from_slice(&b[j..]);
    out
}

/// Baseline (a): the conditional pmf of every zone from the plan's union tree, cells added one
/// at a time, windows of 2 `half` + 1 values, no tilting. Results in zone order.
pub fn one_cell_tree(
    plan: &Plan,
    raster: &Raster,
    zones: &[Zone],
    total: u64,
    half: usize,
) -> Vec<Pmf> {
    // Children come after their parent in `plan.nodes`, so a reverse sweep builds unions
    // bottom-up.
    let mut unions: Vec<Vec<u32>> = vec![Vec::new(); plan.nodes.len()];
    for i in (0..plan.nodes.len()).rev() {
        let node = &plan.nodes[i];
        unions[i] = match (node.children, node.zone) {
            (Some((l, r)), _) => union(&unions[l], &unions[r]),
            (None, Some(z)) => zones[z].indices().collect(),
            (None, None) => Vec::new(),
        };
    }
    let values = raster.values();
    let mut root = WindowLaw::unit(half);
    let all: Vec<u32> = (0..values.len() as u32).collect();
    root.add_cells(values, difference(&all, &unions[plan.root]));
    drop(all);
    let mut out: Vec<Option<Pmf>> = vec![None; zones.len()];
    let walk = Walk {
        plan,
        unions: &unions,
        values,
        zones,
        total,
        half,
    };
    walk.visit(plan.root, &root, &mut out);
    out.into_iter()
        .map(|p| p.expect("every zone is a leaf of the plan"))
        .collect()
}

struct Walk<'a> {
    plan: &'a Plan,
    unions: &'a [Vec<u32>],
    values: &'a [f64],
    zones: &'a [Zone],
    total: u64,
    half: usize,
}

impl Walk<'_> {
    fn visit(&self, node: usize, outside: &WindowLaw, out: &mut [Option<Pmf>]) {
        let n = &self.plan.nodes[node];
        if let Some((l, r)) = n.children {
            for (child, sibling) in [(l, r), (r, l)] {
                let mut o = outside.clone();
                o.add_cells(
                    self.values,
                    difference(&self.unions[sibling], &self.unions[child]),
                );
                self.visit(child, &o, out);
            }
        } else if let Some(z) = n.zone {
            let mut law = WindowLaw::unit(self.half);
            law.add_cells(self.values, self.zones[z].indices());
            out[z] = Some(posterior(&law, outside, self.total));
        }
    }
}

/// Baseline (b): one zone's conditional pmf by direct convolution over the cells outside it,
/// one cell at a time, windows of 2 `half` + 1 values, no tilting.
pub fn per_zone_direct<C: Copy + Into<u32>>(
    raster: &Raster,
    zone: &[C],
    total: u64,
    half: usize,
) -> Pmf {
    let values = raster.values();
    let mut outside = WindowLaw::unit(half);
    let mut j = 0;
    for (c, &p) in values.iter().enumerate() {
        while j < zone.len() && (zone[j].into() as usize) < c {
            j += 1;
        }
        if (j < zone.len() && zone[j].into() as usize == c) || p.is_nan() {
            continue;
        }
        outside.add(p);
    }
    let mut law = WindowLaw::unit(half);
    law.add_cells(values, zone.iter().map(|&c| c.into()));
    posterior(&law, &outside, total)
}

/// Baseline (c): FFT deconvolution of the law of the whole raster.
pub struct FftDeconvolution {
    len: usize,
    total_law: Vec<Complex<f64>>,
    forward: Arc<dyn Fft<f64>>,
    inverse: Arc<dyn Fft<f64>>,
    half: usize,
}

impl FftDeconvolution {
    /// Builds P_T one cell at a time (windows of 2 `half` + 1 values) and transforms it, on a
    /// power-of-two length above the number of cells, so circular convolution is linear.
    pub fn new(raster: &Raster, half: usize) -> FftDeconvolution {
        let values = raster.values();
        let len = (raster.stats().valid as usize + 1).next_power_of_two();
        let mut law = WindowLaw::unit(half);
        law.add_cells(values, 0..values.len() as u32);
        let mut planner = FftPlanner::new();
        let forward = planner.plan_fft_forward(len);
        let inverse = planner.plan_fft_inverse(len);
        let mut total_law = placed(&law, len);
        forward.process(&mut total_law);
        FftDeconvolution {
            len,
            total_law,
            forward,
            inverse,
            half,
        }
    }

    /// The zone's conditional pmf with P_{T\S} = IFFT(FFT(P_T) / FFT(P_S)).
    pub fn zone<C: Copy + Into<u32>>(&self, raster: &Raster, zone: &[C], total: u64) -> Pmf {
        let mut law = WindowLaw::unit(self.half);
        law.add_cells(raster.values(), zone.iter().map(|&c| c.into()));
        let mut buf = placed(&law, self.len);
        self.forward.process(&mut buf);
        for (b, t) in buf.iter_mut().zip(&self.total_law) {
            *b = t / *b;
        }
        self.inverse.process(&mut buf);
        let scale = 1.0 / self.len as f64;
        let m = total as usize;
        let values = law
            .values()
            .iter()
            .enumerate()
            .map(|(i, &l)| {
                let k = law.lo() + i;
                if k > m || m - k >= self.len {
                    0.0
                } else {
                    l * buf[m - k].re * scale
                }
            })
            .collect();
        normalised(law.lo() as u64, values)
    }
}

fn placed(law: &WindowLaw, len: usize) -> Vec<Complex<f64>> {
    let mut buf = vec![Complex::new(0.0, 0.0); len];
    for (i, &v) in law.values().iter().enumerate() {
        buf[law.lo() + i] = Complex::new(v, 0.0);
    }
    buf
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::bench::workload::{buffers, partition, Field, FIELD_SEED};
    use crate::engine::{self, reference};

    fn assert_close(got: &Pmf, want: &[f64], tol: f64, what: &str) {
        let d = got.max_abs_diff(0, want);
        assert!(d <= tol, "{what}: max abs diff {d:e} > {tol:e}");
    }

    /// A small heterogeneous raster from the benchmark's own field, with a nodata cell.
    fn small() -> Raster {
        let mut v: Vec<f64> = Field::new(FIELD_SEED).raster(7, 6).values().to_vec();
        // Raise the contrast so the conditional law differs visibly from the prior.
        for (i, p) in v.iter_mut().enumerate() {
            *p = (*p * (1.0 + (i % 5) as f64)).min(0.9);
        }
        v[10] = f64::NAN;
        Raster::from_probabilities(7, 6, v).unwrap()
    }

    #[test]
    fn differences_see_non_finite_values() {
        let p = Pmf {
            offset: 2,
            values: vec![0.5, 0.5],
        };
        assert_eq!(p.max_abs_diff(2, &[0.5, 0.5]), 0.0);
        assert_eq!(p.max_abs_diff(1, &[0.5, 0.5]), 0.5);
        assert_eq!(p.max_abs_diff(2, &[f64::NAN, 0.5]), f64::INFINITY);
    }

    #[test]
    fn window_law_matches_the_binomial() {
        // reference: closed form, Binomial(4, 1/4) = (81, 108, 54, 12, 1) / 256
        let mut l = WindowLaw::unit(FULL);
        (0..4).for_each(|_| l.add(0.25));
        let want = [81.0, 108.0, 54.0, 12.0, 1.0].map(|x| x / 256.0);
        assert_eq!(l.lo(), 0);
        for (g, w) in l.values().iter().zip(want) {
            assert!((g - w).abs() < 1e-16);
        }
        // A window of 2 x 2 + 1 values follows the mean: 40 cells of 1/2 end centred on 20.
        let mut w = WindowLaw::unit(2);
        (0..40).for_each(|_| w.add(0.5));
        assert_eq!((w.lo(), w.values().len()), (18, 5));
        // reference: closed form, Binomial(40, 1/2) has its peak C(40, 20) / 2^40 at 20; the
        // window drops mass, so the kept value is at most that.
        let peak = 137_846_528_820.0 / 2f64.powi(40);
        assert!(w.at(20) <= peak && w.at(20) > 0.5 * peak);
    }

    #[test]
    fn baselines_reproduce_the_lady_tasting_tea() {
        // reference: Fisher 1935, The Design of Experiments: 8 cups, 4 chosen, total 4 gives
        // P(4) = 1/70, P(3) = 16/70, P(2) = 36/70 (hypergeometric; any common p gives it).
        let r = Raster::from_probabilities(4, 2, vec![0.3; 8]).unwrap();
        let zones = vec![
            Zone::new("left", vec![0, 1, 4, 5], &r).unwrap(),
            Zone::new("right", vec![2, 3, 6, 7], &r).unwrap(),
        ];
        let want = [1.0, 16.0, 36.0, 16.0, 1.0].map(|x| x / 70.0);
        let plan = engine::plan(&r, &zones);
        let a = one_cell_tree(&plan, &r, &zones, 4, HALF_WINDOW);
        assert_close(&a[0], &want, 1e-15, "(a) left");
        assert_close(&a[1], &want, 1e-15, "(a) right");
        let b = per_zone_direct(&r, zones[0].cells(), 4, HALF_WINDOW);
        assert_close(&b, &want, 1e-15, "(b)");
        let c = FftDeconvolution::new(&r, HALF_WINDOW).zone(&r, zones[1].cells(), 4);
        assert_close(&c, &want, 1e-13, "(c)");
    }

    #[test]
    fn baselines_match_the_engine_reference_on_small_rasters() {
        let r = small();
        let valid: Vec<u32> = (0..42).filter(|&c| c != 10).collect();
        let mut zones = partition(&r, 3);
        // An overlapping zone and the whole raster as a zone.
        zones.push(Zone::new("wide", (0..21).filter(|&c| c != 10).collect(), &r).unwrap());
        zones.push(Zone::new("all", valid.clone(), &r).unwrap());
        let plan = engine::plan(&r, &zones);
        assert!(plan.overlapping);
        let fft = FftDeconvolution::new(&r, HALF_WINDOW);
        let mut prior = WindowLaw::unit(FULL);
        prior.add_cells(r.values(), 0..42);
        let mut fft_checked = 0;
        for total in [0, 1, 7, 15, 41] {
            let a = one_cell_tree(&plan, &r, &zones, total, HALF_WINDOW);
            for (z, az) in zones.iter().zip(&a) {
                // reference: engine::reference::conditional_pmf (naive tilted full convolution)
                let want = reference::conditional_pmf(&r, z.cells(), total).unwrap();
                assert_close(az, &want, 1e-14, &format!("(a) {} total {total}", z.id()));
                let b = per_zone_direct(&r, z.cells(), total, HALF_WINDOW);
                assert_close(&b, &want, 1e-14, &format!("(b) {} total {total}", z.id()));
                // FFT deconvolution is only absolutely accurate (about eps x peak), so it is
                // checked only where P_T(m) is not small and the zone is small enough for
                // FFT(P_S) to stay away from zero; elsewhere its error is unbounded.
                let c = fft.zone(&r, z.cells(), total);
                if z.len() <= 9 && prior.at(total as usize) > 1e-3 {
                    assert_close(&c, &want, 1e-9, &format!("(c) {} total {total}", z.id()));
                    fft_checked += 1;
                }
            }
        }
        assert!(fft_checked > 10, "(c) was checked on {fft_checked} zones");
    }

    #[test]
    fn one_cell_tree_handles_buffers_and_uncovered_cells() {
        let r = Field::new(FIELD_SEED).raster(30, 20);
        // Discs leave cells outside every zone: the root's outside law must hold them.
        let zones = buffers(&r, 6, 4, 7);
        let plan = engine::plan(&r, &zones);
        assert!(plan.covered < 600);
        let total = 30;
        let a = one_cell_tree(&plan, &r, &zones, total, HALF_WINDOW);
        for (z, az) in zones.iter().zip(&a) {
            // reference: engine::reference::conditional_pmf (naive tilted full convolution)
            let want = reference::conditional_pmf(&r, z.cells(), total).unwrap();
            assert_close(az, &want, 1e-14, z.id());
        }
    }
}

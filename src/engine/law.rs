//! Truncated probability laws of counts and the kernels that combine them.
//!
//! A `Law` holds P(N = lo), P(N = lo + 1), ... for a count N over a set of independent cells in the
//! tilted world. Every kernel here only adds and multiplies non-negative numbers and drops whole
//! entries, so in exact arithmetic each stored value is a lower bound of the true one; `dropped`
//! bounds the L1 mass lost, and `rounding` counts the floating-point operations along the longest
//! dependency chain, so each stored value is within a relative `gamma(rounding)` of its exact
//! counterpart (Higham, Accuracy and Stability of Numerical Algorithms, 2nd ed., Lemma 3.1 and 3.3).
//!
//! Worst cases: `add_cells` is O(cells x width), `convolve` O(len_a x len_b), `convolve_range`
//! O(range x len_b); memory is the output only.

use super::rounding::{ROUNDINGS_PER_CELL, UNIT_ROUNDOFF};

/// out[i] += s * x[i]: the inner loop of every convolution. Uses fused multiply-add on x86-64
/// processors that have it (detected at run time; one rounding instead of two, so the rounding
/// counts stay valid), plain multiply-add elsewhere.
#[inline]
fn axpy(out: &mut [f64], s: f64, x: &[f64]) {
    #[cfg(target_arch = "x86_64")]
    {
        if std::arch::is_x86_feature_detected!("fma") && std::arch::is_x86_feature_detected!("avx2")
        {
            // SAFETY: the features this function is compiled for were just detected.
            unsafe { axpy_fma(out, s, x) };
            return;
        }
    }
    for (o, &v) in out.iter_mut().zip(x) {
        *o += s * v;
    }
}

#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx2,fma")]
unsafe fn axpy_fma(out: &mut [f64], s: f64, x: &[f64]) {
    for (o, &v) in out.iter_mut().zip(x) {
        *o = s.mul_add(v, *o);
    }
}

/// out[i] = a[i] * r + b[i] * q: one Bernoulli fold step, dispatched like `axpy`.
#[inline]
fn fold_step(out: &mut [f64], a: &[f64], b: &[f64], r: f64, q: f64) {
    #[cfg(target_arch = "x86_64")]
    {
        if std::arch::is_x86_feature_detected!("fma") && std::arch::is_x86_feature_detected!("avx2")
        {
            // SAFETY: the features this function is compiled for were just detected.
            unsafe { fold_step_fma(out, a, b, r, q) };
            return;
        }
    }
    for ((o, &x), &y) in out.iter_mut().zip(a).zip(b) {
        *o = x * r + y * q;
    }
}

#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx2,fma")]
unsafe fn fold_step_fma(out: &mut [f64], a: &[f64], b: &[f64], r: f64, q: f64) {
    for ((o, &x), &y) in out.iter_mut().zip(a).zip(b) {
        *o = x.mul_add(r, y * q);
    }
}

#[derive(Clone, Debug, PartialEq)]
pub(crate) struct Law {
    /// Count value of `values[0]`.
    pub lo: u64,
    pub values: Vec<f64>,
    /// Upper bound on the L1 mass lost to trimming, in this law and every law it was built from.
    pub dropped: f64,
    /// Roundings along the longest dependency chain of any value.
    pub rounding: u64,
    /// Bound on the absolute error any value carries from FFT convolutions (zero when every
    /// step was direct).
    pub abs_err: f64,
}

impl Law {
    /// The law of an empty set of cells: N = 0 for certain.
    pub fn unit() -> Law {
        Law {
            lo: 0,
            values: vec![1.0],
            dropped: 0.0,
            rounding: 0,
            abs_err: 0.0,
        }
    }

    /// Largest count value held.
    pub fn hi(&self) -> u64 {
        self.lo + self.values.len() as u64 - 1
    }

    pub fn len(&self) -> usize {
        self.values.len()
    }

    /// P(N = k), zero outside the stored window.
    pub fn at(&self, k: u64) -> f64 {
        if k < self.lo {
            return 0.0;
        }
        self.values
            .get((k - self.lo) as usize)
            .copied()
            .unwrap_or(0.0)
    }

    /// Folds in independent Bernoulli cells, given as (q, 1 - q) pairs, one at a time.
    /// Ping-pongs between two buffers so the inner loop vectorises.
    pub fn add_cells(&mut self, cells: impl IntoIterator<Item = (f64, f64)>) {
        let mut scratch = Vec::with_capacity(self.values.len() + 64);
        let mut added = 0u64;
        for (q, r) in cells {
            let v = &self.values;
            let n = v.len();
            scratch.clear();
            scratch.resize(n + 1, 0.0);
            scratch[0] = v[0] * r;
            fold_step(&mut scratch[1..n], &v[1..], &v[..n - 1], r, q);
            scratch[n] = v[n - 1] * q;
            std::mem::swap(&mut self.values, &mut scratch);
            added += 1;
        }
        self.rounding += ROUNDINGS_PER_CELL * added;
    }

    /// Drops entries from both ends, smallest end first, while the mass dropped stays within
    /// `budget`. Keeps at least one entry.
    pub fn trim(&mut self, budget: f64) {
        let v = &self.values;
        let (mut l, mut r) = (0usize, v.len());
        let mut acc = 0.0f64;
        while r - l > 1 {
            let (vl, vr) = (v[l], v[r - 1]);
            if vl <= vr {
                if acc + vl > budget {
                    break;
                }
                acc += vl;
                l += 1;
            } else {
                if acc + vr > budget {
                    break;
                }
                acc += vr;
                r -= 1;
            }
        }
        if l == 0 && r == v.len() {
            return;
        }
        let dropped_len = (v.len() - (r - l)) as f64;
        self.values.truncate(r);
        self.values.drain(..l);
        self.lo += l as u64;
        // The running sum of dropped values has relative error below len * u.
        self.dropped += acc * (1.0 + 2.0 * dropped_len * UNIT_ROUNDOFF);
    }
}

/// Laws at least this wide on both sides are convolved by FFT: O(n log n) against the direct
/// O(n^2), which it beats from about 500 entries on these machines (measured on W250k-partition
/// top levels); below, direct convolution keeps its relative accuracy in the tails.
pub(crate) const FFT_MIN_LEN: usize = 768;

/// Slack on mass when propagating absolute errors: computed laws hold at most 1 + len u of mass.
const MASS_SLACK: f64 = 1.0 + 1e-9;

/// The law of the sum of two independent counts: FFT when both are at least `fft_min` wide,
/// direct otherwise.
pub(crate) fn convolve(a: &Law, b: &Law, fft_min: usize) -> Law {
    if a.len().min(b.len()) >= fft_min {
        let (values, err) = super::fft::convolve(&a.values, &b.values);
        return Law {
            lo: a.lo + b.lo,
            values,
            dropped: a.dropped + b.dropped,
            rounding: a.rounding + b.rounding,
            abs_err: (a.abs_err + b.abs_err) * MASS_SLACK + err,
        };
    }
    convolve_direct(a, b)
}

fn convolve_direct(a: &Law, b: &Law) -> Law {
    let (short, long) = if a.len() <= b.len() { (a, b) } else { (b, a) };
    let mut out = vec![0.0; a.len() + b.len() - 1];
    let ll = long.len();
    for (i, &s) in short.values.iter().enumerate() {
        if s == 0.0 {
            continue;
        }
        axpy(&mut out[i..i + ll], s, &long.values);
    }
    Law {
        lo: a.lo + b.lo,
        values: out,
        dropped: a.dropped + b.dropped,
        rounding: a.rounding + b.rounding + short.len() as u64,
        abs_err: (a.abs_err + b.abs_err) * MASS_SLACK,
    }
}

/// The convolution of `a` and `b`, computed only for count values in `[lo, hi]`.
/// Returns `None` when the range is empty or misses the support entirely.
pub(crate) fn convolve_range(a: &Law, b: &Law, lo: u64, hi: u64, fft_min: usize) -> Option<Law> {
    let lo = lo.max(a.lo + b.lo);
    let hi = hi.min(a.hi() + b.hi());
    if lo > hi {
        return None;
    }
    if a.len().min(b.len()) >= fft_min {
        return restrict(convolve(a, b, fft_min), lo, hi);
    }
    let width = (hi - lo + 1) as usize;
    let mut out = vec![0.0; width];
    let la = a.len() as u64;
    for (i, &bv) in b.values.iter().enumerate() {
        if bv == 0.0 {
            continue;
        }
        // Output j = a.lo + ia + b.lo + i for ia in [0, la).
        let base = a.lo + b.lo + i as u64;
        let j0 = lo.max(base);
        let j1 = hi.min(base + la - 1);
        if j0 > j1 {
            continue;
        }
        let ia0 = (j0 - base) as usize;
        let n = (j1 - j0 + 1) as usize;
        let o0 = (j0 - lo) as usize;
        axpy(&mut out[o0..o0 + n], bv, &a.values[ia0..ia0 + n]);
    }
    Some(Law {
        lo,
        values: out,
        dropped: a.dropped + b.dropped,
        rounding: a.rounding + b.rounding + a.len().min(b.len()) as u64,
        abs_err: (a.abs_err + b.abs_err) * MASS_SLACK,
    })
}

/// Restricts a law to count values in `[lo, hi]` without computing anything new.
/// Values outside are simply not kept; callers account for them through the normaliser.
pub(crate) fn restrict(law: Law, lo: u64, hi: u64) -> Option<Law> {
    let lo2 = lo.max(law.lo);
    let hi2 = hi.min(law.hi());
    if lo2 > hi2 {
        return None;
    }
    if lo2 == law.lo && hi2 == law.hi() {
        return Some(law);
    }
    let start = (lo2 - law.lo) as usize;
    let end = (hi2 - law.lo) as usize + 1;
    Some(Law {
        lo: lo2,
        values: law.values[start..end].to_vec(),
        ..law
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    fn bern(q: f64) -> Law {
        let mut l = Law::unit();
        l.add_cells([(q, 1.0 - q)]);
        l
    }

    #[test]
    fn add_cells_matches_closed_binomial() {
        // reference: closed form, Binomial(3, 1/2) = (1, 3, 3, 1) / 8
        let mut l = Law::unit();
        l.add_cells([(0.5, 0.5); 3]);
        assert_eq!(l.values, vec![0.125, 0.375, 0.375, 0.125]);
        assert_eq!(l.rounding, 3 * ROUNDINGS_PER_CELL);
    }

    #[test]
    fn convolve_and_range_agree() {
        let mut a = Law::unit();
        a.add_cells([(0.3, 0.7), (0.6, 0.4), (0.1, 0.9)]);
        let mut b = Law::unit();
        b.add_cells([(0.2, 0.8), (0.9, 0.1)]);
        let full = convolve(&a, &b, usize::MAX);
        let by_fft = convolve(&a, &b, 1);
        for k in 0..=5 {
            // reference: the direct convolution, within the FFT's own error bound
            assert!((full.at(k) - by_fft.at(k)).abs() <= by_fft.abs_err, "k {k}");
        }
        assert!(by_fft.abs_err > 0.0 && by_fft.abs_err < 1e-13);
        // reference: the same cells folded one at a time
        let mut one = Law::unit();
        one.add_cells([(0.3, 0.7), (0.6, 0.4), (0.1, 0.9), (0.2, 0.8), (0.9, 0.1)]);
        for k in 0..=5 {
            assert!((full.at(k) - one.at(k)).abs() < 1e-16);
        }
        let part = convolve_range(&a, &b, 2, 4, usize::MAX).unwrap();
        assert_eq!(part.lo, 2);
        for k in 2..=4 {
            assert!((part.at(k) - full.at(k)).abs() < 1e-16);
        }
        assert!(convolve_range(&a, &b, 6, 9, usize::MAX).is_none());
        let c = convolve(&bern(0.25), &bern(0.5), usize::MAX);
        assert_eq!(c.values, vec![0.375, 0.5, 0.125]);
    }

    #[test]
    fn trim_drops_small_ends_within_budget() {
        let mut l = Law {
            lo: 10,
            values: vec![1e-20, 1e-9, 0.5, 0.5 - 2e-9, 1e-9, 1e-19],
            dropped: 0.0,
            rounding: 0,
            abs_err: 0.0,
        };
        l.trim(1e-18);
        assert_eq!(l.lo, 11);
        assert_eq!(l.len(), 4);
        assert!(l.dropped >= 1e-20 + 1e-19 && l.dropped < 1.2e-19);
        l.trim(0.0);
        assert_eq!(l.len(), 4);
    }
}

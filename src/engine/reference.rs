//! Naive references kept only to check the fast paths (the way an O(n^2) DFT checks an FFT).
//!
//! `conditional_pmf` folds every cell in one at a time over the full support: exact up to
//! rounding, tail-accurate, O(cells^2) time. It shares no code with the union-tree executor
//! except the raster type; even its tilt is found by its own plain bisection.

use super::law::Law;
use super::model::Raster;

/// Tilted (q, 1 - q) by a plain formula, independent of `tilt::tilted`.
fn pair(p: f64, t: f64) -> (f64, f64) {
    let odds = p / (1.0 - p) * t;
    (odds / (1.0 + odds), 1.0 / (1.0 + odds))
}

/// P(N_S = k | N_T = total) for k = 0 ..= |zone|, or `None` when the total is impossible.
/// `zone` holds row-major cell indices (plain or as `CellIndex`).
pub fn conditional_pmf<C: Copy + Into<u32>>(
    raster: &Raster,
    zone: &[C],
    total: u64,
) -> Option<Vec<f64>> {
    let values = raster.values();
    let mut inside = vec![false; values.len()];
    for &c in zone {
        inside[c.into() as usize] = true;
    }
    let (mut ones_in, mut ones_out) = (0u64, 0u64);
    let (mut free_in, mut free_out) = (Vec::new(), Vec::new());
    for (i, &p) in values.iter().enumerate() {
        if p.is_nan() || p == 0.0 {
            continue;
        }
        match (p >= 1.0, inside[i]) {
            (true, true) => ones_in += 1,
            (true, false) => ones_out += 1,
            (false, true) => free_in.push(p),
            (false, false) => free_out.push(p),
        }
    }
    let ones = ones_in + ones_out;
    let free = (free_in.len() + free_out.len()) as u64;
    if total < ones || total > ones + free {
        return None;
    }
    let target = total - ones;
    // Bisection on log t for sum q = target (any t gives the same conditional law).
    let t = if target == 0 || target == free {
        1.0
    } else {
        let (mut lo, mut hi) = (-745.0f64, 709.0f64);
        for _ in 0..200 {
            let mid = 0.5 * (lo + hi);
            let s: f64 = free_in
                .iter()
                .chain(&free_out)
                .map(|&p| pair(p, mid.exp()).0)
                .sum();
            if s < target as f64 {
                lo = mid;
            } else {
                hi = mid;
            }
        }
        (0.5 * (lo + hi)).exp()
    };
    let fold = |ps: &[f64]| {
        let mut law = Law::unit();
        let mut next = Vec::with_capacity(ps.len() + 1);
        for &p in ps {
            let (q, r) = if target == 0 {
                (0.0, 1.0)
            } else if target == free {
                (1.0, 0.0)
            } else {
                pair(p, t)
            };
            next.clear();
            next.resize(law.values.len() + 1, 0.0);
            for (j, &x) in law.values.iter().enumerate() {
                next[j] += x * r;
                next[j + 1] += x * q;
            }
            std::mem::swap(&mut law.values, &mut next);
        }
        law
    };
    let lin = fold(&free_in);
    let lout = fold(&free_out);
    let n = zone.len();
    let mut g = vec![0.0; n + 1];
    for (k, gk) in g.iter_mut().enumerate() {
        let k = k as u64;
        if k < ones_in || k - ones_in > free_in.len() as u64 || target + ones_in < k {
            continue;
        }
        let rest = target + ones_in - k;
        *gk = lin.at(k - ones_in) * lout.at(rest);
    }
    let z: f64 = g.iter().sum();
    if z <= 0.0 {
        return None;
    }
    Some(g.into_iter().map(|x| x / z).collect())
}

//! Exponential tilting (Chen, Dempster & Liu 1994, Biometrika 81:457-469).
//!
//! Multiplying every cell's odds p/(1-p) by one constant t = e^theta leaves the law of the cells
//! given their total unchanged. We pick theta so that the tilted probabilities q sum to the
//! observed total: the total's tilted law then peaks there and nothing underflows, even for a
//! total far in the prior's tail. Any theta gives the same conditional law, so the solve only
//! needs to be close; its accuracy affects window widths, never results.

use rayon::prelude::*;

/// Bound on |theta|: e^700 is finite in f64 and already tilts any p >= 1e-300 past 1/2.
const THETA_LIMIT: f64 = 700.0;
/// Newton stops when the tilted mean is this many tilted sd (plus a little) from the target.
const MEAN_SLACK_SD: f64 = 1e-3;
const MAX_ITERATIONS: usize = 200;
/// Cells per parallel chunk in the moment sums.
const CHUNK: usize = 1 << 16;

/// The tilted pair (q, 1 - q) of a probability 0 < p < 1 under odds factor t (0 < t < inf).
#[inline]
pub(crate) fn tilted(p: f64, t: f64) -> (f64, f64) {
    let a = p * t;
    let b = 1.0 - p;
    let s = a + b;
    (a / s, b / s)
}

/// A free cell: a probability strictly between 0 and 1 (not nodata, not fixed).
#[inline]
pub(crate) fn is_free(p: f64) -> bool {
    p > 0.0 && p < 1.0
}

#[derive(Clone, Copy, Debug, PartialEq)]
pub(crate) struct Tilt {
    pub theta: f64,
    /// e^theta
    pub t: f64,
    /// Sum of q over free cells at the solution.
    pub mean: f64,
    /// Sum of q(1 - q): the tilted variance of the free total.
    pub var: f64,
    /// Sum of ln(1 - p + p t) over free cells: ln of the tilting's normalising constant.
    pub log_c: f64,
}

fn moments(values: &[f64], t: f64) -> (f64, f64, f64) {
    values
        .par_chunks(CHUNK)
        .map(|chunk| {
            let (mut m, mut v, mut c) = (0.0, 0.0, 0.0);
            for &p in chunk {
                if is_free(p) {
                    let (q, r) = tilted(p, t);
                    m += q;
                    v += q * r;
                    c += (p * (t - 1.0)).ln_1p();
                }
            }
            (m, v, c)
        })
        .reduce(|| (0.0, 0.0, 0.0), |a, b| (a.0 + b.0, a.1 + b.1, a.2 + b.2))
}

/// Solves sum q_i(theta) = target over the free cells, 0 < target < free (the target need not
/// be a whole number). Newton's method with a bisection fallback inside a maintained bracket.
pub(crate) fn solve(values: &[f64], free: u64, prior_mean: f64, target: f64) -> Tilt {
    debug_assert!(target > 0.0 && target < free as f64);
    let m = target;
    let n = free as f64;
    let logit = |x: f64| (x / (n - x)).ln();
    let mut theta =
        (logit(m) - logit(prior_mean.clamp(1e-300, n - 1e-9))).clamp(-THETA_LIMIT, THETA_LIMIT);
    let (mut lo, mut hi) = (-THETA_LIMIT, THETA_LIMIT);
    let mut best = None;
    for _ in 0..MAX_ITERATIONS {
        let t = theta.exp();
        let (mean, var, log_c) = moments(values, t);
        let tilt = Tilt {
            theta,
            t,
            mean,
            var,
            log_c,
        };
        best = Some(tilt);
        let f = mean - m;
        if f.abs() <= MEAN_SLACK_SD * var.sqrt() + 1e-9 * m.max(1.0) {
            break;
        }
        if f < 0.0 {
            lo = theta;
        } else {
            hi = theta;
        }
        let newton = theta - f / var.max(f64::MIN_POSITIVE);
        theta = if newton.is_finite() && newton > lo && newton < hi {
            newton
        } else {
            0.5 * (lo + hi)
        };
        if hi - lo < 1e-15 * theta.abs().max(1.0) {
            break;
        }
    }
    best.expect("at least one iteration runs")
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn tilting_reaches_the_target_mean() {
        let values: Vec<f64> = (0..1000)
            .map(|i| 0.001 + 0.3 * ((i * 37 % 101) as f64 / 101.0))
            .collect();
        let prior: f64 = values.iter().sum();
        for target in [1u64, 20, 150, 400, 999] {
            let tilt = solve(&values, 1000, prior, target as f64);
            assert!(
                (tilt.mean - target as f64).abs() <= 1e-3 * tilt.var.sqrt() + 1e-6,
                "target {target}: mean {}",
                tilt.mean
            );
        }
    }

    #[test]
    fn tilted_pairs_sum_to_one_and_keep_odds_ratio() {
        // reference: closed form, odds(q) = t * odds(p)
        let (q, r) = tilted(0.2, 3.0);
        assert!((q + r - 1.0).abs() < 1e-16);
        assert!((q / r - 3.0 * 0.25).abs() < 1e-15);
    }
}

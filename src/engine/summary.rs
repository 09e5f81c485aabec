//! Summaries of one zone's conditional pmf: moments, mode, median, interval, exceedance.
//!
//! Definitions (fixed by the API): mode is the smallest k on ties; median the smallest k with
//! CDF >= 1/2; the equal-tailed interval at level l runs from the smallest k with
//! CDF >= (1-l)/2 to the smallest k with CDF >= (1+l)/2; exceedance is P(N >= k), summed from
//! the far tail so small probabilities keep their relative accuracy.

/// The equal-tailed credible interval.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct Interval {
    pub level: f64,
    pub lower: u64,
    pub upper: u64,
}

/// Everything reported for one zone.
#[derive(Clone, Debug, PartialEq)]
pub struct ZoneSummary {
    pub id: String,
    /// Number of cells in the zone.
    pub cells: usize,
    /// Count value of `pmf[0]`.
    pub offset: u64,
    /// The conditional pmf over `offset ..`; empty when the request asked for no pmf.
    pub pmf: Vec<f64>,
    pub mean: f64,
    pub sd: f64,
    pub mode: u64,
    pub median: u64,
    pub interval: Interval,
    /// (k, P(N >= k)) for each requested threshold.
    pub exceedance: Vec<(u64, f64)>,
    pub prior_mean: f64,
    pub prior_sd: f64,
    /// Certified upper bound on the L1 distance between the reported and the exact pmf.
    pub error_bound: f64,
}

impl ZoneSummary {
    /// The summary of a zone with no valid cell (all nodata, or outside the raster): its count
    /// is 0 for certain, whatever the evidence, and nothing was truncated.
    pub fn certain_zero(id: String, settings: &crate::engine::Settings) -> ZoneSummary {
        let pmf = vec![1.0];
        let s = summarise(0, &pmf, settings.level(), settings.thresholds());
        ZoneSummary {
            id,
            cells: 0,
            offset: 0,
            pmf: if settings.pmf() { pmf } else { Vec::new() },
            mean: s.mean,
            sd: s.sd,
            mode: s.mode,
            median: s.median,
            interval: s.interval,
            exceedance: s.exceedance,
            prior_mean: 0.0,
            prior_sd: 0.0,
            error_bound: 0.0,
        }
    }
}

/// The summaries of one pmf.
#[derive(Clone, Debug, PartialEq)]
pub struct Summary {
    pub mean: f64,
    pub sd: f64,
    pub mode: u64,
    pub median: u64,
    pub interval: Interval,
    /// (k, P(N >= k)) for each threshold.
    pub exceedance: Vec<(u64, f64)>,
}

/// Summarises a pmf over `offset ..` that sums to one.
pub fn summarise(offset: u64, pmf: &[f64], level: f64, thresholds: &[u64]) -> Summary {
    let mean_rel: f64 = pmf.iter().enumerate().map(|(i, &p)| i as f64 * p).sum();
    let var: f64 = pmf
        .iter()
        .enumerate()
        .map(|(i, &p)| (i as f64 - mean_rel).powi(2) * p)
        .sum();
    let mut mode = 0;
    for (i, &p) in pmf.iter().enumerate() {
        if p > pmf[mode] {
            mode = i;
        }
    }
    let mut cdf = Vec::with_capacity(pmf.len());
    let mut acc = 0.0;
    for &p in pmf {
        acc += p;
        cdf.push(acc);
    }
    let quantile = |target: f64| -> u64 {
        let i = cdf
            .iter()
            .position(|&c| c >= target)
            .unwrap_or(pmf.len() - 1);
        offset + i as u64
    };
    let median = quantile(0.5);
    let interval = Interval {
        level,
        lower: quantile((1.0 - level) / 2.0),
        upper: quantile((1.0 + level) / 2.0),
    };
    // suffix[i] = sum of pmf[i..], accumulated from the far end.
    let mut suffix = vec![0.0; pmf.len() + 1];
    for i in (0..pmf.len()).rev() {
        suffix[i] = suffix[i + 1] + pmf[i];
    }
    let exceedance = thresholds
        .iter()
        .map(|&k| {
            let p = if k <= offset {
                suffix[0]
            } else {
                suffix.get((k - offset) as usize).copied().unwrap_or(0.0)
            };
            (k, p.min(1.0))
        })
        .collect();
    Summary {
        mean: offset as f64 + mean_rel,
        sd: var.sqrt(),
        mode: offset + mode as u64,
        median,
        interval,
        exceedance,
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn summaries_of_a_small_pmf() {
        // reference: closed form, Binomial(4, 1/2) = (1, 4, 6, 4, 1) / 16 shifted by 3
        let pmf = [1.0 / 16.0, 4.0 / 16.0, 6.0 / 16.0, 4.0 / 16.0, 1.0 / 16.0];
        let Summary {
            mean,
            sd,
            mode,
            median,
            interval,
            exceedance: exc,
        } = summarise(3, &pmf, 0.8, &[0, 3, 4, 7, 8, 100]);
        assert!((mean - 5.0).abs() < 1e-15);
        assert!((sd - 1.0).abs() < 1e-15);
        assert_eq!((mode, median), (5, 5));
        // CDF: 1/16, 5/16, 11/16, 15/16, 1; (1-0.8)/2 = 0.1 -> k = 4; (1+0.8)/2 = 0.9 -> k = 6
        assert_eq!((interval.lower, interval.upper), (4, 6));
        let want = [
            (0, 1.0),
            (3, 1.0),
            (4, 15.0 / 16.0),
            (7, 1.0 / 16.0),
            (8, 0.0),
            (100, 0.0),
        ];
        for ((k, p), (wk, wp)) in exc.iter().zip(want) {
            assert_eq!(*k, wk);
            assert!((p - wp).abs() < 1e-15, "k {k}: {p} vs {wp}");
        }
    }

    #[test]
    fn mode_takes_the_smallest_on_ties() {
        let Summary { mode, median, .. } = summarise(0, &[0.25, 0.25, 0.25, 0.25], 0.5, &[]);
        assert_eq!(mode, 0);
        // reference: closed form, CDF(1) = 0.5 reaches 1/2 first at k = 1
        assert_eq!(median, 1);
    }
}

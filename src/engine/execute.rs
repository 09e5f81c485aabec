//! The executor: every zone's conditional law from one shared pass over the union tree, with the
//! retry loop that widens the windows when a zone measurably lost more than the tolerance.
//!
//! The pass itself lives in `tree`, the membership it reads in `membership`, the bound in
//! `certify`; this module chooses the FFT threshold, the trimming budget and the number of
//! attempts, and turns each leaf's numerators into a summary.
//!
//! Worst case: the tree pass's (see `tree`) times `MAX_ATTEMPTS`; a retry happens only when a
//! zone's measured truncation exceeds the tolerance, which the budget makes rare.

use rayon::prelude::*;

use super::certify::{budget, certify, numerators, trims_of, Sum};
use super::control::Control;
use super::error::EngineError;
use super::law::FFT_MIN_LEN;
use super::membership::Membership;
use super::model::{Raster, Settings, Zone};
use super::normaliser::{Normaliser, Regime};
use super::plan::Plan;
use super::sets::Cells;
use super::summary::{summarise, Summary, ZoneSummary};
use super::tilt::{is_free, tilted, Tilt};
use super::tree::Tree;

/// Each retry divides the trimming budget by this.
const RETRY_FACTOR: f64 = 1e-4;
/// Attempts in all: the first, and two retries, each 1e-4 tighter; a zone still short after that
/// keeps its (certified, larger) bound.
const MAX_ATTEMPTS: usize = 3;
/// Largest share of the total's tilted variance a zone may hold for FFT to be used at all.
const TAIL_SHARE: f64 = 1.0 / 16.0;

/// What one leaf of the pass leaves for the summaries.
struct LeafResult {
    zone: usize,
    /// Count value of `g[0]`.
    lo: u64,
    /// The numerators g(k) = L(k) O(target - k).
    g: Vec<f64>,
    /// Their computed sum.
    sum: f64,
    /// The certified L1 bound of g / sum.
    bound: f64,
    /// What the windows measurably lost (for the retry decision).
    measured: f64,
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
            .filter(|&&c| values[c.index()] >= 1.0)
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
                            .filter(|&&c| values[c.index()] > 0.0)
                            .count() as u64
                    } else {
                        ones(z)
                    };
                    summary_of(raster, z, k, vec![1.0], settings, 0.0)
                })
                .collect());
        }
    };
    let membership = Membership::of(plan, raster, zones);
    control.check()?;
    let fft_min = if tail_sensitive(zones, values, &tilt) {
        usize::MAX
    } else {
        fft_min
    };
    let trims = trims_of(plan, zones, membership.outside.len());
    let mut eps = budget(settings.tolerance(), trims);
    let target = normaliser.target;
    let mut attempt = 0;
    loop {
        attempt += 1;
        let tree = Tree {
            plan,
            zones,
            membership: &membership,
            cells: Cells {
                values,
                t: tilt.t,
                eps,
                fft_min,
            },
            target,
            slack: normaliser.slack.as_ref(),
            whole_leaves: false,
            control,
        };
        let results = tree.run(&|zone, own, outside| {
            let n = numerators(own, outside, target);
            let sum: f64 = n.g.iter().sum();
            let c = certify(
                normaliser,
                &Sum {
                    s: sum,
                    rounding: n.rounding,
                    len: n.g.len(),
                    fft: n.fft,
                    dropped: n.dropped,
                },
            );
            LeafResult {
                zone,
                lo: n.lo,
                g: n.g,
                sum,
                bound: c.bound,
                measured: c.measured,
            }
        })?;
        let worst = results.iter().map(|r| r.measured).fold(0.0, f64::max);
        if worst > settings.tolerance() && attempt < MAX_ATTEMPTS {
            eps *= RETRY_FACTOR;
            continue;
        }
        return Ok(summaries(raster, zones, results, settings, &ones));
    }
}

/// One summary per zone, in the zones' order, from the leaves' results (in leaf order).
fn summaries(
    raster: &Raster,
    zones: &[Zone],
    results: Vec<LeafResult>,
    settings: &Settings,
    ones: &(dyn Fn(&Zone) -> u64 + Sync),
) -> Vec<ZoneSummary> {
    let mut out: Vec<Option<ZoneSummary>> = vec![None; zones.len()];
    let summaries: Vec<(usize, ZoneSummary)> = results
        .into_par_iter()
        .map(|r| {
            let z = &zones[r.zone];
            let (offset, pmf) = normalised(r.lo, r.g, r.sum);
            (
                r.zone,
                summary_of(raster, z, offset + ones(z), pmf, settings, r.bound),
            )
        })
        .collect();
    for (zone, s) in summaries {
        out[zone] = Some(s);
    }
    out.into_iter()
        .map(|s| s.expect("the plan has one leaf per zone"))
        .collect()
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
            .map(|&c| values[c.index()])
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

pub(crate) fn summary_of(
    raster: &Raster,
    z: &Zone,
    offset: u64,
    pmf: Vec<f64>,
    settings: &Settings,
    bound: f64,
) -> ZoneSummary {
    let Summary {
        mean,
        sd,
        mode,
        median,
        interval,
        exceedance,
    } = summarise(offset, &pmf, settings.level(), settings.thresholds());
    let (mut pm, mut pv) = (0.0, 0.0);
    for &c in z.cells() {
        let p = raster.values()[c.index()];
        pm += p;
        pv += p * (1.0 - p);
    }
    ZoneSummary {
        id: z.id().to_string(),
        cells: z.len(),
        offset,
        pmf: if settings.pmf() { pmf } else { Vec::new() },
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

#[cfg(test)]
pub(crate) mod tests {
    use super::*;
    use crate::engine::model::CellIndex;
    use crate::engine::plan::plan;
    use crate::engine::posterior::cell_posterior;
    use crate::engine::reference::conditional_pmf;
    use rand::{Rng, SeedableRng};
    use rand_chacha::ChaCha8Rng;

    pub(crate) fn random_raster(rng: &mut ChaCha8Rng, w: u32, h: u32, special: bool) -> Raster {
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
            .filter(|&c| r.get(CellIndex(c)).is_some())
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
        let settings = Settings::new(0.9, Vec::new(), tolerance, true).unwrap();
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
            let dup = Zone::new("dup", zones[0].indices().collect(), &r).unwrap();
            zones.push(dup);
            let st = r.stats();
            let total = (st.sum_p + 1.5 * st.sum_var.sqrt()).round() as u64;
            check(&r, &zones, total.min(st.certain + st.free), 1e-13);
            check(&r, &zones, total.min(st.certain + st.free), 1e-6);
        }
    }

    #[test]
    fn progress_is_reported_and_cancellation_stops_the_work() {
        let mut rng = ChaCha8Rng::seed_from_u64(17);
        let r = random_raster(&mut rng, 40, 30, false);
        let zones = random_zones(&mut rng, &r, 12, false);
        let st = r.stats();
        let total = st.sum_p.round() as u64;
        let control = Control::new();
        let norm = Normaliser::new(&r, total, &control).unwrap();
        let p = plan(&r, &zones);
        execute(&p, &r, &zones, &norm, &Settings::default(), &control).unwrap();
        assert!(control.progress() > 0.3, "progress {}", control.progress());
        let cancelled = Control::new();
        cancelled.cancel();
        let got = execute(&p, &r, &zones, &norm, &Settings::default(), &cancelled);
        assert_eq!(got, Err(EngineError::Cancelled));
        let cells = cell_posterior(&r, None, &norm, &Settings::default(), &cancelled);
        assert_eq!(cells, Err(EngineError::Cancelled));
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
}

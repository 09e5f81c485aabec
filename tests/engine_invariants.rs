//! Seeded property tests of the engine: invariants that hold for every raster, zone and total,
//! checked on many random inputs (ChaCha with fixed seeds, so every run sees the same cases).
//!
//! The distance checks compare with `engine::reference::conditional_pmf`, the naive one-cell-at-
//! a-time fold. That reference is f64 too: its own rounding is bounded below (`reference_error`)
//! and allowed for, so a reported `error_bound` is held to what it certifies, no more.

mod engine_support;

use engine_support::*;
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use zonetally::engine::{
    self, reference, Control, EngineError, Normaliser, Raster, Settings, Zone, ZoneSummary,
};

/// Higham's gamma_k = k u / (1 - k u).
fn gamma(k: usize) -> f64 {
    let ku = k as f64 * U;
    ku / (1.0 - ku)
}

/// Worst-case L1 rounding error of `reference::conditional_pmf` on a raster of `n` valid cells:
/// each tilted (q, 1 - q) costs 3 roundings, each fold a multiply-add (2), so every unnormalised
/// value is within gamma(5n) relative; the product of the zone and outside laws and the division
/// by their sum add 3 more, and normalising doubles the L1 error of the sum
/// (Higham, Accuracy and Stability of Numerical Algorithms, 2nd ed., Lemma 3.1).
fn reference_error(n: usize) -> f64 {
    2.0 * gamma(5 * n + 4)
}

/// The accuracy contract against the f64 reference: within `ABS_TOL` (and `REL_TOL` relative
/// above `REL_FLOOR`) of the exact value, where the reference itself may be off by a relative
/// `reference_error(n)`.
fn assert_contract(got: f64, want: f64, n: usize, what: &str) {
    let slack = reference_error(n) * want;
    let diff = (got - want).abs();
    assert!(
        diff <= ABS_TOL + slack,
        "{what}: reported {got:e}, reference {want:e}, |diff| {diff:e} > {ABS_TOL:e} + {slack:e}"
    );
    if want >= REL_FLOOR {
        assert!(
            diff <= REL_TOL * want + slack,
            "{what}: reported {got:e}, reference {want:e}, relative {:e}",
            diff / want
        );
    }
}

/// Runs `f` on a two-thread rayon pool, the way callers run the engine.
fn on_pool<T: Send>(f: impl FnOnce() -> T + Send) -> T {
    rayon::ThreadPoolBuilder::new()
        .num_threads(2)
        .build()
        .unwrap()
        .install(f)
}

/// Sizes of the random rasters: 1, 2, small primes, a few hundred and a few thousand cells.
const SHAPES: [(u32, u32); 13] = [
    (1, 1),
    (2, 1),
    (3, 1),
    (5, 1),
    (7, 1),
    (13, 1),
    (31, 1),
    (97, 1),
    (20, 10),
    (211, 1),
    (2003, 1),
    (60, 50),
    (3001, 1),
];

/// A random case: raster, zones (random sizes, overlapping freely), and a possible total.
fn random_case(rng: &mut ChaCha8Rng, w: u32, h: u32) -> Option<(Raster, Vec<Zone>, u64)> {
    let special = if rng.gen_bool(0.5) {
        Special::each(0.05)
    } else {
        Special::NONE
    };
    let (lo, hi) = if rng.gen_bool(0.5) {
        (0.0005, 0.4)
    } else {
        (0.01, 0.99)
    };
    let raster = random_raster(rng, w, h, (lo, hi), special);
    let valid = raster.stats().valid as usize;
    if valid == 0 {
        return None;
    }
    let count = rng.gen_range(1..=6);
    let zones: Vec<Zone> = (0..count)
        .map(|i| {
            let n = match rng.gen_range(0..4) {
                0 => 1,
                1 => valid,
                _ => rng.gen_range(1..=valid),
            };
            random_zone(rng, &format!("z{i}"), &raster, n)
        })
        .collect();
    let stats = *raster.stats();
    let (lo_m, hi_m) = (stats.certain, stats.certain + stats.free);
    let mean = stats.sum_p;
    let sd = stats.sum_var.sqrt();
    let total = match rng.gen_range(0..5) {
        0 => lo_m,
        1 => hi_m,
        _ => {
            let z: f64 = rng.gen_range(-3.0..3.0);
            ((mean + z * sd).round().max(lo_m as f64) as u64).min(hi_m)
        }
    };
    Some((raster, zones, total))
}

/// The distance, sum and bound checks for one zone summary.
fn check_against_reference(
    raster: &Raster,
    zone: &Zone,
    total: u64,
    s: &ZoneSummary,
    tolerance: f64,
    what: &str,
) {
    let n = zone.len();
    let got = dense_pmf(s.offset, &s.pmf, n);
    let mass: f64 = got.iter().sum();
    // The reported pmf's mass differs from the exact 1 by at most its L1 error, plus the
    // rounding of this sum (n + 1 terms).
    let sum_tol = s.error_bound + gamma(n + 1);
    assert!(
        (mass - 1.0).abs() <= sum_tol,
        "{what}: pmf sums to {mass} (|1 - sum| {:e} > bound {:e} + rounding)",
        (mass - 1.0).abs(),
        s.error_bound
    );
    assert!(
        s.error_bound >= 0.0 && s.error_bound.is_finite(),
        "{what}: error_bound {}",
        s.error_bound
    );
    let want = reference::conditional_pmf(raster, zone.cells(), total).expect("possible total");
    let dist = l1(&got, &want);
    let allowed = s.error_bound + reference_error(raster.stats().valid as usize);
    assert!(
        dist <= allowed,
        "{what}: L1 distance to the reference {dist:e} exceeds error_bound {:e} + reference rounding {:e}",
        s.error_bound,
        reference_error(raster.stats().valid as usize)
    );
    if tolerance <= ABS_TOL {
        for (k, (g, r)) in got.iter().zip(&want).enumerate() {
            assert_contract(
                *g,
                *r,
                raster.stats().valid as usize,
                &format!("{what}: P(N = {k})"),
            );
        }
    }
}

#[test]
fn pmfs_sum_to_one_and_bounds_hold() {
    // reference: engine::reference::conditional_pmf (naive fold), on seeded random cases
    let mut rng = ChaCha8Rng::seed_from_u64(20261201);
    let mut checked = 0;
    for round in 0..12 {
        for &(w, h) in &SHAPES {
            if round > 0 && w * h > 500 {
                continue; // the large shapes once: the naive reference is O(cells^2) per zone
            }
            let Some((raster, zones, total)) = random_case(&mut rng, w, h) else {
                continue;
            };
            for tolerance in [1e-13, 1e-6, 1e-4] {
                let settings = Settings::new(0.9, vec![1, 5], tolerance, true).unwrap();
                let ev = on_pool(|| {
                    engine::evaluate(&raster, &zones, total, &settings, &Control::new())
                })
                .unwrap();
                assert_eq!(ev.zones.len(), zones.len());
                for (z, s) in zones.iter().zip(&ev.zones) {
                    assert_eq!(z.id(), s.id);
                    assert_eq!(z.len(), s.cells);
                    let what = format!(
                        "{w}x{h}, total {total}, tolerance {tolerance:e}, zone {} ({} cells)",
                        z.id(),
                        z.len()
                    );
                    check_against_reference(&raster, z, total, s, tolerance, &what);
                    checked += 1;
                }
            }
        }
    }
    eprintln!("{checked} zone results checked against the reference");
    assert!(checked > 100, "only {checked} zone results checked");
}

#[test]
fn partition_means_sum_to_the_total() {
    let mut rng = ChaCha8Rng::seed_from_u64(7);
    for &(w, h) in &SHAPES {
        for _ in 0..2 {
            let raster = random_raster(&mut rng, w, h, (0.0005, 0.6), Special::each(0.05));
            let mut cells = valid_cells(&raster);
            if cells.is_empty() {
                continue;
            }
            // Shuffle, then cut into random pieces.
            for i in (1..cells.len()).rev() {
                cells.swap(i, rng.gen_range(0..=i));
            }
            let mut zones = Vec::new();
            let mut rest = &cells[..];
            while !rest.is_empty() {
                let n = rng.gen_range(1..=rest.len().min(1 + cells.len() / 3));
                zones.push(
                    Zone::new(format!("part{}", zones.len()), rest[..n].to_vec(), &raster).unwrap(),
                );
                rest = &rest[n..];
            }
            let stats = *raster.stats();
            let total = ((stats.sum_p + 1.5 * stats.sum_var.sqrt()).round() as u64)
                .clamp(stats.certain, stats.certain + stats.free);
            let ev = on_pool(|| {
                engine::evaluate(
                    &raster,
                    &zones,
                    total,
                    &Settings::default(),
                    &Control::new(),
                )
            })
            .unwrap();
            // reference: closed form, sum over a partition of E[N_S | N_T = m] = m
            let sum: f64 = ev.zones.iter().map(|z| z.mean).sum();
            // A zone's mean is off by at most |S| times its pmf's L1 error, plus the rounding of
            // its own sum (gamma(|S|) of the mean) and of this sum over zones.
            let tol: f64 = ev
                .zones
                .iter()
                .map(|z| z.cells as f64 * z.error_bound + gamma(z.cells + 1) * z.mean)
                .sum::<f64>()
                + gamma(ev.zones.len()) * total as f64;
            assert!(
                (sum - total as f64).abs() <= tol,
                "{w}x{h}, {} zones, total {total}: means sum to {sum}, |diff| {:e} > {tol:e}",
                zones.len(),
                (sum - total as f64).abs()
            );
        }
    }
}

/// logistic(logit p + c), keeping p = 0 and p = 1 where they are.
fn shift(p: f64, c: f64) -> f64 {
    if p == 0.0 || p == 1.0 || p.is_nan() {
        return p;
    }
    let x = (p / (1.0 - p)).ln() + c;
    1.0 / (1.0 + (-x).exp())
}

#[test]
fn log_odds_shift_leaves_conditional_results_unchanged() {
    // reference: closed form; P(N_S = k | N_T = m) depends on the odds only through their
    // products over m cells, so scaling every odds by e^c cancels (Chen, Dempster & Liu 1994).
    let mut rng = ChaCha8Rng::seed_from_u64(42);
    for &(w, h) in &SHAPES {
        let Some((raster, zones, total)) = random_case(&mut rng, w, h) else {
            continue;
        };
        for c in [-3.0, -0.7, 1.5, 4.0] {
            let shifted_values: Vec<f64> = raster.values().iter().map(|&p| shift(p, c)).collect();
            let shifted = Raster::from_probabilities(w, h, shifted_values).unwrap();
            let zones2: Vec<Zone> = zones
                .iter()
                .map(|z| Zone::new(z.id(), z.indices().collect(), &shifted).unwrap())
                .collect();
            let settings =
                Settings::new(0.9, vec![1, 3, 10], engine::DEFAULT_TOLERANCE, true).unwrap();
            let a =
                on_pool(|| engine::evaluate(&raster, &zones, total, &settings, &Control::new()))
                    .unwrap();
            let b =
                on_pool(|| engine::evaluate(&shifted, &zones2, total, &settings, &Control::new()))
                    .unwrap();
            // The shifted p are f64 roundings of the shifted values: each odds is off by a relative
            // (6 + |logit p + c|) u <= 16 u, so each configuration weight (a product of m odds) by
            // 16 m u, and the normalised pmf by 32 m u in L1.
            let input = 32.0 * total as f64 * U;
            for (x, y) in a.zones.iter().zip(&b.zones) {
                let n = x.cells;
                let what = format!(
                    "{w}x{h}, total {total}, shift {c}, zone {} ({n} cells)",
                    x.id
                );
                let px = dense_pmf(x.offset, &x.pmf, n);
                let py = dense_pmf(y.offset, &y.pmf, n);
                let allowed = x.error_bound + y.error_bound + input;
                let d = l1(&px, &py);
                assert!(
                    d <= allowed,
                    "{what}: pmfs differ by {d:e} in L1 > {allowed:e}"
                );
                let mean_tol = n as f64 * allowed + gamma(n + 1) * (x.mean + y.mean);
                assert!(
                    (x.mean - y.mean).abs() <= mean_tol,
                    "{what}: mean {} vs {}",
                    x.mean,
                    y.mean
                );
                let var_tol = (n * n) as f64 * allowed + gamma(n + 2) * (n * n) as f64;
                assert!(
                    (x.sd * x.sd - y.sd * y.sd).abs() <= var_tol,
                    "{what}: sd {} vs {}",
                    x.sd,
                    y.sd
                );
                for (&(k1, e1), &(k2, e2)) in x.exceedance.iter().zip(&y.exceedance) {
                    assert_eq!(k1, k2);
                    assert!(
                        (e1 - e2).abs() <= allowed,
                        "{what}: P(N >= {k1}) {e1} vs {e2}"
                    );
                }
            }
        }
    }
}

#[test]
fn overlapping_and_duplicate_zones_agree_with_zones_alone() {
    let mut rng = ChaCha8Rng::seed_from_u64(99);
    for &(w, h) in &[(13u32, 1u32), (20, 10), (211, 1), (50, 40)] {
        let raster = random_raster(&mut rng, w, h, (0.0005, 0.4), Special::each(0.02));
        let cells = valid_cells(&raster);
        let n = cells.len();
        let a: Vec<u32> = cells[..(n / 2).max(1)].to_vec();
        let b: Vec<u32> = cells[n / 4..(3 * n / 4).max(n / 4 + 1)].to_vec();
        let c: Vec<u32> = a.iter().step_by(3).copied().collect();
        let zones = vec![
            Zone::new("a", a.clone(), &raster).unwrap(),
            Zone::new("b-overlaps-a", b, &raster).unwrap(),
            Zone::new("a-again", a.clone(), &raster).unwrap(),
            Zone::new("c-inside-a", c, &raster).unwrap(),
            Zone::new("everything", cells.clone(), &raster).unwrap(),
        ];
        let stats = *raster.stats();
        let total = (stats.sum_p.round() as u64).clamp(stats.certain, stats.certain + stats.free);
        let together = on_pool(|| {
            engine::evaluate(
                &raster,
                &zones,
                total,
                &Settings::default(),
                &Control::new(),
            )
        })
        .unwrap();
        let same = |x: &ZoneSummary, y: &ZoneSummary, what: &str| {
            let px = dense_pmf(x.offset, &x.pmf, x.cells);
            let py = dense_pmf(y.offset, &y.pmf, y.cells);
            let d = l1(&px, &py);
            assert!(
                d <= x.error_bound + y.error_bound,
                "{what}: pmfs differ by {d:e} in L1"
            );
            assert_eq!(
                (x.cells, x.prior_mean, x.prior_sd),
                (y.cells, y.prior_mean, y.prior_sd),
                "{what}"
            );
            // Discrete summaries match unless the CDF ties a threshold to within the bounds.
            let slack = x.error_bound + y.error_bound + gamma(x.cells + 1);
            for (name, qx, qy, t) in [
                ("median", x.median, y.median, 0.5),
                ("lower", x.interval.lower, y.interval.lower, 0.05),
                ("upper", x.interval.upper, y.interval.upper, 0.95),
            ] {
                assert!(
                    qx == qy || quantile_ok(&px, t, slack, qy),
                    "{what}: {name} {qx} vs {qy}"
                );
            }
        };
        same(
            &together.zones[0],
            &together.zones[2],
            &format!("{w}x{h}: zone a and its duplicate"),
        );
        // Each zone alone gives what it gives among the others.
        for (i, z) in zones.iter().enumerate() {
            let alone = on_pool(|| {
                engine::evaluate(
                    &raster,
                    std::slice::from_ref(z),
                    total,
                    &Settings::default(),
                    &Control::new(),
                )
            })
            .unwrap();
            same(
                &together.zones[i],
                &alone.zones[0],
                &format!("{w}x{h}: zone {} alone and together", z.id()),
            );
            check_against_reference(
                &raster,
                z,
                total,
                &together.zones[i],
                ABS_TOL,
                &format!("{w}x{h}: zone {}", z.id()),
            );
        }
        // reference: closed form; the zone of every valid cell holds exactly the total
        let all = &together.zones[4];
        let pall = dense_pmf(all.offset, &all.pmf, all.cells);
        assert!((pall[total as usize] - 1.0).abs() <= all.error_bound + gamma(2));
        assert_eq!((all.mode, all.median), (total, total));
    }
}

#[test]
fn a_total_eight_sd_from_the_mean_works() {
    let mut rng = ChaCha8Rng::seed_from_u64(8);
    let raster = random_raster(&mut rng, 60, 50, (0.0005, 0.4), Special::NONE);
    let stats = *raster.stats();
    let sd = stats.sum_var.sqrt();
    let zones: Vec<Zone> = (0..4)
        .map(|i| {
            let cells: Vec<u32> = (0..3000).filter(|c| c % 4 == i).collect();
            Zone::new(format!("q{i}"), cells, &raster).unwrap()
        })
        .chain([random_zone(&mut rng, "scattered", &raster, 250)])
        .collect();
    for z8 in [8.0, -8.0] {
        let total = (stats.sum_p + z8 * sd).round() as u64;
        let ev = on_pool(|| {
            engine::evaluate(
                &raster,
                &zones,
                total,
                &Settings::default(),
                &Control::new(),
            )
        })
        .unwrap();
        let check = &ev.total;
        assert_eq!(check.observed, Some(total));
        let z = check.z_score.unwrap();
        assert!(
            (z - z8).abs() <= 0.5 / sd + 1e-12,
            "z-score {z} for {z8} sd"
        );
        // reference: closed form (normal approximation, from memory): an 8 sd tail is about 6e-16,
        // far below the 1e-6 warning threshold, so the warning must be set.
        assert!(check.warning.is_some(), "no warning at {z8} sd: {check:?}");
        let tail = if z8 > 0.0 {
            check.p_at_least
        } else {
            check.p_at_most
        };
        assert!(tail > 0.0 && tail < 1e-10, "tail {tail:e} at {z8} sd");
        assert!(check.log_likelihood.is_finite() && check.log_likelihood < -20.0);
        for (zone, s) in zones.iter().zip(&ev.zones) {
            check_against_reference(
                &raster,
                zone,
                total,
                s,
                ABS_TOL,
                &format!("{z8} sd, zone {}", zone.id()),
            );
        }
        let sum: f64 = ev.zones[..4].iter().map(|z| z.mean).sum();
        let tol: f64 = ev.zones[..4]
            .iter()
            .map(|z| z.cells as f64 * z.error_bound + gamma(z.cells + 1) * z.mean)
            .sum();
        assert!(
            (sum - total as f64).abs() <= tol + 1e-12,
            "means sum to {sum}, total {total}"
        );
    }
}

#[test]
fn impossible_totals_and_empty_zone_lists_are_specific_errors() {
    let raster = Raster::new(
        3,
        2,
        vec![Some(1.0), Some(1.0), Some(0.0), Some(0.3), None, Some(0.6)],
    )
    .unwrap();
    let zone = Zone::new("z", vec![0, 3], &raster).unwrap();
    let settings = Settings::default();
    // Two cells have p = 1, four have p > 0: totals 0, 1 and 5 are impossible.
    for total in [0, 1, 5, 1000] {
        let err = engine::evaluate(
            &raster,
            std::slice::from_ref(&zone),
            total,
            &settings,
            &Control::new(),
        )
        .unwrap_err();
        assert!(
            matches!(err, EngineError::ImpossibleTotal(_)),
            "total {total}: {err:?}"
        );
        assert!(
            err.to_string().contains(&total.to_string()),
            "message names the total: {err}"
        );
        let err = Normaliser::new(&raster, total, &Control::new()).unwrap_err();
        assert!(
            matches!(err, EngineError::ImpossibleTotal(_)),
            "total {total}: {err:?}"
        );
    }
    for total in 2..=4 {
        engine::evaluate(
            &raster,
            std::slice::from_ref(&zone),
            total,
            &settings,
            &Control::new(),
        )
        .unwrap();
    }
    let err = engine::evaluate(&raster, &[], 3, &settings, &Control::new()).unwrap_err();
    assert!(matches!(err, EngineError::NothingToDo(_)), "{err:?}");
    // Zones are checked at construction.
    for (cells, what) in [
        (vec![], "empty"),
        (vec![6], "outside"),
        (vec![4], "nodata"),
        (vec![0, 0], "twice"),
    ] {
        let err = Zone::new("bad", cells, &raster).unwrap_err();
        assert!(
            matches!(err, EngineError::InvalidZone { .. }),
            "{what}: {err:?}"
        );
    }
    // The binary: exit code 2 and a message naming the field.
    let values = vec![Some(1.0), Some(1.0), Some(0.0), Some(0.3), None, Some(0.6)];
    let (code, _, err) = run_eval(&request_json(3, 2, &values, &[("z", vec![0, 3])], 5, &[]));
    assert_eq!(code, 2, "impossible total: {err}");
    assert!(
        err.contains("/evidence/total") && err.contains('5'),
        "{err}"
    );
    let (code, _, err) = run_eval(&request_json(3, 2, &values, &[], 3, &[]));
    assert_eq!(code, 2, "empty zone list: {err}");
    assert!(err.contains("/zones"), "{err}");
}

#[test]
fn cell_posterior_matches_singleton_zones() {
    // reference: engine::reference::conditional_pmf on the singleton zone {cell}, P(N = 1)
    let mut rng = ChaCha8Rng::seed_from_u64(5);
    for &(w, h) in &SHAPES {
        let Some((raster, _, total)) = random_case(&mut rng, w, h) else {
            continue;
        };
        let norm = Normaliser::new(&raster, total, &Control::new()).unwrap();
        // The naive reference costs O(cells^2) per cell: check every cell of small rasters and
        // an evenly spread sample of about 60 on the larger ones.
        let cells = valid_cells(&raster);
        let stride = cells.len().div_ceil(60).max(1);
        let wanted: std::collections::HashMap<u32, f64> = cells
            .iter()
            .step_by(stride)
            .map(|&c| {
                (
                    c,
                    reference::conditional_pmf(&raster, &[c], total).unwrap()[1],
                )
            })
            .collect();
        for tolerance in [1e-13, 1e-6, 1e-4] {
            let settings = Settings::new(0.9, vec![], tolerance, true).unwrap();
            let all = on_pool(|| {
                engine::cell_posterior(&raster, None, &norm, &settings, &Control::new())
            })
            .unwrap();
            assert_eq!(all.cells.len(), cells.len());
            let allowed = all.error_bound + reference_error(cells.len());
            let mut sum = 0.0;
            for &(c, prior, post) in &all.cells {
                assert_eq!(prior, raster.values()[c as usize]);
                sum += post;
                let Some(&want) = wanted.get(&c) else {
                    continue;
                };
                assert!(
                (post - want).abs() <= allowed,
                "{w}x{h}, total {total}, cell {c} (p = {prior}): posterior {post}, reference {want}, bound {:e}",
                all.error_bound
            );
                // The accuracy target: `tolerance` per value (the contract at the default).
                let what = format!("{w}x{h}, total {total}, tolerance {tolerance:e}, cell {c} (p = {prior}): posterior");
                if tolerance <= ABS_TOL {
                    assert_contract(post, want, cells.len(), &what);
                } else {
                    let slack = reference_error(cells.len()) * want;
                    assert!(
                        (post - want).abs() <= tolerance + slack,
                        "{what}: reported {post}, reference {want}"
                    );
                }
            }
            // reference: closed form, the posteriors of all cells sum to the observed total
            // Each posterior is within the contract of its exact value.
            let tol = cells.len() as f64 * (tolerance.max(ABS_TOL) + reference_error(cells.len()))
                + gamma(cells.len()) * total as f64;
            assert!(
                (sum - total as f64).abs() <= tol,
                "{w}x{h}: posteriors sum to {sum}, total {total}"
            );
            // A listed subset, in a given order with a repeat, gives the same numbers.
            let mut listed: Vec<u32> = cells.iter().rev().step_by(2).copied().collect();
            listed.push(cells[0]);
            let some =
                engine::cell_posterior(&raster, Some(&listed), &norm, &settings, &Control::new())
                    .unwrap();
            for (&c, &(c2, _, post)) in listed.iter().zip(&some.cells) {
                assert_eq!(c, c2);
                let Some(&want) = wanted.get(&c) else {
                    continue;
                };
                assert!(
                    (post - want).abs() <= some.error_bound + reference_error(cells.len()),
                    "listed cell {c}"
                );
            }
        }
    }
}

#[test]
fn cell_posterior_of_three_fair_cells_with_one_event() {
    // reference: closed form; by symmetry each of three exchangeable cells holds the one event
    // with probability 1/3
    let raster = Raster::from_probabilities(3, 1, vec![0.5; 3]).unwrap();
    let norm = Normaliser::new(&raster, 1, &Control::new()).unwrap();
    let post = engine::cell_posterior(&raster, None, &norm, &Settings::default(), &Control::new())
        .unwrap();
    for &(c, _, p) in &post.cells {
        assert_prob(p, 1.0 / 3.0, &format!("cell {c}"));
    }
    // reference: closed form; two cells p = 0.1 and 0.3, one event: 0.07/0.34 and 0.27/0.34
    let raster = Raster::from_probabilities(2, 1, vec![0.1, 0.3]).unwrap();
    let norm = Normaliser::new(&raster, 1, &Control::new()).unwrap();
    let post = engine::cell_posterior(&raster, None, &norm, &Settings::default(), &Control::new())
        .unwrap();
    let want = [
        0.1 * 0.7 / (0.1 * 0.7 + 0.9 * 0.3),
        0.9 * 0.3 / (0.1 * 0.7 + 0.9 * 0.3),
    ];
    for (&(c, _, p), w) in post.cells.iter().zip(want) {
        assert_prob(p, w, &format!("cell {c}"));
    }
}

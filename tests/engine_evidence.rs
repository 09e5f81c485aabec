//! Evidence other than one exact total, checked by identities on seeded random rasters: each
//! form against the exact-total engine and against the other forms it is a case of.
//!
//! The exact rational references for every form are in `engine_exact_rationals.rs`; mpmath's
//! 60-digit references on a few hundred cells in `reference/check.py`.

mod engine_support;

use engine_support::*;
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use statrs::distribution::{Binomial, Discrete};
use zonetally::engine::{self, Control, Evidence, Normaliser, Raster, Settings, Zone, ZoneSummary};

fn run(raster: &Raster, zones: &[Zone], evidence: &Evidence) -> (Normaliser, Vec<ZoneSummary>) {
    let control = Control::new();
    let settings = Settings::new(0.9, vec![2, 5], 1e-13, true).unwrap();
    let n = Normaliser::of(raster, evidence, &control).unwrap();
    let plan = engine::plan(raster, zones);
    let got = engine::execute(&plan, raster, zones, &n, &settings, &control).unwrap();
    (n, got)
}

/// The L1 distance of two zone results must be within their two bounds.
fn same(a: &[ZoneSummary], b: &[ZoneSummary], what: &str) {
    for (x, y) in a.iter().zip(b) {
        let n = x.cells;
        let d = l1(
            &dense_pmf(x.offset, &x.pmf, n),
            &dense_pmf(y.offset, &y.pmf, n),
        );
        let allowed = x.error_bound + y.error_bound + 1e-15;
        assert!(
            d <= allowed,
            "{what}, zone {}: L1 {d:e} > {allowed:e}",
            x.id
        );
    }
}

/// A seeded raster with some cells p = 0, p = 1 and nodata, and zones: a partition of all
/// valid cells (the last zone takes the rest) plus an overlapping one.
fn case(seed: u64, w: u32, h: u32) -> (Raster, Vec<Zone>, Vec<Zone>) {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let raster = random_raster(&mut rng, w, h, (0.01, 0.45), Special::each(0.03));
    let cells = valid_cells(&raster);
    let parts = 5;
    let mut groups: Vec<Vec<u32>> = vec![Vec::new(); parts];
    for &c in &cells {
        groups[rng.gen_range(0..parts)].push(c);
    }
    let partition: Vec<Zone> = groups
        .into_iter()
        .enumerate()
        .filter(|(_, g)| !g.is_empty())
        .map(|(i, g)| Zone::new(format!("p{i}"), g, &raster).unwrap())
        .collect();
    let mut zones = partition.clone();
    zones.push(random_zone(&mut rng, "overlap", &raster, cells.len() / 3));
    (raster, partition, zones)
}

const CASES: [(u64, u32, u32); 4] = [(1, 12, 10), (2, 30, 20), (3, 41, 17), (4, 60, 50)];

#[test]
fn degenerate_forms_equal_the_exact_total() {
    for (seed, w, h) in CASES {
        let (raster, _, zones) = case(seed, w, h);
        let m = raster.stats().sum_p.round() as u64;
        let (_, exact) = run(&raster, &zones, &Evidence::exact_total(m, &raster).unwrap());
        // reference: identity, a range of width zero is that total
        let (_, r) = run(&raster, &zones, &Evidence::range(m, m, &raster).unwrap());
        same(&exact, &r, &format!("seed {seed}: range [{m}, {m}]"));
        // reference: identity, detection 1 finds every event
        let (_, d) = run(
            &raster,
            &zones,
            &Evidence::detected(m, 1.0, &raster).unwrap(),
        );
        same(&exact, &d, &format!("seed {seed}: {m} detected at 1"));
        // reference: identity, a likelihood that is positive at m only
        let l = Evidence::likelihood(m - 2, vec![0.0, 0.0, 0.4, 0.0], &raster).unwrap();
        let (_, l) = run(&raster, &zones, &l);
        same(&exact, &l, &format!("seed {seed}: likelihood at {m} only"));
    }
}

#[test]
fn each_form_equals_its_likelihood_form() {
    for (seed, w, h) in CASES {
        let (raster, _, zones) = case(seed, w, h);
        let st = *raster.stats();
        let (mean, sd) = (st.sum_p, st.sum_var.sqrt());
        let a = (mean - sd).max(st.certain as f64) as u64;
        let b = (mean + 2.0 * sd) as u64;
        let (_, r) = run(&raster, &zones, &Evidence::range(a, b, &raster).unwrap());
        // reference: identity, a range is the 0/1 likelihood marking it
        let ones = vec![1.0; (b - a + 1) as usize];
        let (_, l) = run(
            &raster,
            &zones,
            &Evidence::likelihood(a, ones, &raster).unwrap(),
        );
        same(&r, &l, &format!("seed {seed}: range [{a}, {b}]"));
        let detected = (0.8 * mean).round() as u64;
        let (_, d) = run(
            &raster,
            &zones,
            &Evidence::detected(detected, 0.8, &raster).unwrap(),
        );
        // reference: statrs::distribution::Binomial, w(m) = Binomial(detected; m, 0.8)
        let hi = st.certain + st.free;
        let values: Vec<f64> = (detected..=hi)
            .map(|m| Binomial::new(0.8, m).unwrap().pmf(detected))
            .collect();
        let (_, l) = run(
            &raster,
            &zones,
            &Evidence::likelihood(detected, values, &raster).unwrap(),
        );
        // statrs's pmf carries its own rounding (about 1e-14 relative through ln-gamma), which
        // moves the mixture by twice that in L1.
        for (x, y) in d.iter().zip(&l) {
            let n = x.cells;
            let dist = l1(
                &dense_pmf(x.offset, &x.pmf, n),
                &dense_pmf(y.offset, &y.pmf, n),
            );
            assert!(
                dist <= x.error_bound + y.error_bound + 1e-12,
                "seed {seed}: {detected} detected at 0.8 vs its binomial likelihood, zone {}: {dist:e}",
                x.id
            );
        }
    }
}

#[test]
fn the_mixture_is_the_weighted_sum_of_exact_total_runs() {
    for (seed, w, h) in CASES {
        let (raster, partition, zones) = case(seed, w, h);
        let st = *raster.stats();
        let (mean, sd) = (st.sum_p, st.sum_var.sqrt());
        let a = (mean + 0.5 * sd) as u64;
        let b = a + 12;
        let evidence = Evidence::range(a, b, &raster).unwrap();
        let (n, got) = run(&raster, &zones, &evidence);
        // The posterior of the total from the exact-total normalisers' ln P(total = m):
        // reference: identity, P(m | range) = P(total = m) / sum over the range
        let logs: Vec<f64> = (a..=b)
            .map(|m| {
                Normaliser::new(&raster, m, &Control::new())
                    .unwrap()
                    .check
                    .log_likelihood
            })
            .collect();
        let top = logs.iter().cloned().fold(f64::NEG_INFINITY, f64::max);
        let s: f64 = logs.iter().map(|l| (l - top).exp()).sum();
        let weights: Vec<f64> = logs.iter().map(|l| (l - top).exp() / s).collect();
        let post = n.check.posterior.as_ref().unwrap();
        for (i, m) in (a..=b).enumerate() {
            let got_m = if m >= post.offset {
                post.pmf
                    .get((m - post.offset) as usize)
                    .copied()
                    .unwrap_or(0.0)
            } else {
                0.0
            };
            assert!(
                (got_m - weights[i]).abs() <= 1e-12,
                "seed {seed}: P(total = {m} | range) {got_m} vs {}",
                weights[i]
            );
        }
        // reference: identity, the zone law is sum_m P(m | range) P(N_S = k | total = m)
        let mut mixed: Vec<Vec<f64>> = zones.iter().map(|z| vec![0.0; z.len() + 1]).collect();
        let mut bound = vec![0.0f64; zones.len()];
        for (i, m) in (a..=b).enumerate() {
            let (_, e) = run(&raster, &zones, &Evidence::exact_total(m, &raster).unwrap());
            for (zi, z) in e.iter().enumerate() {
                for (k, p) in dense_pmf(z.offset, &z.pmf, z.cells).iter().enumerate() {
                    mixed[zi][k] += weights[i] * p;
                }
                bound[zi] = bound[zi].max(z.error_bound);
            }
        }
        for (zi, z) in got.iter().enumerate() {
            let d = l1(&dense_pmf(z.offset, &z.pmf, z.cells), &mixed[zi]);
            let allowed = z.error_bound + bound[zi] + 1e-11;
            assert!(
                d <= allowed,
                "seed {seed}, zone {}: L1 {d:e} > {allowed:e}",
                z.id
            );
        }
        // reference: identity, posterior means over a partition of all valid cells sum to the
        // posterior mean of the true total
        let (_, parts) = run(&raster, &partition, &evidence);
        let sum: f64 = parts.iter().map(|z| z.mean).sum();
        let total_mean: f64 = post
            .pmf
            .iter()
            .enumerate()
            .map(|(i, p)| (post.offset + i as u64) as f64 * p)
            .sum();
        assert!(
            (sum - total_mean).abs() <= 1e-9 * total_mean.max(1.0),
            "seed {seed}: partition means sum to {sum}, the total's posterior mean is {total_mean}"
        );
    }
}

fn shift(p: f64, c: f64) -> f64 {
    if p == 0.0 || p == 1.0 || p.is_nan() {
        return p;
    }
    let x = (p / (1.0 - p)).ln() + c;
    1.0 / (1.0 + (-x).exp())
}

#[test]
fn a_uniformly_overconfident_raster_changes_answers_under_a_range_but_not_under_a_total() {
    let (raster, _, zones) = case(5, 30, 20);
    let st = *raster.stats();
    let m = (st.sum_p + st.sum_var.sqrt()).round() as u64;
    let shifted_values: Vec<f64> = raster.values().iter().map(|&p| shift(p, 0.8)).collect();
    let shifted = Raster::from_probabilities(30, 20, shifted_values).unwrap();
    let zones2: Vec<Zone> = zones
        .iter()
        .map(|z| Zone::new(z.id(), z.indices().collect(), &shifted).unwrap())
        .collect();
    // reference: closed form (Chen, Dempster & Liu 1994), scaling every odds by e^c cancels
    // given one exact total
    let (_, a) = run(&raster, &zones, &Evidence::exact_total(m, &raster).unwrap());
    let (_, b) = run(
        &shifted,
        &zones2,
        &Evidence::exact_total(m, &shifted).unwrap(),
    );
    for (x, y) in a.iter().zip(&b) {
        let d = l1(
            &dense_pmf(x.offset, &x.pmf, x.cells),
            &dense_pmf(y.offset, &y.pmf, y.cells),
        );
        assert!(d <= 1e-11, "exact total, zone {}: {d:e}", x.id);
    }
    // Under a range the shift reweighs the totals it allows: the answers move well beyond
    // rounding (reference: closed form, the posterior of the total is prior x 1[range]).
    let (lo, hi) = (m - 10, m + 10);
    let (_, a) = run(&raster, &zones, &Evidence::range(lo, hi, &raster).unwrap());
    let (_, b) = run(
        &shifted,
        &zones2,
        &Evidence::range(lo, hi, &shifted).unwrap(),
    );
    let moved = a
        .iter()
        .zip(&b)
        .map(|(x, y)| {
            l1(
                &dense_pmf(x.offset, &x.pmf, x.cells),
                &dense_pmf(y.offset, &y.pmf, y.cells),
            )
        })
        .fold(0.0, f64::max);
    assert!(
        moved > 1e-3,
        "range: the shift moved the zone laws by {moved:e} only"
    );
}

#[test]
fn the_cell_posterior_under_detection_sums_to_the_total_s_posterior_mean() {
    let (raster, _, _) = case(6, 30, 20);
    let st = *raster.stats();
    let detected = (0.7 * st.sum_p).round() as u64;
    let evidence = Evidence::detected(detected, 0.7, &raster).unwrap();
    let n = Normaliser::of(&raster, &evidence, &Control::new()).unwrap();
    let post =
        engine::cell_posterior(&raster, None, &n, &Settings::default(), &Control::new()).unwrap();
    let sum: f64 = post.cells.iter().map(|c| c.2).sum();
    let t = n.check.posterior.as_ref().unwrap();
    let mean: f64 = t
        .pmf
        .iter()
        .enumerate()
        .map(|(i, p)| (t.offset + i as u64) as f64 * p)
        .sum();
    // reference: identity, E[total | evidence] = sum over cells of P(event | evidence)
    assert!((sum - mean).abs() <= 1e-9 * mean, "{sum} vs {mean}");
    // The bound's rounding term grows with the cells (about 3e-15 each, as for an exact total).
    let allowed = 1e-13 + 1e-14 * st.valid as f64;
    assert!(post.error_bound <= allowed, "bound {:e}", post.error_bound);
}

#[test]
fn strata_reduce_to_their_parts() {
    use zonetally::engine::{execute_strata, Strata, StratumCells};
    let settings = Settings::new(0.9, vec![2, 5], 1e-13, true).unwrap();
    for (seed, w, h) in CASES {
        let (raster, _, zones) = case(seed, w, h);
        let st = *raster.stats();
        let m = (st.sum_p + 0.5 * st.sum_var.sqrt()).round() as u64;
        // reference: identity, one stratum over every valid cell is the overall total
        let all = StratumCells::new("all", valid_cells(&raster), &raster).unwrap();
        let e = Evidence::exact_total(m, all.raster()).unwrap();
        let one = Strata::new(vec![(all, e)]).unwrap();
        let got = execute_strata(&raster, &zones, &one, &settings, &Control::new()).unwrap();
        let (_, want) = run(&raster, &zones, &Evidence::exact_total(m, &raster).unwrap());
        same(&got.zones, &want, &format!("seed {seed}: one stratum"));
        // reference: identity, a zone inside one stratum is that stratum run alone
        let cells = valid_cells(&raster);
        let (left, right) = cells.split_at(cells.len() / 2);
        let sl = StratumCells::new("left", left.to_vec(), &raster).unwrap();
        let sr = StratumCells::new("right", right.to_vec(), &raster).unwrap();
        let ml = sl.raster().stats().sum_p.round() as u64;
        let el = Evidence::range(ml.saturating_sub(3), ml + 3, sl.raster()).unwrap();
        let er = Evidence::detected(
            (0.9 * sr.raster().stats().sum_p).round() as u64,
            0.9,
            sr.raster(),
        )
        .unwrap();
        let inner: Vec<u32> = left.iter().step_by(3).copied().collect();
        let zone = Zone::new("inner", inner.clone(), &raster).unwrap();
        let sub_zone = Zone::new(
            "inner",
            inner
                .iter()
                .map(|c| left.iter().position(|x| x == c).unwrap() as u32)
                .collect(),
            sl.raster(),
        )
        .unwrap();
        let (_, alone) = run(sl.raster(), &[sub_zone], &el);
        let two = Strata::new(vec![(sl, el), (sr, er)]).unwrap();
        let got = execute_strata(&raster, &[zone], &two, &settings, &Control::new()).unwrap();
        same(
            &got.zones,
            &alone,
            &format!("seed {seed}: a zone inside one stratum"),
        );
        // reference: identity, the posterior mean of the total is the sum of the strata's
        let mean = |p: &zonetally::engine::TotalPosterior| -> f64 {
            p.pmf
                .iter()
                .enumerate()
                .map(|(i, x)| (p.offset + i as u64) as f64 * x)
                .sum()
        };
        let parts: f64 = got
            .strata
            .iter()
            .map(|(_, c)| mean(c.posterior.as_ref().unwrap()))
            .sum();
        let whole = mean(got.total.posterior.as_ref().unwrap());
        assert!(
            (parts - whole).abs() <= 1e-9 * whole,
            "seed {seed}: {parts} vs {whole}"
        );
    }
}

#[test]
fn overlapping_strata_are_refused_naming_both_and_a_cell() {
    use zonetally::engine::{Strata, StratumCells};
    let raster = Raster::from_probabilities(4, 1, vec![0.5; 4]).unwrap();
    let a = StratumCells::new("north", vec![0, 1], &raster).unwrap();
    let b = StratumCells::new("south", vec![1, 2], &raster).unwrap();
    let ea = Evidence::exact_total(1, a.raster()).unwrap();
    let eb = Evidence::exact_total(1, b.raster()).unwrap();
    let e = Strata::new(vec![(a, ea), (b, eb)]).unwrap_err().to_string();
    assert!(
        e.contains("`north`") && e.contains("`south`") && e.contains("cell 1"),
        "{e}"
    );
}

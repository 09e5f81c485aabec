//! The engine against exhaustive enumeration in exact arithmetic.
//!
//! For rasters of at most 20 cells every one of the 2^n event configurations is enumerated and
//! weighted by its exact prior probability (integers: each p is an f64, so p = a / 2^L exactly
//! for a common L). Summing the weights of the configurations with total m gives the exact
//! conditional law of every zone, with no rounding anywhere; the engine's f64 answers are then
//! compared in exact rational arithmetic.

mod engine_support;

use engine_support::*;
use num_bigint::{BigInt, BigUint};
use num_rational::BigRational;
use num_traits::{Signed, ToPrimitive, Zero};
use zonetally::engine::{self, Control, Evidence, Form, Normaliser, Raster, Settings, Zone};

/// Exact conditional laws of a set of zones for every possible total, by enumeration.
struct Enumerated {
    /// `weights[m][z][k]`: sum of the prior weights (scaled by 2^(L n)) of the configurations
    /// with total m and k events in zone z.
    weights: Vec<Vec<Vec<BigUint>>>,
}

impl Enumerated {
    fn new(raster: &Raster, zones: &[Vec<u32>]) -> Enumerated {
        let cells = valid_cells(raster);
        assert!(cells.len() <= 20, "enumeration is for at most 20 cells");
        // A common scale 2^L making every p and 1 - p an integer: L = the largest number of
        // binary places of any p (an f64 in [2^-e, 1) has at most e + 52 of them).
        let values = raster.values();
        let places = |p: f64| -> u32 {
            if p == 0.0 || p == 1.0 {
                return 0;
            }
            let mut l = 0;
            let mut x = p;
            while x.fract() != 0.0 {
                x *= 2.0;
                l += 1;
            }
            l
        };
        let l = cells
            .iter()
            .map(|&c| places(values[c as usize]))
            .max()
            .unwrap_or(0);
        let scale = BigUint::from(1u8) << l;
        let num = |p: f64| -> BigUint {
            // p * 2^L exactly: the exact rational of p, times 2^L, is an integer.
            let r = rat(p) * BigRational::from_integer(BigInt::from(scale.clone()));
            assert!(r.is_integer());
            r.to_integer().to_biguint().unwrap()
        };
        let yes: Vec<BigUint> = cells.iter().map(|&c| num(values[c as usize])).collect();
        let no: Vec<BigUint> = yes.iter().map(|a| &scale - a).collect();
        let masks: Vec<Vec<bool>> = zones
            .iter()
            .map(|z| cells.iter().map(|c| z.contains(c)).collect())
            .collect();
        let n = cells.len();
        let mut weights = vec![
            zones
                .iter()
                .map(|z| vec![BigUint::zero(); z.len() + 1])
                .collect::<Vec<_>>();
            n + 1
        ];
        // Depth-first over the cells, sharing the products of common prefixes.
        struct Walk<'a> {
            yes: &'a [BigUint],
            no: &'a [BigUint],
            masks: &'a [Vec<bool>],
            weights: &'a mut Vec<Vec<Vec<BigUint>>>,
        }
        fn walk(w: &mut Walk, i: usize, weight: BigUint, total: usize, counts: &mut Vec<usize>) {
            if weight.is_zero() {
                return;
            }
            if i == w.yes.len() {
                for (z, &k) in counts.iter().enumerate() {
                    w.weights[total][z][k] += &weight;
                }
                return;
            }
            walk(w, i + 1, &weight * &w.no[i], total, counts);
            for (z, m) in w.masks.iter().enumerate() {
                counts[z] += m[i] as usize;
            }
            walk(w, i + 1, &weight * &w.yes[i], total + 1, counts);
            for (z, m) in w.masks.iter().enumerate() {
                counts[z] -= m[i] as usize;
            }
        }
        let mut counts = vec![0; zones.len()];
        let mut state = Walk {
            yes: &yes,
            no: &no,
            masks: &masks,
            weights: &mut weights,
        };
        walk(&mut state, 0, BigUint::from(1u8), 0, &mut counts);
        Enumerated { weights }
    }

    /// The exact conditional pmf of zone `z` given total `m`, or `None` if m is impossible.
    fn pmf(&self, m: usize, z: usize) -> Option<Vec<BigRational>> {
        let w = &self.weights[m][z];
        let sum: BigUint = w.iter().sum();
        if sum.is_zero() {
            return None;
        }
        let d = BigInt::from(sum);
        Some(
            w.iter()
                .map(|x| BigRational::new(BigInt::from(x.clone()), d.clone()))
                .collect(),
        )
    }
}

/// Smallest k with exact CDF(k) >= t.
fn exact_quantile(pmf: &[BigRational], t: &BigRational) -> usize {
    let mut acc = rzero();
    for (k, p) in pmf.iter().enumerate() {
        acc += p;
        if &acc >= t {
            return k;
        }
    }
    pmf.len() - 1
}

/// An invented 5x4 slope: rational p (given as their nearest f64), cells with p = 0, p = 1 and
/// nodata. 18 valid cells.
fn slope() -> Raster {
    let v = |x: f64| Some(x);
    let values = vec![
        v(1.0 / 7.0),
        v(3.0 / 10.0),
        v(0.0),
        v(1.0 / 2.0),
        v(2.0 / 9.0),
        v(1.0),
        v(5.0 / 6.0),
        None,
        v(1.0 / 20.0),
        v(3.0 / 10.0),
        v(1.0 / 7.0),
        v(0.0),
        v(2.0 / 3.0),
        v(1.0 / 100.0),
        v(4.0 / 5.0),
        v(1.0 / 3.0),
        None,
        v(9.0 / 10.0),
        v(1.0 / 11.0),
        v(1.0),
    ];
    Raster::new(5, 4, values).unwrap()
}

/// Compares every summary the engine reports for every zone and every possible total.
fn compare_all(raster: &Raster, zones: &[(&str, Vec<u32>)], level: f64) {
    let cell_lists: Vec<Vec<u32>> = zones.iter().map(|(_, c)| c.clone()).collect();
    let exact = Enumerated::new(raster, &cell_lists);
    let engine_zones: Vec<Zone> = zones
        .iter()
        .map(|(id, c)| Zone::new(*id, c.clone(), raster).unwrap())
        .collect();
    let stats = *raster.stats();
    let mut checked = 0;
    for m in stats.certain..=stats.certain + stats.free {
        let max_len = zones.iter().map(|(_, c)| c.len() as u64).max().unwrap();
        let thresholds: Vec<u64> = (0..=max_len + 1).collect();
        let settings = Settings::new(level, thresholds.clone(), 1e-13, true).unwrap();
        let ev = engine::evaluate(raster, &engine_zones, m, &settings, &Control::new()).unwrap();
        for (zi, (id, cells)) in zones.iter().enumerate() {
            let n = cells.len();
            let want = exact.pmf(m as usize, zi).expect("a possible total");
            let z = &ev.zones[zi];
            assert_eq!(&z.id, id);
            let got = dense_pmf(z.offset, &z.pmf, n);
            let what = |s: &str| format!("zone `{id}` ({n} cells), total {m}: {s}");
            // reference: exhaustive enumeration of all 2^n configurations in exact arithmetic
            for k in 0..=n {
                assert_prob_exact(got[k], &want[k], &what(&format!("P(N = {k})")));
            }
            // Mean: |error| <= sum_k k |pmf error| <= n (n + 1) / 2 * ABS_TOL, plus the f64
            // rounding of the engine's own sum (at most 2 n eps of the mean).
            let mean: BigRational = want
                .iter()
                .enumerate()
                .map(|(k, p)| rat_int(k as u64) * p)
                .sum();
            let mean_f = mean.to_f64().unwrap();
            let mean_tol = (n * (n + 1)) as f64 / 2.0 * ABS_TOL + 2.0 * n as f64 * U * mean_f;
            assert!(
                (z.mean - mean_f).abs() <= mean_tol,
                "{}: {} vs {mean_f}",
                what("mean"),
                z.mean
            );
            // Variance: |error| <= sum_k (k - mean)^2 |pmf error| + the mean's error times 2n,
            // so n^2 (n + 1) ABS_TOL; plus rounding of the engine's sum (4 n eps of n^2).
            let var: BigRational = want
                .iter()
                .enumerate()
                .map(|(k, p)| {
                    let d = rat_int(k as u64) - &mean;
                    &d * &d * p
                })
                .sum();
            let var_f = var.to_f64().unwrap();
            let nf = n as f64;
            let var_tol = nf * nf * (nf + 1.0) * ABS_TOL + 4.0 * nf * U * nf * nf;
            assert!(
                (z.sd * z.sd - var_f).abs() <= var_tol,
                "{}: sd {} vs exact {}",
                what("sd"),
                z.sd,
                var_f.sqrt()
            );
            // Quantiles: exact unless the exact CDF ties a threshold to within the contract.
            let want_f: Vec<f64> = want.iter().map(|p| p.to_f64().unwrap()).collect();
            let slack = (n + 1) as f64 * ABS_TOL;
            let half = BigRational::new(1.into(), 2.into());
            let lo_t = rat((1.0 - level) / 2.0);
            let hi_t = rat((1.0 + level) / 2.0);
            let checks = [
                ("median", z.median, &half, 0.5),
                (
                    "interval lower",
                    z.interval.lower,
                    &lo_t,
                    (1.0 - level) / 2.0,
                ),
                (
                    "interval upper",
                    z.interval.upper,
                    &hi_t,
                    (1.0 + level) / 2.0,
                ),
            ];
            for (name, got_q, t, tf) in checks {
                let exact_q = exact_quantile(&want, t);
                assert!(
                    got_q as usize == exact_q || quantile_ok(&want_f, tf, slack, got_q),
                    "{}: reported {got_q}, exact {exact_q}",
                    what(name)
                );
            }
            assert_eq!(z.interval.level, level);
            // Mode: the smallest k of largest probability; a near-tie within the contract may go
            // either way.
            let top = want_f.iter().cloned().fold(0.0, f64::max);
            let exact_mode = want_f.iter().position(|&p| p == top).unwrap();
            assert!(
                z.mode as usize == exact_mode || want_f[z.mode as usize] >= top - 2.0 * ABS_TOL,
                "{}: reported {}, exact {exact_mode}",
                what("mode"),
                z.mode
            );
            // Exceedance P(N >= k), each a reported probability.
            for &(k, p) in &z.exceedance {
                let tail: BigRational = want.iter().skip(k as usize).sum();
                assert_prob_exact(p, &tail, &what(&format!("P(N >= {k})")));
            }
            assert_eq!(z.exceedance.len(), thresholds.len());
            // reference: closed form, prior mean sum p and sd sqrt(sum p (1 - p)) of the zone
            let pm: f64 = cells.iter().map(|&c| raster.values()[c as usize]).sum();
            assert!((z.prior_mean - pm).abs() <= 2.0 * nf * U * pm.max(1.0));
            checked += 1;
        }
    }
    assert!(checked > 0);
}

#[test]
fn slope_every_zone_every_total() {
    let raster = slope();
    let zones = [
        ("upper", vec![0, 1, 2, 3, 4]),
        ("certain-and-empty", vec![2, 5, 11, 19]),
        ("single", vec![12]),
        ("single-empty", vec![11]),
        ("single-certain", vec![5]),
        ("overlap", vec![3, 4, 8, 9, 13, 14]),
        ("all", valid_cells(&raster)),
    ];
    compare_all(&raster, &zones, 0.9);
    compare_all(&raster, &zones[..3], 0.5);
}

#[test]
fn one_and_two_cells() {
    let one = Raster::from_probabilities(1, 1, vec![3.0 / 10.0]).unwrap();
    compare_all(&one, &[("only", vec![0])], 0.9);
    let two = Raster::from_probabilities(2, 1, vec![1.0 / 7.0, 3.0 / 10.0]).unwrap();
    compare_all(&two, &[("left", vec![0]), ("both", vec![0, 1])], 0.9);
    let with_nodata = Raster::new(3, 1, vec![None, Some(2.0 / 9.0), Some(1.0)]).unwrap();
    compare_all(&with_nodata, &[("mid", vec![1]), ("right", vec![2])], 0.8);
}

#[test]
fn twenty_cells_prime_width() {
    // The most cells enumeration is kept to (2^20 configurations), on a raster of prime width,
    // mixed small and large p.
    let p = [
        1.0 / 7.0,
        3.0 / 10.0,
        1.0 / 1000.0,
        0.5,
        2.0 / 9.0,
        5.0 / 6.0,
        1.0 / 13.0,
        0.05,
        3.0 / 10.0,
        1.0 / 7.0,
        7.0 / 8.0,
        2.0 / 3.0,
        1.0 / 100.0,
        4.0 / 5.0,
        1.0 / 3.0,
        0.25,
        9.0 / 10.0,
        1.0 / 11.0,
        3.0 / 7.0,
        1.0 / 17.0,
    ];
    let raster = Raster::from_probabilities(5, 4, p.to_vec()).unwrap();
    let zones = [
        ("first-seven", (0..7).collect::<Vec<u32>>()),
        ("odd", (0..20).filter(|c| c % 2 == 1).collect()),
        ("rare", vec![2, 12]),
    ];
    compare_all(&raster, &zones, 0.9);
}

#[test]
fn total_check_is_exact_on_the_slope() {
    let raster = slope();
    let cells = valid_cells(&raster);
    let exact = Enumerated::new(&raster, std::slice::from_ref(&cells));
    let stats = *raster.stats();
    // Prior law of the total: weights summed over every zone count, scaled by the same 2^(L n).
    let by_total: Vec<BigUint> = exact
        .weights
        .iter()
        .map(|w| w[0].iter().sum::<BigUint>())
        .collect();
    let all: BigUint = by_total.iter().sum();
    let d = BigInt::from(all);
    let prob = |x: &BigUint| BigRational::new(BigInt::from(x.clone()), d.clone());
    for m in stats.certain..=stats.certain + stats.free {
        let n = Normaliser::new(&raster, m, &Control::new()).unwrap();
        let m = m as usize;
        // reference: exhaustive enumeration, P(total <= m), P(total >= m), P(total = m)
        let at_most: BigRational = by_total[..=m].iter().map(prob).sum();
        let at_least: BigRational = by_total[m..].iter().map(prob).sum();
        assert_prob_exact(n.check.p_at_most, &at_most, &format!("P(total <= {m})"));
        assert_prob_exact(n.check.p_at_least, &at_least, &format!("P(total >= {m})"));
        let eq = prob(&by_total[m]).to_f64().unwrap();
        // ln of a probability known to 1e-9 relative is known to 1e-9 absolute.
        assert!(
            (n.check.log_likelihood - eq.ln()).abs() <= REL_TOL,
            "ln P(total = {m}): {} vs {}",
            n.check.log_likelihood,
            eq.ln()
        );
    }
}

#[test]
fn cell_posterior_is_exact_on_the_slope() {
    let raster = slope();
    let cells = valid_cells(&raster);
    let singletons: Vec<Vec<u32>> = cells.iter().map(|&c| vec![c]).collect();
    let exact = Enumerated::new(&raster, &singletons);
    let stats = *raster.stats();
    for m in stats.certain..=stats.certain + stats.free {
        let n = Normaliser::new(&raster, m, &Control::new()).unwrap();
        let post = engine::cell_posterior(&raster, None, &n, &Settings::default(), &Control::new())
            .unwrap();
        assert_eq!(post.cells.len(), cells.len());
        for (i, &(c, prior, p)) in post.cells.iter().enumerate() {
            assert_eq!(c, cells[i]);
            assert_eq!(prior, raster.values()[c as usize]);
            // reference: exhaustive enumeration, P(cell has an event | total = m)
            let want = &exact.pmf(m as usize, i).unwrap()[1];
            assert_prob_exact(p, want, &format!("cell {c}, total {m}: posterior"));
        }
    }
}

#[test]
fn error_bound_covers_the_exact_error() {
    let raster = slope();
    let zones = [
        ("upper", vec![0u32, 1, 2, 3, 4]),
        ("overlap", vec![3, 4, 8, 9, 13, 14]),
        ("all", valid_cells(&raster)),
    ];
    let cell_lists: Vec<Vec<u32>> = zones.iter().map(|(_, c)| c.clone()).collect();
    let exact = Enumerated::new(&raster, &cell_lists);
    let engine_zones: Vec<Zone> = zones
        .iter()
        .map(|(id, c)| Zone::new(*id, c.clone(), &raster).unwrap())
        .collect();
    let stats = *raster.stats();
    for tolerance in [1e-13, 1e-6, 1e-4] {
        let settings = Settings::new(0.9, vec![], tolerance, true).unwrap();
        for m in stats.certain..=stats.certain + stats.free {
            let ev =
                engine::evaluate(&raster, &engine_zones, m, &settings, &Control::new()).unwrap();
            for (zi, z) in ev.zones.iter().enumerate() {
                let want = exact.pmf(m as usize, zi).unwrap();
                let got = dense_pmf(z.offset, &z.pmf, z.cells);
                // reference: exhaustive enumeration; the L1 error is summed in exact arithmetic
                let err: BigRational = got
                    .iter()
                    .zip(&want)
                    .map(|(g, w)| (rat(*g) - w).abs())
                    .sum();
                assert!(
                    err <= rat(z.error_bound),
                    "zone `{}`, total {m}, tolerance {tolerance:e}: exact L1 error {:e} exceeds error_bound {:e}",
                    z.id,
                    err.to_f64().unwrap(),
                    z.error_bound
                );
            }
        }
    }
}

/// A named evidence and its exact weight w(m) = P(observation | total = m) in rationals.
type Stated = (String, Evidence, Box<dyn Fn(u64) -> BigRational>);

/// The forms of evidence the engine takes, each with its exact weight.
fn forms(raster: &Raster) -> Vec<Stated> {
    let stats = *raster.stats();
    let (lo, hi) = (stats.certain, stats.certain + stats.free);
    let mut out: Vec<Stated> = Vec::new();
    for (a, b) in [
        (lo, hi),
        (lo + 2, lo + 5),
        (hi - 3, hi + 4),
        (0, lo + 1),
        (lo + 4, lo + 4),
    ] {
        let w = move |m: u64| if m >= a && m <= b { rone() } else { rzero() };
        out.push((
            format!("range [{a}, {b}]"),
            Evidence::range(a, b, raster).unwrap(),
            Box::new(w),
        ));
    }
    for (d, rate) in [(3u64, 0.85), (5, 0.5), (lo, 0.3), (7, 0.999), (6, 1.0)] {
        // w(m) = C(m, d) rate^d (1 - rate)^(m - d), with rate the exact rational of the f64.
        let r = rat(rate);
        let w = move |m: u64| {
            if m < d {
                return rzero();
            }
            let mut v = BigRational::from_integer(binom(m, d));
            for _ in 0..d {
                v *= &r;
            }
            for _ in 0..m - d {
                v *= rone() - &r;
            }
            v
        };
        out.push((
            format!("{d} detected at {rate}"),
            Evidence::detected(d, rate, raster).unwrap(),
            Box::new(w),
        ));
    }
    let values = vec![0.3, 0.0, 1.0, 0.25, 1e-3, 0.6, 0.0, 0.125];
    let offset = lo + 1;
    let kept = values.clone();
    out.push((
        format!("likelihood from {offset}"),
        Evidence::likelihood(offset, values, raster).unwrap(),
        Box::new(move |m: u64| {
            if m < offset || m >= offset + kept.len() as u64 {
                rzero()
            } else {
                rat(kept[(m - offset) as usize])
            }
        }),
    ));
    out
}

#[test]
fn every_form_of_evidence_is_exact_on_the_slope() {
    let raster = slope();
    let stats = *raster.stats();
    let zones = [
        ("upper", vec![0u32, 1, 2, 3, 4]),
        ("overlap", vec![3, 4, 8, 9, 13, 14]),
        ("single", vec![12]),
        ("all", valid_cells(&raster)),
    ];
    let cell_lists: Vec<Vec<u32>> = zones.iter().map(|(_, c)| c.clone()).collect();
    let exact = Enumerated::new(&raster, &cell_lists);
    let engine_zones: Vec<Zone> = zones
        .iter()
        .map(|(id, c)| Zone::new(*id, c.clone(), &raster).unwrap())
        .collect();
    let all = zones.len() - 1;
    let prior_of = |m: u64| -> BigUint { exact.weights[m as usize][all].iter().sum() };
    let everything: BigUint = (0..exact.weights.len() as u64).map(prior_of).sum();
    let prior =
        |m: u64| BigRational::new(BigInt::from(prior_of(m)), BigInt::from(everything.clone()));
    let settings = Settings::new(0.9, vec![1, 3], 1e-13, true).unwrap();
    let plan = engine::plan(&raster, &engine_zones);
    let totals = stats.certain..=stats.certain + stats.free;
    for (name, evidence, w) in forms(&raster) {
        let control = Control::new();
        let n = Normaliser::of(&raster, &evidence, &control).unwrap();
        let got = engine::execute(&plan, &raster, &engine_zones, &n, &settings, &control).unwrap();
        for (zi, z) in got.iter().enumerate() {
            let size = zones[zi].1.len();
            // reference: exhaustive enumeration in exact arithmetic, the zone law being the
            // mixture sum_m w(m) P(N_S = k, N_T = m) / sum_m w(m) P(N_T = m)
            let mut want = vec![rzero(); size + 1];
            for m in totals.clone() {
                let wm = w(m);
                for (k, x) in exact.weights[m as usize][zi].iter().enumerate() {
                    want[k] += &wm * BigRational::from_integer(BigInt::from(x.clone()));
                }
            }
            let sum: BigRational = want.iter().sum();
            let want: Vec<BigRational> = want.iter().map(|x| x / &sum).collect();
            let dense = dense_pmf(z.offset, &z.pmf, size);
            let mut l1 = rzero();
            for k in 0..=size {
                assert_prob_exact(
                    dense[k],
                    &want[k],
                    &format!("{name}, zone `{}`: P(N = {k})", z.id),
                );
                l1 += (rat(dense[k]) - &want[k]).abs();
            }
            assert!(
                l1 <= rat(z.error_bound),
                "{name}, zone `{}`: L1 error {:e} above the bound {:e}",
                z.id,
                l1.to_f64().unwrap(),
                z.error_bound
            );
            assert!(
                z.error_bound <= 1e-13,
                "{name}, zone `{}`: bound {:e}",
                z.id,
                z.error_bound
            );
            for &(k, p) in &z.exceedance {
                let tail: BigRational = want.iter().skip(k as usize).sum();
                assert_prob_exact(p, &tail, &format!("{name}, zone `{}`: P(N >= {k})", z.id));
            }
        }
        // The posterior of the true total. reference: exhaustive enumeration, w(m) P(N_T = m)
        // normalised
        let weight: Vec<BigRational> = totals.clone().map(|m| w(m) * prior(m)).collect();
        let evidence_mass: BigRational = weight.iter().sum();
        let post = n
            .check
            .posterior
            .as_ref()
            .expect("a posterior of the total");
        let dense = dense_pmf(
            post.offset,
            &post.pmf,
            stats.certain as usize + stats.free as usize,
        );
        let mut l1 = rzero();
        for (i, m) in totals.clone().enumerate() {
            let want = &weight[i] / &evidence_mass;
            assert_prob_exact(
                dense[m as usize],
                &want,
                &format!("{name}: P(total = {m} | evidence)"),
            );
            l1 += (rat(dense[m as usize]) - want).abs();
        }
        assert!(
            l1 <= rat(post.error_bound),
            "{name}: posterior of the total, L1 above its bound"
        );
        // ln P(observation) under the prior: known to 1e-9 relative, so to 1e-9 absolute in ln.
        let want_ln = evidence_mass.to_f64().unwrap().ln();
        assert!(
            (n.check.log_likelihood - want_ln).abs() <= REL_TOL,
            "{name}: ln P(observation) {} vs {want_ln}",
            n.check.log_likelihood
        );
        // Tail probabilities: for a range or a likelihood, P(total <= largest allowed) and
        // P(total >= smallest allowed); for a detected count, P(D <= d) and P(D >= d) with
        // D | N = m ~ Binomial(m, rate) (thinning, exact).
        let (slo, shi) = evidence.support();
        let (at_most, at_least) = match evidence.form() {
            Form::Detected {
                detected,
                detection,
            } => {
                let r = rat(*detection);
                let (mut le, mut ge) = (rzero(), rzero());
                for m in totals.clone() {
                    for j in 0..=m {
                        let mut b = BigRational::from_integer(binom(m, j));
                        for _ in 0..j {
                            b *= &r;
                        }
                        for _ in 0..m - j {
                            b *= rone() - &r;
                        }
                        let x = &b * prior(m);
                        if j <= *detected {
                            le += &x;
                        }
                        if j >= *detected {
                            ge += &x;
                        }
                    }
                }
                (le, ge)
            }
            _ => (
                totals.clone().filter(|&m| m <= shi).map(prior).sum(),
                totals.clone().filter(|&m| m >= slo).map(prior).sum(),
            ),
        };
        assert_prob_exact(n.check.p_at_most, &at_most, &format!("{name}: P(at most)"));
        assert_prob_exact(
            n.check.p_at_least,
            &at_least,
            &format!("{name}: P(at least)"),
        );
    }
}

#[test]
fn cell_posterior_under_a_range_is_exact() {
    let raster = slope();
    let cells = valid_cells(&raster);
    let singletons: Vec<Vec<u32>> = cells.iter().map(|&c| vec![c]).collect();
    let exact = Enumerated::new(&raster, &singletons);
    let stats = *raster.stats();
    let (a, b) = (stats.certain + 1, stats.certain + 6);
    let n = Normaliser::of(
        &raster,
        &Evidence::range(a, b, &raster).unwrap(),
        &Control::new(),
    )
    .unwrap();
    let post =
        engine::cell_posterior(&raster, None, &n, &Settings::default(), &Control::new()).unwrap();
    for (i, &(c, _, p)) in post.cells.iter().enumerate() {
        // reference: exhaustive enumeration, P(cell has an event | a <= total <= b)
        let (mut yes, mut all) = (BigUint::zero(), BigUint::zero());
        for m in a..=b {
            let w = &exact.weights[m as usize][i];
            yes += &w[1];
            all += &w[0] + &w[1];
        }
        let want = BigRational::new(BigInt::from(yes), BigInt::from(all));
        assert_prob_exact(p, &want, &format!("cell {c}, range [{a}, {b}]: posterior"));
    }
}

#[test]
fn detection_agrees_with_three_state_cells_enumerated() {
    // Each cell holds no event (1 - p), an event that was found (p x rate) or an event that was
    // missed (p x (1 - rate)); the observation is the number found. 3^9 = 19,683 worlds.
    let p = [
        1.0 / 7.0,
        3.0 / 10.0,
        0.5,
        2.0 / 9.0,
        5.0 / 6.0,
        2.0 / 3.0,
        1.0,
        4.0 / 5.0,
        0.0,
    ];
    let raster = Raster::from_probabilities(9, 1, p.to_vec()).unwrap();
    let zone_cells = vec![0u32, 2, 4, 6, 7];
    let zones = [Zone::new("even", zone_cells.clone(), &raster).unwrap()];
    let settings = Settings::new(0.9, vec![], 1e-13, true).unwrap();
    for (found, rate) in [(2u64, 0.75), (4, 0.5), (5, 0.9)] {
        let r = rat(rate);
        let probs: Vec<[BigRational; 3]> = p
            .iter()
            .map(|&x| {
                let x = rat(x);
                [rone() - &x, &x * &r, &x * (rone() - &r)]
            })
            .collect();
        // reference: exhaustive enumeration of the 3^n worlds in exact arithmetic,
        // P(N_zone = k, found = d) summed
        let mut joint = vec![rzero(); zone_cells.len() + 1];
        let mut total_law = vec![rzero(); p.len() + 1];
        let worlds = 3usize.pow(p.len() as u32);
        for code in 0..worlds {
            let (mut c, mut weight, mut seen, mut k, mut events) = (code, rone(), 0u64, 0, 0);
            for (i, pr) in probs.iter().enumerate() {
                let state = c % 3;
                c /= 3;
                weight *= &pr[state];
                if state > 0 {
                    events += 1;
                    if zone_cells.contains(&(i as u32)) {
                        k += 1;
                    }
                }
                seen += (state == 1) as u64;
            }
            if seen == found && !weight.is_zero() {
                joint[k] += &weight;
                total_law[events] += &weight;
            }
        }
        let evidence: BigRational = joint.iter().sum();
        let n = Normaliser::of(
            &raster,
            &Evidence::detected(found, rate, &raster).unwrap(),
            &Control::new(),
        )
        .unwrap();
        let plan = engine::plan(&raster, &zones);
        let got = engine::execute(&plan, &raster, &zones, &n, &settings, &Control::new()).unwrap();
        let dense = dense_pmf(got[0].offset, &got[0].pmf, zone_cells.len());
        for (k, want) in joint.iter().enumerate() {
            assert_prob_exact(
                dense[k],
                &(want / &evidence),
                &format!("{found} found at {rate}: P(N = {k})"),
            );
        }
        let post = n.check.posterior.as_ref().unwrap();
        let dense = dense_pmf(post.offset, &post.pmf, p.len());
        for (m, want) in total_law.iter().enumerate() {
            assert_prob_exact(
                dense[m],
                &(want / &evidence),
                &format!("{found} found at {rate}: P(total = {m})"),
            );
        }
        assert!(
            (n.check.log_likelihood - evidence.to_f64().unwrap().ln()).abs() <= REL_TOL,
            "ln P({found} found)"
        );
    }
}

#[test]
fn strata_with_mixed_forms_are_exact_on_the_slope() {
    use zonetally::engine::{execute_strata, Strata, StratumCells};
    let raster = slope();
    let values = raster.values();
    let cells = valid_cells(&raster);
    // Stratum `a` under a range, stratum `b` under a detected count; the rest unconstrained.
    let a_cells = vec![0u32, 1, 3, 4, 6, 5];
    let b_cells = vec![8u32, 9, 10, 12, 13, 14];
    let zones = [
        ("upper", vec![0u32, 1, 2, 3, 4]),
        ("straddle", vec![3, 4, 8, 9, 15, 17]),
        ("free", vec![15, 17, 18]),
    ];
    let sa = StratumCells::new("a", a_cells.clone(), &raster).unwrap();
    let sb = StratumCells::new("b", b_cells.clone(), &raster).unwrap();
    let ea = Evidence::range(2, 4, sa.raster()).unwrap();
    let eb = Evidence::detected(2, 0.75, sb.raster()).unwrap();
    let strata = Strata::new(vec![(sa, ea), (sb, eb)]).unwrap();
    let engine_zones: Vec<Zone> = zones
        .iter()
        .map(|(id, c)| Zone::new(*id, c.clone(), &raster).unwrap())
        .collect();
    let settings = Settings::new(0.9, vec![1, 2], 1e-13, true).unwrap();
    let got = execute_strata(&raster, &engine_zones, &strata, &settings, &Control::new()).unwrap();
    // reference: exhaustive enumeration of the 2^n configurations in exact arithmetic, each
    // weighted by its prior probability, by 1[2 <= N_a <= 4] and by Binomial(2; N_b, 0.75)
    let r = rat(0.75);
    let w_b = |n: usize| -> BigRational {
        if n < 2 {
            return rzero();
        }
        let mut v = BigRational::from_integer(binom(n as u64, 2));
        for _ in 0..2 {
            v *= &r;
        }
        for _ in 0..n - 2 {
            v *= rone() - &r;
        }
        v
    };
    let mut joint: Vec<Vec<BigRational>> = zones
        .iter()
        .map(|(_, c)| vec![rzero(); c.len() + 1])
        .collect();
    let mut totals = vec![rzero(); cells.len() + 1];
    for code in 0u32..(1 << cells.len()) {
        let mut weight = rone();
        let (mut na, mut nb, mut n) = (0, 0, 0);
        let mut k = vec![0usize; zones.len()];
        for (i, &c) in cells.iter().enumerate() {
            let p = rat(values[c as usize]);
            if code >> i & 1 == 1 {
                weight *= p;
                n += 1;
                na += a_cells.contains(&c) as usize;
                nb += b_cells.contains(&c) as usize;
                for (zi, (_, zc)) in zones.iter().enumerate() {
                    k[zi] += zc.contains(&c) as usize;
                }
            } else {
                weight *= rone() - p;
            }
            if weight.is_zero() {
                break;
            }
        }
        if weight.is_zero() || !(2..=4).contains(&na) {
            continue;
        }
        let weight = weight * w_b(nb);
        for zi in 0..zones.len() {
            joint[zi][k[zi]] += &weight;
        }
        totals[n] += &weight;
    }
    let evidence: BigRational = totals.iter().sum();
    for (zi, z) in got.zones.iter().enumerate() {
        let dense = dense_pmf(z.offset, &z.pmf, zones[zi].1.len());
        let mut l1 = rzero();
        for (k, want) in joint[zi].iter().enumerate() {
            let want = want / &evidence;
            assert_prob_exact(
                dense[k],
                &want,
                &format!("strata, zone `{}`: P(N = {k})", z.id),
            );
            l1 += (rat(dense[k]) - want).abs();
        }
        assert!(
            l1 <= rat(z.error_bound),
            "strata, zone `{}`: L1 above the bound",
            z.id
        );
        assert!(
            z.error_bound <= 1e-13,
            "strata, zone `{}`: bound {:e}",
            z.id,
            z.error_bound
        );
    }
    let post = got.total.posterior.as_ref().unwrap();
    let dense = dense_pmf(post.offset, &post.pmf, cells.len());
    for (m, want) in totals.iter().enumerate() {
        assert_prob_exact(
            dense[m],
            &(want / &evidence),
            &format!("strata: P(total = {m} | evidence)"),
        );
    }
    // ln P(evidence) is the sum over strata (independent a priori).
    assert!((got.total.log_likelihood - evidence.to_f64().unwrap().ln()).abs() <= REL_TOL);
    assert_eq!(got.strata.len(), 2);
}

//! The engine against closed forms: with every p equal the conditional law is hypergeometric
//! (statrs, and exact binomial coefficients), and Fisher's lady tasting tea.
//!
//! These drive the public engine API and the `zonetally eval` binary only, so they hold for any
//! executor behind `engine::evaluate`.

mod engine_support;

use engine_support::*;
use num_bigint::BigInt;
use num_rational::BigRational;
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;
use statrs::distribution::{Discrete, Hypergeometric};
use statrs::function::factorial::ln_factorial;
use zonetally::engine::{Raster, Zone};

/// statrs evaluates C(n, k) as exp(ln n! - ln k! - ln (n-k)!), so each coefficient carries a
/// relative error of about eps times the sum of the logarithms involved (each logarithm is
/// rounded to within eps of its magnitude; exp turns that absolute error into a relative one).
/// This bounds statrs's own relative error on a hypergeometric pmf value, with a factor 4 of
/// margin for the roundings of the two divisions and the final rounding to an integer.
fn statrs_rel_error(population: u64, successes: u64, draws: u64, k: u64) -> f64 {
    if k > draws || draws - k > population - successes || k > successes {
        return 0.0; // statrs returns an exact 0 outside the support
    }
    let terms = |n: u64, j: u64| ln_factorial(n) + ln_factorial(j) + ln_factorial(n - j) + 3.0;
    let s =
        terms(successes, k) + terms(population - successes, draws - k) + terms(population, draws);
    4.0 * f64::EPSILON * s
}

/// All p equal to `p` on `n` cells, a zone of `zone` (distinct cells), observed total `m`.
fn check_hypergeometric(n: u32, zone: Vec<u32>, m: u64, p: f64) {
    let raster = Raster::from_probabilities(n, 1, vec![p; n as usize]).unwrap();
    let s = zone.len() as u64;
    let zones = vec![Zone::new("z", zone, &raster).unwrap()];
    let thresholds: Vec<u64> = (0..=s + 1).collect();
    let ev = evaluate(&raster, &zones, m, thresholds);
    let z = &ev.zones[0];
    let got = dense_pmf(z.offset, &z.pmf, s as usize);
    // reference: statrs 0.18 Hypergeometric(population = |T|, successes = |S|, draws = m)
    let hyper = Hypergeometric::new(n as u64, s, m).unwrap();
    // reference: closed form C(|S|, k) C(|T| - |S|, m - k) / C(|T|, m), in exact integers
    let denom = binom(n as u64, m);
    let exact_at = |k: u64| -> BigRational {
        if k > m || m - k > n as u64 - s {
            return rzero();
        }
        BigRational::new(binom(s, k) * binom(n as u64 - s, m - k), denom.clone())
    };
    let mut exact_mean = rzero();
    for k in 0..=s {
        let what = format!("|T| {n}, |S| {s}, m {m}, p {p}: P(N_S = {k})");
        let want = hyper.pmf(k);
        let tol = ABS_TOL + statrs_rel_error(n as u64, s, m, k) * want;
        let diff = (got[k as usize] - want).abs();
        assert!(
            diff <= tol,
            "{what}: engine {:e}, statrs {want:e}, |diff| {diff:e} > {tol:e}",
            got[k as usize]
        );
        if want >= REL_FLOOR {
            assert!(
                diff / want <= REL_TOL,
                "{what}: engine {:e}, statrs {want:e}",
                got[k as usize]
            );
        }
        let exact = exact_at(k);
        assert_prob_exact(got[k as usize], &exact, &what);
        exact_mean += rat_int(k) * &exact;
        // Exceedance P(N_S >= k) is a reported probability too.
        let tail: BigRational = (k..=s).map(exact_at).fold(rzero(), |a, b| a + b);
        let (tk, tp) = z.exceedance[k as usize];
        assert_eq!(tk, k);
        assert_prob_exact(tp, &tail, &format!("{what}: exceedance"));
    }
    // reference: closed form, hypergeometric mean m |S| / |T|
    let mean = m as f64 * s as f64 / n as f64;
    // |mean error| <= sum_k k |pmf error| <= |S| (|S| + 1) / 2 * ABS_TOL, plus the f64
    // rounding of the engine's sum.
    let mean_tol = (s * (s + 1)) as f64 / 2.0 * ABS_TOL + 4.0 * f64::EPSILON * mean;
    assert!(
        (z.mean - mean).abs() <= mean_tol,
        "|T| {n}, |S| {s}, m {m}: mean {} vs {mean}",
        z.mean
    );
    assert!((z.mean - num_traits::ToPrimitive::to_f64(&exact_mean).unwrap()).abs() <= mean_tol);
    assert_eq!(
        z.exceedance[s as usize + 1].1,
        0.0,
        "P(N_S >= |S| + 1) must be 0"
    );
    // reference: closed form, prior of a zone with equal p: Binomial(|S|, p)
    assert!((z.prior_mean - s as f64 * p).abs() <= 4.0 * s as f64 * f64::EPSILON);
}

#[test]
fn equal_p_gives_the_hypergeometric_law() {
    // One cell: both totals (all empty, all full).
    check_hypergeometric(1, vec![0], 0, 0.5);
    check_hypergeometric(1, vec![0], 1, 0.5);
    check_hypergeometric(2, vec![1], 1, 0.5);
    // Prime numbers of cells, zones in no particular order, totals below, near and above the mean.
    check_hypergeometric(13, vec![12, 0, 5, 7, 3], 6, 0.3);
    check_hypergeometric(13, vec![2, 4, 6], 12, 0.3);
    check_hypergeometric(97, (0..97).filter(|c| c % 3 == 1).collect(), 40, 0.2);
    check_hypergeometric(211, (50..120).collect(), 90, 0.37);
    check_hypergeometric(211, (0..211).step_by(7).collect(), 3, 0.01);
    // Zone = the whole raster: the count is the total, for certain.
    check_hypergeometric(29, (0..29).collect(), 11, 0.4);
    check_hypergeometric(29, (0..29).collect(), 0, 0.4);
    check_hypergeometric(29, (0..29).collect(), 29, 0.4);
    // Total equal to the number of cells: every cell holds an event.
    check_hypergeometric(31, vec![3, 9, 27], 31, 0.05);
}

#[test]
fn equal_p_hypergeometric_on_a_thousand_cells() {
    // 1009 is prime; the zone is a random third of the cells.
    let mut rng = ChaCha8Rng::seed_from_u64(1009);
    let raster = Raster::from_probabilities(1009, 1, vec![0.1; 1009]).unwrap();
    let zone = random_zone(&mut rng, "z", &raster, 336);
    check_hypergeometric(1009, zone.indices().collect(), 120, 0.1);
    check_hypergeometric(1009, vec![17], 500, 0.1);
}

#[test]
fn lady_tasting_tea() {
    // reference: Fisher 1935, The Design of Experiments, ch. II: 8 cups, 4 with milk first; the
    // lady picks 4. P(all 4 right) = 1/70, P(exactly 3 right) = 16/70.
    let raster = Raster::from_probabilities(4, 2, vec![0.5; 8]).unwrap();
    let zones = vec![Zone::new("cups", vec![0, 1, 2, 3], &raster).unwrap()];
    let ev = evaluate(&raster, &zones, 4, vec![3, 4]);
    let z = &ev.zones[0];
    let pmf = dense_pmf(z.offset, &z.pmf, 4);
    let r = |a: u64, b: u64| BigRational::new(BigInt::from(a), BigInt::from(b));
    assert_prob_exact(pmf[4], &r(1, 70), "P(4 right)");
    assert_prob_exact(pmf[3], &r(16, 70), "P(3 right)");
    // reference: Fisher 1935, the full table 1, 16, 36, 16, 1 (/70)
    assert_prob_exact(pmf[2], &r(36, 70), "P(2 right)");
    assert_prob_exact(pmf[1], &r(16, 70), "P(1 right)");
    assert_prob_exact(pmf[0], &r(1, 70), "P(0 right)");
    assert_prob_exact(z.exceedance[0].1, &r(17, 70), "P(at least 3 right)");
    assert_prob_exact(z.exceedance[1].1, &r(1, 70), "P(4 right) as exceedance");
    assert_eq!((z.mode, z.median), (2, 2));
}

#[test]
fn lady_tasting_tea_through_the_binary() {
    // reference: Fisher 1935, The Design of Experiments: P(4) = 1/70, P(3) = 16/70
    let values = vec![Some(0.5); 8];
    let req = request_json(4, 2, &values, &[("cups", vec![0, 1, 2, 3])], 4, &[3]);
    let (code, out, err) = run_eval(&req);
    assert_eq!(code, 0, "zonetally eval failed: {err}");
    let doc: serde_json::Value = serde_json::from_str(&out).expect("results document is JSON");
    let zone = &doc["zones"][0];
    assert_eq!(zone["id"], "cups");
    let offset = zone["pmf"]["offset"].as_u64().unwrap();
    let values: Vec<f64> = zone["pmf"]["values"]
        .as_array()
        .unwrap()
        .iter()
        .map(|v| v.as_f64().unwrap())
        .collect();
    let pmf = dense_pmf(offset, &values, 4);
    let r = |a: u64, b: u64| BigRational::new(BigInt::from(a), BigInt::from(b));
    assert_prob_exact(pmf[4], &r(1, 70), "eval: P(4 right)");
    assert_prob_exact(pmf[3], &r(16, 70), "eval: P(3 right)");
    assert_prob_exact(
        zone["exceedance"][0]["p"].as_f64().unwrap(),
        &r(17, 70),
        "eval: P(at least 3)",
    );
    assert_eq!(zone["exceedance"][0]["k"], 3);
    // reference: closed form, the total of 8 fair cells is Binomial(8, 1/2): P(total = 4) = 70/256
    let log_eq = doc["total"]["log_likelihood"].as_f64().unwrap();
    let want = (70.0f64 / 256.0).ln();
    assert!(
        (log_eq - want).abs() <= 1e-12,
        "log P(total = 4) {log_eq} vs {want}"
    );
    // reference: closed form, P(total <= 4) = P(total >= 4) = 163/256
    assert_prob(
        doc["total"]["p_at_most"].as_f64().unwrap(),
        163.0 / 256.0,
        "P(total <= 4)",
    );
    assert_prob(
        doc["total"]["p_at_least"].as_f64().unwrap(),
        163.0 / 256.0,
        "P(total >= 4)",
    );
}

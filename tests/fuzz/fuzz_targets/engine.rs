//! The engine on fuzzer-chosen rasters, zones and totals, against its invariants and the naive
//! reference: every pmf non-negative and summing to 1 within its certified bound, within that
//! bound of `engine::reference::conditional_pmf` (the plain one-cell-at-a-time fold) in L1, and
//! the posterior means of a partition summing to the total (closed form: E[sum N_S | N_T = m] = m).
//!
//! Input bytes: width, height, zone count, total, then per cell one byte of probability
//! (0 and 255 are certain, a few values map to tiny or near-1 probabilities, 254 is nodata)
//! and one byte naming its zone.
#![no_main]

use libfuzzer_sys::fuzz_target;
use zonetally::engine::{evaluate, reference, Control, Raster, Settings, Zone};

const U: f64 = f64::EPSILON / 2.0;

fn gamma(k: usize) -> f64 {
    let ku = k as f64 * U;
    ku / (1.0 - ku)
}

fn probability(b: u8) -> Option<f64> {
    match b {
        254 => None,
        1 => Some(1e-300),
        2 => Some(1e-12),
        253 => Some(1.0 - 1e-12),
        _ => Some(f64::from(b) / 255.0),
    }
}

fuzz_target!(|data: &[u8]| {
    let [w, h, z, total, cells @ ..] = data else {
        return;
    };
    let (w, h) = (u32::from(*w % 24) + 1, u32::from(*h % 8) + 1);
    let n = (w * h) as usize;
    if cells.len() < 2 * n {
        return;
    }
    let zones_wanted = usize::from(*z % 6) + 1;
    let values: Vec<Option<f64>> = cells[..n].iter().map(|&b| probability(b)).collect();
    let Ok(raster) = Raster::new(w, h, values.clone()) else {
        return;
    };
    // A partition of the valid cells, plus one zone of every valid cell.
    let mut parts: Vec<Vec<u32>> = vec![Vec::new(); zones_wanted];
    let mut all = Vec::new();
    for (i, v) in values.iter().enumerate() {
        if v.is_some() {
            parts[usize::from(cells[n + i]) % zones_wanted].push(i as u32);
            all.push(i as u32);
        }
    }
    let total = u64::from(*total) % (all.len() as u64 + 1);
    let mut zones: Vec<Zone> = Vec::new();
    for (k, cells) in parts.into_iter().enumerate() {
        if !cells.is_empty() {
            zones.push(Zone::new(format!("p{k}"), cells, &raster).expect("valid cells"));
        }
    }
    if zones.is_empty() {
        return;
    }
    let partition = zones.len();
    zones.push(Zone::new("all", all.clone(), &raster).expect("valid cells"));
    let settings = Settings::new(0.9, vec![1, 2], 1e-13, true).expect("valid settings");
    let Ok(ev) = evaluate(&raster, &zones, total, &settings, &Control::new()) else {
        // An impossible total (more certain cells than it, or fewer possible ones) is refused.
        return;
    };
    for (zone, s) in zones.iter().zip(&ev.zones) {
        let len = zone.cells().len();
        assert!(
            s.pmf.iter().all(|p| p.is_finite() && *p >= 0.0),
            "{}: pmf {:?}",
            s.id,
            s.pmf
        );
        assert!(s.error_bound.is_finite() && s.error_bound >= 0.0);
        let mass: f64 = s.pmf.iter().sum();
        assert!(
            (mass - 1.0).abs() <= s.error_bound + gamma(len + 1),
            "{}: pmf sums to {mass}, bound {:e}",
            s.id,
            s.error_bound
        );
        let exact = reference::conditional_pmf(&raster, zone.cells(), total).expect("possible");
        let mut l1 = 0.0;
        for (k, want) in exact.iter().enumerate() {
            let got = (k as u64)
                .checked_sub(s.offset)
                .and_then(|i| s.pmf.get(i as usize))
                .copied()
                .unwrap_or(0.0);
            l1 += (got - want).abs();
        }
        // The reference's own worst-case L1 rounding on n valid cells, 2 gamma(5n + 4), as
        // tests/engine_invariants.rs derives it (Higham, 2nd ed., Lemma 3.1).
        let reference_rounding = 2.0 * gamma(5 * all.len() + 4);
        assert!(
            l1 <= s.error_bound + reference_rounding,
            "{}: L1 {l1:e} to the reference > bound {:e} + {reference_rounding:e}",
            s.id,
            s.error_bound
        );
    }
    let whole = &ev.zones[partition];
    assert_eq!(
        (whole.offset, whole.pmf.len()),
        (total, 1),
        "the whole raster holds the total"
    );
    let sum: f64 = ev.zones[..partition].iter().map(|s| s.mean).sum();
    let tol: f64 = ev.zones[..partition]
        .iter()
        .map(|s| s.cells as f64 * s.error_bound + gamma(s.cells + 1) * s.mean)
        .sum::<f64>()
        + gamma(partition) * total as f64;
    assert!(
        (sum - total as f64).abs() <= tol,
        "means sum to {sum}, total {total}, tol {tol:e}"
    );
});

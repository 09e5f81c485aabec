//! The evidence rows of `zonetally bench`: W250k-partition under a range, a detected count and
//! an exact total, in one process, each against the exact-total run of the same inputs (time
//! ratio) and against the exact per-total reference (accuracy).
//!
//! The reference for evidence allowing several totals is the mixture over totals m of the
//! engine's exact-total runs, sum_m pi(m) P(N_S = k | total = m), with pi(m) proportional to
//! w(m) P(total = m) taken from each exact-total normaliser's ln P(total = m): a different
//! route from the slack law of one pass (the identity is tested against exact rationals in
//! `tests/engine_exact_rationals.rs`). It costs one exact run per total the posterior holds.
//!
//! Must not: change engine behaviour, write anywhere but the log it is given.

use std::io::Write;
use std::time::Instant;

use serde::Serialize;

use super::workload;
use crate::engine::{
    self, Control, Evidence, Normaliser, Settings, Strata, StratumCells, ZoneSummary,
};

/// The pseudo-workload name that selects these rows.
pub const NAME: &str = "E250k-evidence";
pub const ABOUT: &str =
    "W250k-partition under a range of width 40, 0.8 detection, and its exact total";
/// Totals whose posterior weight is below this share of the largest are left out of the
/// reference mixture (their whole weight is reported as the reference's own truncation).
const REFERENCE_FLOOR: f64 = 1e-17;

/// One form of evidence on the W250k-partition inputs.
#[derive(Clone, Debug, Serialize)]
pub struct EvidenceRow {
    pub form: String,
    /// ours: `Normaliser::of` + plan + execute, seconds (the best of `RUNS` runs).
    pub ours_s: f64,
    /// The normaliser's share (not separated under strata).
    pub normaliser_s: Option<f64>,
    /// The exact total's time in the same run, and ours / that.
    pub exact_s: f64,
    pub ratio: f64,
    /// The largest ratio the issue allows (3 for a range and detection, 1.5 for strata).
    pub goal: f64,
    /// Totals in the reference mixture, its time, and the max abs difference of ours from it.
    pub reference_totals: Option<usize>,
    pub reference_s: Option<f64>,
    pub max_abs_diff: Option<f64>,
    /// Largest certified bound over the zones.
    pub max_error_bound: f64,
    /// The posterior of the true total: mean and the 90% interval.
    pub total_mean: Option<f64>,
    pub total_interval: Option<(u64, u64)>,
}

struct Run {
    seconds: f64,
    normaliser_s: f64,
    normaliser: Normaliser,
    zones: Vec<ZoneSummary>,
}

fn run_once(inputs: &workload::Inputs, evidence: &Evidence) -> Result<Run, String> {
    let control = Control::new();
    let settings = Settings::default();
    let t = Instant::now();
    let normaliser = Normaliser::of(&inputs.raster, evidence, &control)
        .map_err(|e| format!("{NAME}: normaliser failed: {e}"))?;
    let normaliser_s = t.elapsed().as_secs_f64();
    let plan = engine::plan(&inputs.raster, &inputs.zones);
    let zones = engine::execute(
        &plan,
        &inputs.raster,
        &inputs.zones,
        &normaliser,
        &settings,
        &control,
    )
    .map_err(|e| format!("{NAME}: execute failed: {e}"))?;
    Ok(Run {
        seconds: t.elapsed().as_secs_f64(),
        normaliser_s,
        normaliser,
        zones,
    })
}

/// Runs of each form timed; the best is kept. The first warms the allocator and the caches,
/// and one run takes some 40 ms, so a single stall of the machine can double it (the best of
/// two once measured the strata row at 2.15x, and 1.24x on the next run).
const RUNS: usize = 5;

/// The best of `RUNS` runs.
fn timed(inputs: &workload::Inputs, evidence: &Evidence) -> Result<Run, String> {
    let mut best = run_once(inputs, evidence)?;
    for _ in 1..RUNS {
        let next = run_once(inputs, evidence)?;
        if next.seconds < best.seconds {
            best = next;
        }
    }
    Ok(best)
}

/// The reference mixture over the totals `totals` with log-weights ln w(m): max abs
/// difference from `ours` over every zone and value, and the number of totals used.
fn reference(
    inputs: &workload::Inputs,
    totals: (u64, u64),
    ln_w: &dyn Fn(u64) -> f64,
    ours: &[ZoneSummary],
) -> Result<(usize, f64), String> {
    let control = Control::new();
    let logs: Vec<(u64, f64)> = (totals.0..=totals.1)
        .map(|m| {
            let n = Normaliser::new(&inputs.raster, m, &control)
                .map_err(|e| format!("{NAME}: reference normaliser at {m}: {e}"))?;
            Ok((m, ln_w(m) + n.check.log_likelihood))
        })
        .collect::<Result<_, String>>()?;
    let top = logs.iter().map(|l| l.1).fold(f64::NEG_INFINITY, f64::max);
    let kept: Vec<(u64, f64)> = logs
        .into_iter()
        .map(|(m, l)| (m, (l - top).exp()))
        .filter(|&(_, x)| x >= REFERENCE_FLOOR)
        .collect();
    let s: f64 = kept.iter().map(|k| k.1).sum();
    let mut mixed: Vec<Vec<f64>> = inputs
        .zones
        .iter()
        .map(|z| vec![0.0; z.len() + 1])
        .collect();
    let settings = Settings::default();
    let plan = engine::plan(&inputs.raster, &inputs.zones);
    for &(m, x) in &kept {
        let n = Normaliser::new(&inputs.raster, m, &control).map_err(|e| e.to_string())?;
        let zones = engine::execute(
            &plan,
            &inputs.raster,
            &inputs.zones,
            &n,
            &settings,
            &control,
        )
        .map_err(|e| e.to_string())?;
        for (zi, z) in zones.iter().enumerate() {
            for (i, p) in z.pmf.iter().enumerate() {
                mixed[zi][z.offset as usize + i] += x / s * p;
            }
        }
    }
    let mut worst = 0.0f64;
    for (zi, z) in ours.iter().enumerate() {
        for (k, want) in mixed[zi].iter().enumerate() {
            let k = k as u64;
            let got = if k >= z.offset {
                z.pmf.get((k - z.offset) as usize).copied().unwrap_or(0.0)
            } else {
                0.0
            };
            worst = worst.max((got - want).abs());
        }
    }
    Ok((kept.len(), worst))
}

/// Runs the evidence rows, writing progress to `log`.
pub fn run(log: &mut dyn Write) -> Result<Vec<EvidenceRow>, String> {
    let mut say = |m: &str| {
        let _ = writeln!(log, "[bench] {NAME}: {m}");
    };
    let w = workload::find("W250k-partition").ok_or("W250k-partition is missing")?;
    say("generating inputs");
    let inputs = w.build(false);
    let raster = &inputs.raster;
    let m = inputs.total;
    let exact = Evidence::exact_total(m, raster).map_err(|e| e.to_string())?;
    say("exact total");
    let base = timed(&inputs, &exact)?;
    let mut rows = vec![row("exact total", &base, base.seconds, None)];

    let (a, b) = (m - 20, m + 20);
    say("range of width 40");
    let range = Evidence::range(a, b, raster).map_err(|e| e.to_string())?;
    let ours = timed(&inputs, &range)?;
    say("range: reference mixture");
    let t = Instant::now();
    let r = reference(&inputs, (a, b), &|_| 0.0, &ours.zones)?;
    rows.push(row(
        &format!("range [{a}, {b}]"),
        &ours,
        base.seconds,
        Some((r, t.elapsed().as_secs_f64())),
    ));

    let detected = (0.8 * m as f64).round() as u64;
    say("detection 0.8");
    let det = Evidence::detected(detected, 0.8, raster).map_err(|e| e.to_string())?;
    let ours = timed(&inputs, &det)?;
    let post = ours
        .normaliser
        .check
        .posterior
        .as_ref()
        .ok_or("a posterior of the total")?;
    // The reference's totals: the posterior's support (trimmed where its mass is below the
    // normaliser's budget, some 1e-30), widened by a tenth on each side.
    let span = (post.pmf.len() as u64 / 10).max(1);
    let lo = post.offset.saturating_sub(span).max(detected);
    let hi = post.offset + post.pmf.len() as u64 + span;
    say("detection: reference mixture");
    let t = Instant::now();
    // w(N) = Binomial(detected; N, 0.8), in logs (its common factor cancels).
    let ln_w = |n: u64| -> f64 {
        let (n, d) = (n as f64, detected as f64);
        ln_choose(n, d) + d * 0.8f64.ln() + (n - d) * 0.2f64.ln()
    };
    let r = reference(&inputs, (lo, hi), &ln_w, &ours.zones)?;
    rows.push(row(
        &format!("{detected} detected at 0.8"),
        &ours,
        base.seconds,
        Some((r, t.elapsed().as_secs_f64())),
    ));
    say("12 strata");
    rows.push(strata_row(&inputs, base.seconds)?);
    Ok(rows)
}

/// Heights, in rows of zones (10 raster rows), of the 12 horizontal strata: unequal, 50 in all.
const STRATA_BANDS: [u32; 12] = [1, 2, 3, 4, 5, 6, 7, 8, 1, 2, 5, 6];

/// W250k-partition cut into 12 bands of unequal height, each with its exact total (its prior
/// mean + 1.5 sd). Every zone lies in one band; the reference is the plain one-cell-at-a-time
/// conditional law (`engine::reference`) of one zone per band within its band.
fn strata_row(inputs: &workload::Inputs, exact_s: f64) -> Result<EvidenceRow, String> {
    let raster = &inputs.raster;
    let width = raster.width();
    let mut parts = Vec::new();
    let mut row0 = 0u32;
    for (i, h) in STRATA_BANDS.iter().enumerate() {
        let rows = h * 10;
        let cells: Vec<u32> = (row0 * width..(row0 + rows) * width).collect();
        row0 += rows;
        let s = StratumCells::new(format!("band-{i}"), cells, raster).map_err(|e| e.to_string())?;
        let st = s.raster().stats();
        let m = ((st.sum_p + 1.5 * st.sum_var.sqrt()).round() as u64).min(st.certain + st.free);
        let e = Evidence::exact_total(m, s.raster()).map_err(|e| e.to_string())?;
        parts.push((s, e));
    }
    let strata = Strata::new(parts.clone()).map_err(|e| e.to_string())?;
    let settings = Settings::default();
    let mut best: Option<(f64, engine::StrataEvaluation)> = None;
    for _ in 0..RUNS {
        let t = Instant::now();
        let got =
            engine::execute_strata(raster, &inputs.zones, &strata, &settings, &Control::new())
                .map_err(|e| format!("{NAME}: strata failed: {e}"))?;
        let s = t.elapsed().as_secs_f64();
        if best.as_ref().is_none_or(|b| s < b.0) {
            best = Some((s, got));
        }
    }
    let (seconds, got) = best.expect("RUNS is at least one");
    // reference: engine::reference::conditional_pmf, the plain fold, for the first zone of
    // each band within its band
    let t = Instant::now();
    let mut worst = 0.0f64;
    let mut checked = 0;
    for (s, e) in &parts {
        // A band is contiguous in raster order: cell c is its cell c - first.
        let first = s.first_cell();
        let Some((zi, z)) = inputs
            .zones
            .iter()
            .enumerate()
            .find(|(_, z)| z.cells().first().is_some_and(|c| c.0 >= first))
        else {
            continue;
        };
        let local: Vec<engine::CellIndex> = z
            .cells()
            .iter()
            .map(|c| engine::CellIndex(c.0 - first))
            .collect();
        let m = e.total().expect("exact totals");
        let want = engine::reference::conditional_pmf(s.raster(), &local, m)
            .ok_or("the reference found a band's total impossible")?;
        let ours = &got.zones[zi];
        for (k, w) in want.iter().enumerate() {
            let k = k as u64;
            let g = if k >= ours.offset {
                ours.pmf
                    .get((k - ours.offset) as usize)
                    .copied()
                    .unwrap_or(0.0)
            } else {
                0.0
            };
            worst = worst.max((g - w).abs());
        }
        checked += 1;
    }
    Ok(EvidenceRow {
        form: "12 strata with exact totals".into(),
        ours_s: seconds,
        normaliser_s: None,
        exact_s,
        ratio: seconds / exact_s,
        goal: 1.5,
        reference_totals: Some(checked),
        reference_s: Some(t.elapsed().as_secs_f64()),
        max_abs_diff: Some(worst),
        max_error_bound: got.zones.iter().map(|z| z.error_bound).fold(0.0, f64::max),
        total_mean: None,
        total_interval: None,
    })
}

/// ln C(n, k) by summing logs (exact enough for weights that only need relative 1e-12).
fn ln_choose(n: f64, k: f64) -> f64 {
    let k = k.min(n - k);
    (0..k as u64)
        .map(|i| ((n - i as f64) / (i as f64 + 1.0)).ln())
        .sum()
}

fn row(form: &str, run: &Run, exact_s: f64, reference: Option<((usize, f64), f64)>) -> EvidenceRow {
    let post = run.normaliser.check.posterior.as_ref();
    let summary = post.map(|p| engine::summarise(p.offset, &p.pmf, 0.9, &[]));
    EvidenceRow {
        form: form.into(),
        ours_s: run.seconds,
        normaliser_s: Some(run.normaliser_s),
        exact_s,
        ratio: run.seconds / exact_s,
        goal: 3.0,
        reference_totals: reference.map(|r| r.0 .0),
        reference_s: reference.map(|r| r.1),
        max_abs_diff: reference.map(|r| r.0 .1),
        max_error_bound: run.zones.iter().map(|z| z.error_bound).fold(0.0, f64::max),
        total_mean: summary.as_ref().map(|s| s.mean),
        total_interval: summary.map(|s| (s.interval.lower, s.interval.upper)),
    }
}

//! The scenario rows of `zonetally bench`: 1,000 scenarios of W250k-partition given its exact
//! total, with zone counts only and with event cells, against one `zone-counts` evaluation of
//! the same inputs in the same run, and against the plain way of getting such maps (simulate
//! the raster, keep the fields whose total matches) on a budget of kept maps.
//!
//! Must not: change engine behaviour, write anywhere but the log it is given.

use std::io::Write;
use std::time::Instant;

use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use rayon::prelude::*;
use serde::Serialize;

use super::workload;
use crate::api::wire::ScenarioList;
use crate::engine::{self, Control, Normaliser, Sampler, Settings};

/// The pseudo-workload name that selects these rows.
pub const NAME: &str = "S250k-scenarios";
pub const ABOUT: &str =
    "1,000 scenarios of W250k-partition, and simulate-and-keep on a budget of 20 kept maps";
/// Scenarios per run of ours.
const SCENARIOS: u64 = 1000;
/// Kept maps the simulate-and-keep baseline runs to, and the most time it is given.
const KEPT: u64 = 20;
const BASELINE_LIMIT_S: f64 = 120.0;
/// Simulated fields per parallel batch of the baseline.
const BATCH: u64 = 64;
/// Timed runs of ours and of `zone-counts`; the best is kept (see `evidence::RUNS`).
const RUNS: usize = 3;

#[derive(Clone, Debug, Serialize)]
pub struct ScenarioRow {
    /// One `zone-counts` evaluation (normaliser, plan, execute), seconds.
    pub zone_counts_s: f64,
    /// 1,000 scenarios with zone counts only (normaliser, tree, draws), seconds, and / the above.
    pub counts_s: f64,
    pub counts_ratio: f64,
    /// The tree's share of `counts_s`.
    pub tree_s: f64,
    /// 1,000 scenarios with event cells, seconds; the JSON bytes per scenario as the service
    /// sends it, and the bytes one scenario holds in memory.
    pub cells_s: f64,
    pub json_bytes_per_scenario: f64,
    pub memory_bytes_per_scenario: f64,
    /// The planned costs (multiply-adds estimated before running) of `zone-counts` and of the
    /// scenarios, so their scale can be compared with the times.
    pub zone_counts_cost: f64,
    pub counts_cost: f64,
    pub cells_cost: f64,
    /// The simulate-and-keep baseline: fields simulated, kept, seconds; the acceptance rate and
    /// the seconds per kept map, beside ours per scenario (with event cells).
    pub baseline_fields: u64,
    pub baseline_kept: u64,
    pub baseline_s: f64,
    pub acceptance: f64,
    pub baseline_per_kept_s: Option<f64>,
    pub ours_per_scenario_s: f64,
    /// Largest error bound: of the zone results, and of the scenarios.
    pub zone_counts_bound: f64,
    pub scenario_bound: f64,
}

fn best<T>(mut f: impl FnMut() -> Result<(f64, T), String>) -> Result<(f64, T), String> {
    let mut kept = f()?;
    for _ in 1..RUNS {
        let next = f()?;
        if next.0 < kept.0 {
            kept = next;
        }
    }
    Ok(kept)
}

/// Simulates fields of `p` (each cell an independent draw) until `KEPT` have total `m` or the
/// time limit passes: (fields, kept, seconds).
fn simulate_and_keep(p: &[f64], m: u64) -> (u64, u64, f64) {
    let t = Instant::now();
    let (mut fields, mut kept) = (0u64, 0u64);
    let mut batch = 0u64;
    while kept < KEPT && t.elapsed().as_secs_f64() < BASELINE_LIMIT_S {
        let hits: u64 = (0..BATCH)
            .into_par_iter()
            .map(|i| {
                let mut rng = ChaCha8Rng::seed_from_u64(batch * BATCH + i);
                let total = p.iter().filter(|&&q| rng.gen::<f64>() < q).count() as u64;
                u64::from(total == m)
            })
            .sum();
        fields += BATCH;
        kept += hits;
        batch += 1;
    }
    (fields, kept, t.elapsed().as_secs_f64())
}

/// Runs the scenario rows, writing progress to `log`.
pub fn run(log: &mut dyn Write) -> Result<ScenarioRow, String> {
    let mut say = |m: &str| {
        let _ = writeln!(log, "[bench] {NAME}: {m}");
    };
    let w = workload::find("W250k-partition").ok_or("W250k-partition is missing")?;
    say("generating inputs");
    let inputs = w.build(false);
    let (raster, zones, m) = (&inputs.raster, &inputs.zones, inputs.total);
    let control = Control::new();
    let settings = Settings::default();
    let fail = |what: &str, e: engine::EngineError| format!("{NAME}: {what} failed: {e}");

    say("one zone-counts evaluation");
    let plan = engine::plan(raster, zones);
    let (zone_counts_s, zone_counts_bound) = best(|| {
        let t = Instant::now();
        let n = Normaliser::new(raster, m, &control).map_err(|e| fail("normaliser", e))?;
        let plan = engine::plan(raster, zones);
        let out = engine::execute(&plan, raster, zones, &n, &settings, &control)
            .map_err(|e| fail("execute", e))?;
        let bound = out.iter().map(|z| z.error_bound).fold(0.0, f64::max);
        Ok((t.elapsed().as_secs_f64(), bound))
    })?;

    let draw = |cells: bool| {
        best(|| {
            let t = Instant::now();
            let n = Normaliser::new(raster, m, &control).map_err(|e| fail("normaliser", e))?;
            let s = Sampler::new(raster, zones, &n, &control).map_err(|e| fail("tree", e))?;
            let tree_s = t.elapsed().as_secs_f64();
            let out = engine::scenarios(&s, SCENARIOS, 1, cells, &control)
                .map_err(|e| fail("draws", e))?;
            Ok((t.elapsed().as_secs_f64(), (tree_s, s.error_bound, out)))
        })
    };
    say("1,000 scenarios, zone counts only");
    let (counts_s, (tree_s, scenario_bound, counted)) = draw(false)?;
    for d in &counted {
        if d.zones.iter().sum::<u64>() != m {
            return Err(format!(
                "{NAME}: a scenario's zones do not hold the total {m}"
            ));
        }
    }
    say("1,000 scenarios with event cells");
    let (cells_s, (_, _, with_cells)) = draw(true)?;
    let memory: usize = with_cells
        .iter()
        .map(|d| d.zones.len() * 8 + d.cells.as_ref().map_or(0, Vec::len) * 4)
        .sum();
    let ids: Vec<String> = zones.iter().map(|z| z.id().to_string()).collect();
    let json = serde_json::to_vec(&ScenarioList {
        ids,
        draws: with_cells,
    })
    .map_err(|e| format!("{NAME}: cannot encode the scenarios: {e}"))?;

    say(&format!(
        "simulate and keep fields of total {m}, up to {KEPT} kept or {BASELINE_LIMIT_S} s"
    ));
    let p: Vec<f64> = raster
        .values()
        .iter()
        .map(|&v| if v.is_nan() { 0.0 } else { v })
        .collect();
    let (fields, kept, baseline_s) = simulate_and_keep(&p, m);

    let free = raster.stats().free;
    Ok(ScenarioRow {
        zone_counts_s,
        counts_s,
        counts_ratio: counts_s / zone_counts_s,
        tree_s,
        cells_s,
        json_bytes_per_scenario: json.len() as f64 / SCENARIOS as f64,
        memory_bytes_per_scenario: memory as f64 / SCENARIOS as f64,
        zone_counts_cost: plan.estimated_cost,
        counts_cost: engine::scenario_cost(free, SCENARIOS, m, false),
        cells_cost: engine::scenario_cost(free, SCENARIOS, m, true),
        baseline_fields: fields,
        baseline_kept: kept,
        baseline_s,
        acceptance: kept as f64 / fields as f64,
        baseline_per_kept_s: (kept > 0).then(|| baseline_s / kept as f64),
        ours_per_scenario_s: cells_s / SCENARIOS as f64,
        zone_counts_bound,
        scenario_bound,
    })
}

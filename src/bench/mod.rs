//! `zonetally bench`: deterministic workloads, the engine against plain baselines, in one process.
//!
//! Owns the workload generator (`workload`), the baselines (`baseline`) and the measurements:
//! wall-clock times of the engine's phases (normaliser, plan, execute) on the default rayon pool
//! and on one thread, the baselines' times, the max abs differences between pmfs, peak resident
//! memory and the targets of issue 2, printed as PASS or MISS beside what was measured. It only
//! calls the engine's public API and never changes engine behaviour.
//!
//! What each figure means:
//! - ours: `Normaliser::new` + `engine::plan` + `engine::execute` (for the cell workload,
//!   `Normaliser::new` + `engine::cell_posterior`), default settings (tolerance 1e-13), on a
//!   rayon pool of the default size and again on a one-thread pool.
//! - (a) includes planning its union tree (for the cell workload, over one singleton zone per
//!   cell, built outside the timing). (b) and (c) run on a seeded sample of `SAMPLE` zones and
//!   their times are scaled by zones / sample; (b)'s zones run side by side on the pool, each on
//!   one thread, and its time is the sum of the per-zone times. The exact reference is (b) on
//!   the sample; (c) zones whose deconvolution gave non-finite values are counted apart.
//! - Peak RSS is VmHWM from /proc/self/status, reset (by writing 5 to /proc/self/clear_refs) when
//!   the workload starts, so it includes building the raster and zones, and whatever the
//!   allocator kept from earlier workloads of the run ("RSS at start"); the "engine only" figure
//!   is reset again after the inputs exist. cells/s is raster cells over ours' total time.
//!
//! The GIS rows (`gis`) add GeoTIFF reading and polygon rasterising against rasterio, and a
//! workload through the service's router; see that module for what they measure.
//!
//! Must not: write anywhere but the log it is given, /proc/self/clear_refs and the GIS rows'
//! temporary folder (the binary prints the rendered table and writes the JSON file), read
//! anything but /proc/self/status and those fixtures, or start any process but the rasterio
//! script.

pub mod baseline;
pub mod evidence;
pub mod gis;
pub mod scenarios;
pub mod workload;

use std::io::Write;
use std::time::Instant;

use rayon::prelude::*;
use serde::Serialize;

use crate::engine::{self, Control, Normaliser, Settings, ZoneSummary};
use baseline::{Pmf, HALF_WINDOW, WINDOW};
use workload::{Shape, Workload, SAMPLE_SEED, WORKLOADS};

/// Zones in the sample of the per-zone baselines (b) and (c).
pub const SAMPLE: usize = 50;
/// Accuracy contract of the engine at the default tolerance.
pub const TARGET_DIFF: f64 = 1e-13;

/// Timings of one run of ours, in seconds.
#[derive(Clone, Debug, Default, Serialize)]
pub struct Timing {
    pub normaliser_s: f64,
    /// `None` for the cell posterior, which plans nothing.
    pub plan_s: Option<f64>,
    pub execute_s: f64,
    pub total_s: f64,
}

/// Comparison with `engine::reference::conditional_pmf` on a few sample zones.
#[derive(Clone, Debug, Default, Serialize)]
pub struct ReferenceCheck {
    pub zones: usize,
    pub seconds: f64,
    pub max_abs_diff_ours: f64,
    pub max_abs_diff_b: Option<f64>,
}

/// Everything measured on one workload. `None` marks what was not run (see `notes`).
#[derive(Clone, Debug, Default, Serialize)]
pub struct Row {
    pub workload: String,
    pub about: String,
    pub width: u32,
    pub height: u32,
    pub zones: usize,
    /// Zone-cell memberships, counted with multiplicity.
    pub zone_cells: u64,
    pub total: u64,
    pub prior_mean: f64,
    pub prior_sd: f64,
    pub threads: usize,
    pub generate_s: f64,
    pub ours: Timing,
    pub ours_one_thread: Timing,
    pub a_s: Option<f64>,
    pub a_ratio: Option<f64>,
    pub a_ratio_one_thread: Option<f64>,
    pub sample: Option<usize>,
    pub b_sample_s: Option<f64>,
    pub b_scaled_s: Option<f64>,
    pub b_ratio: Option<f64>,
    pub c_setup_s: Option<f64>,
    pub c_sample_s: Option<f64>,
    pub c_scaled_s: Option<f64>,
    /// Max abs differences from the exact reference (b) over the sample.
    pub diff_ours_ref: Option<f64>,
    pub diff_a_ref: Option<f64>,
    /// Over the sample zones where (c) gave finite values only.
    pub diff_c_ref: Option<f64>,
    /// Sample zones where (c) gave non-finite values (a division by an FFT value rounded to 0).
    pub c_nonfinite_zones: Option<usize>,
    /// Max abs difference of ours from (a) over all zones.
    pub diff_ours_a: Option<f64>,
    pub engine_reference: Option<ReferenceCheck>,
    pub raster_bytes: usize,
    /// VmRSS when the workload started (left over from earlier workloads of the run).
    pub start_rss_bytes: Option<u64>,
    pub peak_rss_bytes: Option<u64>,
    pub peak_rss_ratio: Option<f64>,
    pub engine_rss_bytes: Option<u64>,
    pub engine_rss_ratio: Option<f64>,
    pub cells_per_s: f64,
    pub notes: Vec<String>,
}

/// One target of issue 2 and how the measurement compares.
#[derive(Clone, Debug, Serialize)]
pub struct Target {
    pub name: String,
    pub goal: String,
    pub measured: Option<f64>,
    /// `None` when the workloads it needs were not run.
    pub pass: Option<bool>,
}

/// The whole benchmark run.
#[derive(Clone, Debug, Serialize)]
pub struct Report {
    pub rows: Vec<Row>,
    pub evidence: Vec<evidence::EvidenceRow>,
    pub gis: Vec<gis::GisRow>,
    pub scenarios: Option<scenarios::ScenarioRow>,
    pub targets: Vec<Target>,
}

/// The workloads a run goes through: engine workloads, then GIS ones.
#[derive(Clone, Debug, Default)]
pub struct Selection {
    pub engine: Vec<&'static Workload>,
    /// The evidence rows (`evidence::NAME`).
    pub evidence: bool,
    /// The scenario rows (`scenarios::NAME`).
    pub scenarios: bool,
    pub gis: Vec<&'static str>,
}

impl Selection {
    pub fn len(&self) -> usize {
        self.engine.len() + self.evidence as usize + self.scenarios as usize + self.gis.len()
    }
    pub fn is_empty(&self) -> bool {
        self.len() == 0
    }
}

/// The workload names and what they hold, one per line.
pub fn list() -> String {
    let engine = WORKLOADS
        .iter()
        .map(|w| format!("{:<16} {}\n", w.name, w.about));
    let geo = gis::GIS_WORKLOADS
        .iter()
        .map(|(n, a)| format!("{n:<16} {a}\n"));
    let evidence = std::iter::once(format!("{:<16} {}\n", evidence::NAME, evidence::ABOUT));
    let draws = std::iter::once(format!("{:<16} {}\n", scenarios::NAME, scenarios::ABOUT));
    engine.chain(evidence).chain(draws).chain(geo).collect()
}

/// Resolves `--workload`: one by name, or all of them.
pub fn select(name: Option<&str>) -> Result<Selection, String> {
    let Some(n) = name else {
        return Ok(Selection {
            engine: WORKLOADS.iter().collect(),
            evidence: true,
            scenarios: true,
            gis: gis::GIS_WORKLOADS.iter().map(|(n, _)| *n).collect(),
        });
    };
    if let Some(w) = workload::find(n) {
        return Ok(Selection {
            engine: vec![w],
            ..Selection::default()
        });
    }
    if n.eq_ignore_ascii_case(evidence::NAME) {
        return Ok(Selection {
            evidence: true,
            ..Selection::default()
        });
    }
    if n.eq_ignore_ascii_case(scenarios::NAME) {
        return Ok(Selection {
            scenarios: true,
            ..Selection::default()
        });
    }
    if let Some(g) = gis::find(n) {
        return Ok(Selection {
            gis: vec![g],
            ..Selection::default()
        });
    }
    let names: Vec<&str> = WORKLOADS
        .iter()
        .map(|w| w.name)
        .chain(std::iter::once(evidence::NAME))
        .chain(std::iter::once(scenarios::NAME))
        .chain(gis::GIS_WORKLOADS.iter().map(|(n, _)| *n))
        .collect();
    Err(format!(
        "--workload `{n}` is not a workload: use one of {} (see --list)",
        names.join(", ")
    ))
}

/// Runs the workloads in order, writing progress to `log`, and returns the report.
pub fn run(selection: &Selection, log: &mut dyn Write) -> Result<Report, String> {
    let mut rows = Vec::new();
    for w in &selection.engine {
        rows.push(run_one(w, log)?);
    }
    let evidence = if selection.evidence {
        evidence::run(log)?
    } else {
        Vec::new()
    };
    let drawn = if selection.scenarios {
        Some(scenarios::run(log)?)
    } else {
        None
    };
    let gis = gis::run(&selection.gis, log)?;
    let mut targets = targets(&rows);
    targets.extend(evidence_targets(&evidence));
    targets.extend(scenario_targets(drawn.as_ref()));
    targets.extend(gis_targets(&gis));
    Ok(Report {
        rows,
        evidence,
        gis,
        scenarios: drawn,
        targets,
    })
}

/// The targets of the evidence rows (issue 12): within 3x the exact total's time (1.5x for
/// strata), within the accuracy contract of the reference.
pub fn evidence_targets(rows: &[evidence::EvidenceRow]) -> Vec<Target> {
    let mut out = Vec::new();
    for r in rows.iter().filter(|r| r.max_abs_diff.is_some()) {
        let goal = r.goal;
        out.push(target(
            &format!("{}: {} / exact total", evidence::NAME, r.form),
            &format!("<= {goal}"),
            Some(r.ratio),
            |x| x <= goal,
        ));
        out.push(target(
            &format!("{}: {}: max |ours - reference|", evidence::NAME, r.form),
            "<= 1e-13",
            r.max_abs_diff,
            |x| x <= TARGET_DIFF,
        ));
    }
    out
}

/// The evidence rows as lines of text.
fn render_evidence(rows: &[evidence::EvidenceRow]) -> String {
    let mut s = format!("\nevidence rows ({})\n", evidence::ABOUT);
    for r in rows {
        s.push_str(&format!(
            "  {}: ours {} (normaliser {}), {} of the exact total's {}; max bound {}\n",
            r.form,
            time(r.ours_s),
            opt(r.normaliser_s, time),
            ratio(r.ratio),
            time(r.exact_s),
            diff(r.max_error_bound)
        ));
        if let (Some(n), Some(t), Some(d)) = (r.reference_totals, r.reference_s, r.max_abs_diff) {
            s.push_str(&format!(
                "    reference ({n} totals, or zones for strata) in {}: max |ours - reference| {}\n",
                time(t),
                diff(d)
            ));
        }
        if let (Some(m), Some((lo, hi))) = (r.total_mean, r.total_interval) {
            s.push_str(&format!(
                "    posterior of the true total: mean {m:.1}, 90% interval {lo} to {hi}\n"
            ));
        }
    }
    s
}

/// The target of the scenario rows (issue 9): 1,000 scenarios with zone counts within 20x one
/// `zone-counts` evaluation of the same request.
pub fn scenario_targets(row: Option<&scenarios::ScenarioRow>) -> Vec<Target> {
    let Some(r) = row else {
        return Vec::new();
    };
    vec![target(
        &format!("{}: 1,000 scenarios / zone-counts", scenarios::NAME),
        "<= 20",
        Some(r.counts_ratio),
        |x| x <= 20.0,
    )]
}

/// The scenario rows as lines of text.
fn render_scenarios(r: &scenarios::ScenarioRow) -> String {
    let mut s = format!(
        "
scenario rows ({})
",
        scenarios::ABOUT
    );
    s.push_str(&format!(
        "  zone-counts once: {} (planned cost {:.3e}); max bound {}\n",
        time(r.zone_counts_s),
        r.zone_counts_cost,
        diff(r.zone_counts_bound)
    ));
    s.push_str(&format!(
        "  1,000 scenarios, zone counts: {} (tree {}; planned cost {:.3e}), {} of zone-counts; bound {}\n",
        time(r.counts_s),
        time(r.tree_s),
        r.counts_cost,
        ratio(r.counts_ratio),
        diff(r.scenario_bound)
    ));
    s.push_str(&format!(
        "  1,000 scenarios with event cells: {} (planned cost {:.3e}); {:.0} JSON bytes and {:.0} bytes in memory per scenario\n",
        time(r.cells_s),
        r.cells_cost,
        r.json_bytes_per_scenario,
        r.memory_bytes_per_scenario
    ));
    s.push_str(&format!(
        "  simulate and keep: {} fields in {}, {} kept (acceptance {:.2e}); {} per kept map vs ours {} per scenario{}\n",
        r.baseline_fields,
        time(r.baseline_s),
        r.baseline_kept,
        r.acceptance,
        opt(r.baseline_per_kept_s, time),
        time(r.ours_per_scenario_s),
        r.baseline_per_kept_s
            .map(|b| format!(" ({:.0}x)", b / r.ours_per_scenario_s))
            .unwrap_or_default()
    ));
    s
}

/// The targets of the GIS rows.
pub fn gis_targets(rows: &[gis::GisRow]) -> Vec<Target> {
    let get = |name: &str| rows.iter().find(|r| r.workload == name);
    let mut out = Vec::new();
    if let Some(r) = get("G-read-5000") {
        out.push(target(
            "G-read-5000: t(ours) / t(rasterio)",
            "<= 1",
            r.ratio,
            |x| x <= 1.0,
        ));
    }
    if let Some(r) = get("G-rasterise-10k") {
        out.push(target(
            "G-rasterise-10k: t(ours) / t(rasterio)",
            "<= 1",
            r.ratio,
            |x| x <= 1.0,
        ));
    }
    if let Some(r) = get("G-service-W25M") {
        out.push(target(
            "G-service-W25M: service wall / engine",
            "<= 2",
            r.wall_over_engine,
            |x| x <= 2.0,
        ));
        out.push(target(
            "G-service-W25M: peak RSS / raster f64 bytes",
            "<= 3",
            r.peak_rss_ratio,
            |x| x <= 3.0,
        ));
    }
    out
}

/// The GIS rows as lines of text.
fn render_gis(rows: &[gis::GisRow]) -> String {
    let mut s = String::from("\nGIS rows\n");
    for r in rows {
        s.push_str(&format!("  {}: {}\n", r.workload, r.about));
        if let Some([own_p50, own_max, shared_p50, shared_max]) = r.sync_latency_s {
            s.push_str(&format!(
                "    own pool: median {}, max {}; shared pool: median {}, max {}\n",
                time(own_p50),
                time(own_max),
                time(shared_p50),
                time(shared_max)
            ));
            for n in &r.notes {
                s.push_str(&format!("    note: {n}\n"));
            }
            continue;
        }
        match (r.engine_s, r.rasterio_s) {
            (Some(e), _) => s.push_str(&format!(
                "    service wall {}, engine {}, wall / engine {}\n",
                time(r.ours_s),
                time(e),
                opt(r.wall_over_engine, |x| format!("{x:.2}"))
            )),
            (None, rasterio) => s.push_str(&format!(
                "    ours {}, rasterio {}, ours / rasterio {}\n",
                time(r.ours_s),
                opt(rasterio, time),
                opt(r.ratio, |x| format!("{x:.2}"))
            )),
        }
        if let Some(bytes) = r.raster_bytes {
            s.push_str(&format!(
                "    raster f64 {}, RSS at start {}, peak RSS {}, peak / raster {}\n",
                mib(bytes),
                opt(r.start_rss_bytes.map(|b| b as f64), |b| mib(b as u64)),
                opt(r.peak_rss_bytes.map(|b| b as f64), |b| mib(b as u64)),
                opt(r.peak_rss_ratio, |x| format!("{x:.2}x"))
            ));
        }
        for n in &r.notes {
            s.push_str(&format!("    note: {n}\n"));
        }
    }
    s
}

fn secs(t: Instant) -> f64 {
    t.elapsed().as_secs_f64()
}

/// A `Vm...:` figure of /proc/self/status in bytes, when the file has it.
fn status_bytes(key: &str) -> Option<u64> {
    let status = std::fs::read_to_string("/proc/self/status").ok()?;
    let line = status.lines().find(|l| l.starts_with(key))?;
    let kib: u64 = line.split_whitespace().nth(1)?.parse().ok()?;
    Some(kib * 1024)
}

/// VmHWM: peak resident memory since start or since the last reset.
fn peak_rss() -> Option<u64> {
    status_bytes("VmHWM:")
}

/// Resets VmHWM to the current RSS; false when the kernel does not allow it.
fn reset_peak_rss() -> bool {
    std::fs::write("/proc/self/clear_refs", "5").is_ok()
}

/// The engine's results, as pmfs in zone (or cell) order.
struct Ours {
    timing: Timing,
    pmfs: Vec<Pmf>,
}

fn ours(w: &Workload, inputs: &workload::Inputs) -> Result<Ours, String> {
    let control = Control::new();
    let settings = Settings::default();
    let t0 = Instant::now();
    let normaliser = Normaliser::new(&inputs.raster, inputs.total, &control)
        .map_err(|e| format!("{}: normaliser failed: {e}", w.name))?;
    let normaliser_s = secs(t0);
    if w.shape == Shape::Cells {
        let t1 = Instant::now();
        let post = engine::cell_posterior(&inputs.raster, None, &normaliser, &settings, &control)
            .map_err(|e| format!("{}: cell posterior failed: {e}", w.name))?;
        let execute_s = secs(t1);
        let pmfs = post
            .cells
            .iter()
            .map(|&(_, _, q)| Pmf {
                offset: 0,
                values: vec![1.0 - q, q],
            })
            .collect();
        return Ok(Ours {
            timing: Timing {
                normaliser_s,
                plan_s: None,
                execute_s,
                total_s: secs(t0),
            },
            pmfs,
        });
    }
    let t1 = Instant::now();
    let plan = engine::plan(&inputs.raster, &inputs.zones);
    let plan_s = secs(t1);
    let t2 = Instant::now();
    let summaries: Vec<ZoneSummary> = engine::execute(
        &plan,
        &inputs.raster,
        &inputs.zones,
        &normaliser,
        &settings,
        &control,
    )
    .map_err(|e| format!("{}: execute failed: {e}", w.name))?;
    let execute_s = secs(t2);
    let total_s = secs(t0);
    let pmfs = summaries
        .into_iter()
        .map(|s| Pmf {
            offset: s.offset,
            values: s.pmf,
        })
        .collect();
    Ok(Ours {
        timing: Timing {
            normaliser_s,
            plan_s: Some(plan_s),
            execute_s,
            total_s,
        },
        pmfs,
    })
}

fn max_diff(a: &[Pmf], b: &[&Pmf]) -> f64 {
    a.iter()
        .zip(b)
        .map(|(x, y)| x.max_abs_diff(y.offset, &y.values))
        .fold(0.0, f64::max)
}

fn run_one(w: &Workload, log: &mut dyn Write) -> Result<Row, String> {
    let mut say = |m: String| {
        let _ = writeln!(log, "[bench] {}: {m}", w.name);
    };
    let mut notes = Vec::new();
    let can_reset = reset_peak_rss();
    // Memory freed by earlier workloads but kept by the allocator counts here too.
    let start_rss = status_bytes("VmRSS:");
    if !can_reset {
        notes.push(
            "peak RSS could not be reset (/proc/self/clear_refs): it is the process's peak so far"
                .into(),
        );
    }
    say("generating inputs".into());
    let t = Instant::now();
    // Singleton zones for the cell workload are built only for baseline (a), after ours ran.
    let mut inputs = w.build(false);
    let generate_s = secs(t);
    let raster = &inputs.raster;
    let stats = *raster.stats();
    let raster_bytes = raster.heap_bytes();
    let zone_cells: u64 = if w.shape == Shape::Cells {
        stats.valid
    } else {
        inputs.zones.iter().map(|z| z.len() as u64).sum()
    };
    let cells_only = w.shape == Shape::Cells;

    let pool = rayon::ThreadPoolBuilder::new()
        .build()
        .map_err(|e| format!("cannot start the rayon pool: {e}"))?;
    let threads = pool.current_num_threads();
    let one = rayon::ThreadPoolBuilder::new()
        .num_threads(1)
        .build()
        .map_err(|e| format!("cannot start a one-thread rayon pool: {e}"))?;

    say(format!("ours on {threads} threads"));
    let input_peak = peak_rss();
    reset_peak_rss();
    let ours_run = pool.install(|| ours(w, &inputs))?;
    let engine_peak = peak_rss();
    let peak = input_peak.zip(engine_peak).map(|(a, b)| a.max(b));
    say(format!(
        "ours took {:.3} s; ours on 1 thread",
        ours_run.timing.total_s
    ));
    let one_run = one.install(|| ours(w, &inputs))?;
    let t_ours = ours_run.timing.total_s;
    let n_zones = if cells_only {
        stats.valid as usize
    } else {
        inputs.zones.len()
    };

    let mut row = Row {
        workload: w.name.into(),
        about: w.about.into(),
        width: w.width,
        height: w.height,
        zones: n_zones,
        zone_cells,
        total: inputs.total,
        prior_mean: stats.sum_p,
        prior_sd: stats.sum_var.sqrt(),
        threads,
        generate_s,
        ours: ours_run.timing.clone(),
        ours_one_thread: one_run.timing.clone(),
        raster_bytes,
        start_rss_bytes: start_rss,
        peak_rss_bytes: peak,
        peak_rss_ratio: peak.map(|b| b as f64 / raster_bytes as f64),
        engine_rss_bytes: engine_peak,
        engine_rss_ratio: engine_peak.map(|b| b as f64 / raster_bytes as f64),
        cells_per_s: raster.len() as f64 / t_ours,
        ..Row::default()
    };
    drop(one_run);

    if let (Some(all), Some(eng)) = (row.peak_rss_ratio, row.engine_rss_ratio) {
        if all > 1.01 * eng {
            notes.push(format!(
                "peak RSS ({all:.2}x the raster's f64 bytes) is reached while the inputs are built, not in the engine (engine-only {eng:.2}x); it includes {} held at the start",
                row.start_rss_bytes.map_or("an unknown amount".into(), mib)
            ));
        }
    }
    if !w.baselines {
        let sd = stats.sum_var.sqrt();
        let cells = stats.valid as f64;
        notes.push(format!(
            "(a) not run, infeasible: {cells:.3e} cells added at each of about {} tree levels into {WINDOW}-value windows is about {:.1e} multiply-adds on one thread, and a {WINDOW}-value window spans only +-{:.1} sd of this total, so it would be wrong as well as slow",
            (n_zones as f64).log2().ceil(),
            cells * (n_zones as f64).log2().ceil() * WINDOW as f64,
            HALF_WINDOW as f64 / sd
        ));
        notes.push(format!(
            "(b) not run, infeasible: each zone needs {:.1e} multiply-adds ({SAMPLE} zones: {:.1e}), with the same window problem; so no exact reference and no accuracy figure on this workload",
            cells * WINDOW as f64,
            cells * WINDOW as f64 * SAMPLE as f64
        ));
        notes.push(format!(
            "(c) not run, infeasible: it needs the law of all {cells:.3e} cells one at a time ({:.1e} multiply-adds) and {}-point complex transforms of {} MiB each, beyond the memory target",
            cells * WINDOW as f64,
            (stats.valid + 1).next_power_of_two(),
            ((stats.valid + 1).next_power_of_two() * 16) >> 20
        ));
        row.notes = notes;
        return Ok(row);
    }

    let sample = workload::sample(n_zones, SAMPLE, SAMPLE_SEED);
    row.sample = Some(sample.len());
    if cells_only {
        say("building singleton zones for (a)".into());
        inputs = w.build(true);
    }
    let raster = &inputs.raster;
    // The cells of the k-th zone: for the cell workload zones are singletons of valid cells.
    let zone_cells_of = |i: usize| inputs.zones[i].cells();

    say("baseline (a): one-cell tree".into());
    let t = Instant::now();
    let plan = engine::plan(raster, &inputs.zones);
    let a = baseline::one_cell_tree(&plan, raster, &inputs.zones, inputs.total, HALF_WINDOW);
    let a_s = secs(t);
    drop(plan);
    row.a_s = Some(a_s);
    row.a_ratio = Some(a_s / t_ours);
    row.a_ratio_one_thread = Some(a_s / row.ours_one_thread.total_s);
    row.diff_ours_a = Some(max_diff(&ours_run.pmfs, &a.iter().collect::<Vec<_>>()));
    say(format!("(a) took {a_s:.3} s"));

    say(format!(
        "baseline (b): direct convolution on {} zones",
        sample.len()
    ));
    // Each zone runs on one thread; zones run side by side on the pool to save wall time, and
    // (b)'s time is the sum of the per-zone times.
    let timed: Vec<(Pmf, f64)> = pool.install(|| {
        sample
            .par_iter()
            .map(|&i| {
                let t = Instant::now();
                let pmf =
                    baseline::per_zone_direct(raster, zone_cells_of(i), inputs.total, HALF_WINDOW);
                (pmf, secs(t))
            })
            .collect()
    });
    let b_s: f64 = timed.iter().map(|(_, s)| s).sum();
    let b: Vec<Pmf> = timed.into_iter().map(|(p, _)| p).collect();
    let scale = n_zones as f64 / sample.len() as f64;
    row.b_sample_s = Some(b_s);
    row.b_scaled_s = Some(b_s * scale);
    row.b_ratio = Some(b_s * scale / t_ours);
    say(format!("(b) took {b_s:.3} s"));

    say("baseline (c): FFT deconvolution".into());
    let t = Instant::now();
    let fft = baseline::FftDeconvolution::new(raster, HALF_WINDOW);
    row.c_setup_s = Some(secs(t));
    let t = Instant::now();
    let c: Vec<Pmf> = sample
        .iter()
        .map(|&i| fft.zone(raster, zone_cells_of(i), inputs.total))
        .collect();
    let c_s = secs(t);
    drop(fft);
    row.c_sample_s = Some(c_s);
    row.c_scaled_s = Some(row.c_setup_s.unwrap_or(0.0) + c_s * scale);

    let b_refs: Vec<&Pmf> = b.iter().collect();
    let ours_sample: Vec<Pmf> = sample.iter().map(|&i| ours_run.pmfs[i].clone()).collect();
    let a_sample: Vec<Pmf> = sample.iter().map(|&i| a[i].clone()).collect();
    row.diff_ours_ref = Some(max_diff(&ours_sample, &b_refs));
    row.diff_a_ref = Some(max_diff(&a_sample, &b_refs));
    // FFT(P_S) can round to exactly zero (its true modulus, down to prod |1 - 2p|, sits below
    // the transform's rounding noise), and the division then yields non-finite values: count
    // those zones apart and report the largest error over the others.
    let c_diffs: Vec<f64> = c
        .iter()
        .zip(&b)
        .map(|(x, y)| x.max_abs_diff(y.offset, &y.values))
        .collect();
    row.c_nonfinite_zones = Some(c_diffs.iter().filter(|d| !d.is_finite()).count());
    row.diff_c_ref = Some(
        c_diffs
            .iter()
            .copied()
            .filter(|d| d.is_finite())
            .fold(0.0, f64::max),
    );

    if w.reference_zones == 0 {
        let n = stats.valid as f64;
        notes.push(format!(
            "engine::reference::conditional_pmf not run: it folds all {n:.0} cells over the full support for each zone (about {:.1e} multiply-adds per zone)",
            n * n / 2.0
        ));
    } else {
        let k = w.reference_zones.min(sample.len());
        say(format!("engine::reference::conditional_pmf on {k} zones"));
        let t = Instant::now();
        let mut check = ReferenceCheck {
            zones: k,
            ..ReferenceCheck::default()
        };
        let mut diff_b = 0.0f64;
        for (j, &i) in sample.iter().take(k).enumerate() {
            let want = engine::reference::conditional_pmf(raster, zone_cells_of(i), inputs.total)
                .ok_or_else(|| {
                format!("{}: the reference found the total impossible", w.name)
            })?;
            check.max_abs_diff_ours = check
                .max_abs_diff_ours
                .max(ours_run.pmfs[i].max_abs_diff(0, &want));
            diff_b = diff_b.max(b[j].max_abs_diff(0, &want));
        }
        check.seconds = secs(t);
        check.max_abs_diff_b = Some(diff_b);
        row.engine_reference = Some(check);
    }
    notes.push(format!(
        "(b) uses a {WINDOW}-value window centred on the untilted mean (+-{:.0} sd of the total), like (a); its zones run side by side on the pool, each on one thread, and its time is the sum of per-zone times",
        HALF_WINDOW as f64 / stats.sum_var.sqrt()
    ));
    row.notes = notes;
    Ok(row)
}

fn find<'a>(rows: &'a [Row], name: &str) -> Option<&'a Row> {
    rows.iter().find(|r| r.workload == name)
}

fn target(name: &str, goal: &str, measured: Option<f64>, ok: impl Fn(f64) -> bool) -> Target {
    Target {
        name: name.into(),
        goal: goal.into(),
        measured,
        pass: measured.map(ok),
    }
}

/// The targets of issue 2, judged on the rows that were run.
pub fn targets(rows: &[Row]) -> Vec<Target> {
    let part = find(rows, "W250k-partition");
    let over = find(rows, "W250k-overlap");
    let big = find(rows, "W25M-partition");
    let mut out = vec![
        target(
            "W250k-partition: t(a) / t(ours)",
            ">= 100",
            part.and_then(|r| r.a_ratio),
            |x| x >= 100.0,
        ),
        target(
            "W250k-overlap: t(a) / t(ours)",
            ">= 50",
            over.and_then(|r| r.a_ratio),
            |x| x >= 50.0,
        ),
    ];
    for r in rows.iter().filter(|r| r.diff_ours_ref.is_some()) {
        out.push(target(
            &format!("{}: max |ours - exact| on the sample", r.workload),
            "<= 1e-13",
            r.diff_ours_ref,
            |x| x <= TARGET_DIFF,
        ));
    }
    out.push(target(
        "t(W25M-partition) / t(W250k-partition)",
        "<= 120",
        big.zip(part).map(|(b, p)| b.ours.total_s / p.ours.total_s),
        |x| x <= 120.0,
    ));
    out.push(target(
        "W25M-partition: peak RSS / raster f64 bytes",
        "<= 3",
        big.and_then(|r| r.peak_rss_ratio),
        |x| x <= 3.0,
    ));
    out.push(target(
        "W25M-partition: engine-only peak RSS / raster f64 bytes",
        "<= 3",
        big.and_then(|r| r.engine_rss_ratio),
        |x| x <= 3.0,
    ));
    out
}

fn time(s: f64) -> String {
    if s < 1e-3 {
        format!("{:.0} us", s * 1e6)
    } else if s < 1.0 {
        format!("{:.1} ms", s * 1e3)
    } else {
        format!("{s:.2} s")
    }
}

fn opt(v: Option<f64>, f: impl Fn(f64) -> String) -> String {
    v.map(f).unwrap_or_else(|| "not run".into())
}

fn ratio(x: f64) -> String {
    if x >= 100.0 {
        format!("{x:.0}x")
    } else if x >= 10.0 {
        format!("{x:.1}x")
    } else {
        format!("{x:.3}x")
    }
}

fn diff(x: f64) -> String {
    if x.is_finite() {
        format!("{x:.1e}")
    } else {
        "non-finite".into()
    }
}

fn mib(b: u64) -> String {
    format!("{:.1} MiB", b as f64 / (1024.0 * 1024.0))
}

/// The report as a readable table: one column per workload, then the targets and the notes.
pub fn render(report: &Report) -> String {
    let rows = &report.rows;
    let mut lines: Vec<(String, Vec<String>)> = Vec::new();
    let mut add = |label: &str, f: &dyn Fn(&Row) -> String| {
        lines.push((label.to_string(), rows.iter().map(f).collect()));
    };
    add("raster", &|r| format!("{}x{}", r.width, r.height));
    add("zones", &|r| r.zones.to_string());
    add("zone cells", &|r| r.zone_cells.to_string());
    add("observed total", &|r| r.total.to_string());
    add("prior mean / sd", &|r| {
        format!("{:.0} / {:.1}", r.prior_mean, r.prior_sd)
    });
    add("threads", &|r| r.threads.to_string());
    add("generate inputs", &|r| time(r.generate_s));
    add("ours: normaliser", &|r| time(r.ours.normaliser_s));
    add("ours: plan", &|r| r.ours.plan_s.map_or("n/a".into(), time));
    add("ours: execute", &|r| time(r.ours.execute_s));
    add("ours: total", &|r| time(r.ours.total_s));
    add("ours: total, 1 thread", &|r| {
        time(r.ours_one_thread.total_s)
    });
    add("(a) one-cell tree", &|r| opt(r.a_s, time));
    add("(a) / ours", &|r| opt(r.a_ratio, ratio));
    add("(a) / ours 1 thread", &|r| opt(r.a_ratio_one_thread, ratio));
    add("(b) sample zones", &|r| {
        r.sample.map_or("not run".into(), |n| n.to_string())
    });
    add("(b) on the sample", &|r| opt(r.b_sample_s, time));
    add("(b) scaled to all", &|r| opt(r.b_scaled_s, time));
    add("(b) / ours", &|r| opt(r.b_ratio, ratio));
    add("(c) FFT, scaled", &|r| opt(r.c_scaled_s, time));
    add("max|ours - exact|", &|r| opt(r.diff_ours_ref, diff));
    add("max|(a) - exact|", &|r| opt(r.diff_a_ref, diff));
    add("max|(c) - exact|, finite", &|r| opt(r.diff_c_ref, diff));
    add("(c) non-finite zones", &|r| {
        r.c_nonfinite_zones.map_or("not run".into(), |n| {
            format!("{n} of {}", r.sample.unwrap_or(0))
        })
    });
    add("max|ours - (a)| all", &|r| opt(r.diff_ours_a, diff));
    add("engine reference", &|r| {
        r.engine_reference.as_ref().map_or("not run".into(), |c| {
            format!("{} zone(s), {}", c.zones, time(c.seconds))
        })
    });
    add("max|ours - eng.ref|", &|r| {
        opt(
            r.engine_reference.as_ref().map(|c| c.max_abs_diff_ours),
            diff,
        )
    });
    add("max|(b) - eng.ref|", &|r| {
        opt(
            r.engine_reference.as_ref().and_then(|c| c.max_abs_diff_b),
            diff,
        )
    });
    add("raster f64 bytes", &|r| mib(r.raster_bytes as u64));
    add("RSS at start", &|r| {
        opt(r.start_rss_bytes.map(|b| b as f64), |b| mib(b as u64))
    });
    add("peak RSS", &|r| {
        opt(r.peak_rss_bytes.map(|b| b as f64), |b| mib(b as u64))
    });
    add("peak RSS / raster", &|r| {
        opt(r.peak_rss_ratio, |x| format!("{x:.2}x"))
    });
    add("engine-only peak RSS", &|r| {
        opt(r.engine_rss_bytes.map(|b| b as f64), |b| mib(b as u64))
    });
    add("engine-only / raster", &|r| {
        opt(r.engine_rss_ratio, |x| format!("{x:.2}x"))
    });
    add("cells/s (ours)", &|r| format!("{:.3e}", r.cells_per_s));

    let label_w = lines.iter().map(|(l, _)| l.len()).max().unwrap_or(0);
    let col_w: Vec<usize> = (0..rows.len())
        .map(|i| {
            lines
                .iter()
                .map(|(_, v)| v[i].len())
                .chain([rows[i].workload.len()])
                .max()
                .unwrap_or(0)
        })
        .collect();
    let mut s = String::new();
    s.push_str(&format!("{:<label_w$}", ""));
    for (r, w) in rows.iter().zip(&col_w) {
        s.push_str(&format!("  {:>w$}", r.workload));
    }
    s.push('\n');
    for (label, vals) in lines.iter().filter(|_| !rows.is_empty()) {
        s.push_str(&format!("{label:<label_w$}"));
        for (v, w) in vals.iter().zip(&col_w) {
            s.push_str(&format!("  {v:>w$}"));
        }
        s.push('\n');
    }
    s.push_str("\ntargets\n");
    let tw = report
        .targets
        .iter()
        .map(|t| t.name.len())
        .max()
        .unwrap_or(0);
    for t in &report.targets {
        let measured = opt(t.measured, |x| {
            if x < 1e-3 {
                format!("{x:.1e}")
            } else {
                format!("{x:.2}")
            }
        });
        let status = match t.pass {
            Some(true) => "PASS",
            Some(false) => "MISS",
            None => "not run",
        };
        s.push_str(&format!(
            "  {:<tw$}  {:>10}  goal {:<9} {status}\n",
            t.name, measured, t.goal
        ));
    }
    if !report.evidence.is_empty() {
        s.push_str(&render_evidence(&report.evidence));
    }
    if let Some(r) = &report.scenarios {
        s.push_str(&render_scenarios(r));
    }
    if !report.gis.is_empty() {
        s.push_str(&render_gis(&report.gis));
    }
    let notes: Vec<String> = rows
        .iter()
        .flat_map(|r| {
            r.notes
                .iter()
                .map(move |n| format!("  {}: {n}", r.workload))
        })
        .collect();
    if !notes.is_empty() {
        s.push_str("\nnotes\n");
        s.push_str(&notes.join("\n"));
        s.push('\n');
    }
    s.push_str(&format!(
        "\nours = Normaliser::new + plan + execute (cells: + cell_posterior) at tolerance 1e-13; (a) includes planning; (b), (c) run on a seeded sample of {SAMPLE} zones, scaled by zones/sample; exact = (b) on the sample.\n"
    ));
    s
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn smoke_workload_runs_and_meets_the_accuracy_contract() {
        let w = workload::find("W10k-partition").unwrap();
        let mut log = Vec::new();
        let selection = Selection {
            engine: vec![w],
            ..Selection::default()
        };
        let report = run(&selection, &mut log).unwrap();
        let row = &report.rows[0];
        assert_eq!(row.zones, 100);
        assert_eq!(row.sample, Some(SAMPLE));
        // reference: baseline (b), direct convolution of non-negative terms (tail-accurate)
        let d = row.diff_ours_ref.unwrap();
        assert!(d <= TARGET_DIFF, "ours vs exact {d:e}");
        // reference: engine::reference::conditional_pmf on the first sample zones
        let r = row.engine_reference.as_ref().unwrap();
        assert!(r.max_abs_diff_ours <= TARGET_DIFF && r.max_abs_diff_b.unwrap() <= TARGET_DIFF);
        assert!(row.diff_ours_a.unwrap() <= TARGET_DIFF);
        let text = render(&report);
        assert!(text.contains("W10k-partition") && text.contains("targets"));
        let json = serde_json::to_value(&report).unwrap();
        assert_eq!(json["rows"][0]["zones"], 100);
    }

    #[test]
    fn unknown_workload_names_the_choices() {
        let e = select(Some("W1-nothing")).unwrap_err();
        assert!(
            e.contains("W1-nothing") && e.contains("W250k-overlap"),
            "{e}"
        );
        assert_eq!(
            select(None).unwrap().len(),
            WORKLOADS.len() + 2 + gis::GIS_WORKLOADS.len()
        );
        assert!(select(Some("e250k-EVIDENCE")).unwrap().evidence);
        assert!(select(Some("s250k-scenarios")).unwrap().scenarios);
        assert_eq!(select(Some("g-read-5000")).unwrap().gis, ["G-read-5000"]);
        assert_eq!(
            select(Some("w10k-PARTITION")).unwrap().engine[0].name,
            "W10k-partition"
        );
    }
}

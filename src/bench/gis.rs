//! The GIS rows of `zonetally bench`: reading a GeoTIFF and rasterising polygons against GDAL
//! (rasterio, timed by `rasterio_times.py` beside this file in a child process), and the
//! W25M-partition workload end to end through the service with a GeoTIFF raster and GeoJSON
//! zones against the engine alone on the same inputs.
//!
//! What each figure means:
//! - G-read-5000: ours = `std::fs::read` + `geo::geotiff::read` of a 5000x5000 float32 deflate
//!   GeoTIFF of the benchmark field, best of 3; rasterio = `rasterio.open` + `read(1)`, best of 3.
//! - G-rasterise-10k: ours = `geo::zones::rasterize` of 10,000 jittered octagons onto a
//!   5000x5000 grid, one polygon after another as the service does it, best of 3; rasterio =
//!   one `rasterio.features.rasterize` call burning all of them, best of 3.
//! - G-service-W25M: wall = `POST /rasters` (the GeoTIFF) + the sync `zone-counts` execution
//!   (GeoJSON squares) through the service's router in process; engine = normaliser + plan +
//!   execute on the same decoded raster and zones. Peak RSS (VmHWM) is reset after the client's
//!   files are made and includes them (the client's copy of the GeoTIFF is held until sent).
//!
//! - S-sync-latency: 20 small sync requests one after another while two large async jobs run,
//!   through the router in process: median and worst latency with synchronous requests on
//!   their own pool (the default) and on the jobs' pool (`--shared-pool`), in the same run.
//!
//! Writes its fixtures into a fresh folder under the system's temporary folder and removes it.

use std::path::{Path, PathBuf};
use std::process::Command;
use std::time::Instant;

use serde::Serialize;

use super::workload::{self, SplitMix64, FIELD_SEED};
use super::{peak_rss, reset_peak_rss, secs, status_bytes};
use crate::engine::{self, Control, Normaliser, Settings};
use crate::geo::zones::{rasterize, Polygon};
use crate::geo::{geotiff, GeoTransform, Grid};

/// The GIS workloads by name, with what they measure.
pub const GIS_WORKLOADS: [(&str, &str); 4] = [
    (
        "G-read-5000",
        "read a 5000x5000 float32 deflate GeoTIFF: ours vs rasterio",
    ),
    (
        "G-rasterise-10k",
        "rasterise 10,000 polygons onto 5000x5000: ours vs rasterio",
    ),
    (
        "G-service-W25M",
        "W25M-partition through the service, GeoTIFF raster and GeoJSON zones, vs the engine",
    ),
    (
        "S-sync-latency",
        "a small sync request while two large async jobs run: own pool vs one shared pool",
    ),
];

/// Side of the read and rasterise grids.
const SIDE: u32 = 5000;
/// Polygons per side of the rasterise workload (10,000 in all).
const POLYGONS_PER_SIDE: u32 = 100;
/// Repeats of each timing; the best is kept.
const REPEAT: usize = 3;

/// One measured GIS row. `None` marks what was not run (see `notes`).
#[derive(Clone, Debug, Default, Serialize)]
pub struct GisRow {
    pub workload: String,
    pub about: String,
    pub ours_s: f64,
    pub rasterio_s: Option<f64>,
    /// ours / rasterio.
    pub ratio: Option<f64>,
    pub engine_s: Option<f64>,
    /// Service wall time / engine time.
    pub wall_over_engine: Option<f64>,
    /// Median and largest latency of a small sync request, own pool then shared pool.
    pub sync_latency_s: Option<[f64; 4]>,
    pub raster_bytes: Option<u64>,
    pub start_rss_bytes: Option<u64>,
    pub peak_rss_bytes: Option<u64>,
    pub peak_rss_ratio: Option<f64>,
    pub notes: Vec<String>,
}

/// Whether `name` names a GIS workload (case-insensitive).
pub fn find(name: &str) -> Option<&'static str> {
    GIS_WORKLOADS
        .iter()
        .find(|(n, _)| n.eq_ignore_ascii_case(name))
        .map(|(n, _)| *n)
}

/// Runs the named GIS workloads in order.
pub fn run(names: &[&str], log: &mut dyn std::io::Write) -> Result<Vec<GisRow>, String> {
    let dir = std::env::temp_dir().join(format!("zonetally-bench-{}", std::process::id()));
    std::fs::create_dir_all(&dir).map_err(|e| format!("cannot make {}: {e}", dir.display()))?;
    let mut rows = Vec::new();
    for name in names {
        let _ = writeln!(log, "{name}: running");
        let row = match *name {
            "G-read-5000" => read_row(&dir),
            "G-rasterise-10k" => rasterise_row(&dir),
            "S-sync-latency" => latency_row(),
            _ => service_row(),
        };
        rows.push(row?);
    }
    std::fs::remove_dir_all(&dir).ok();
    Ok(rows)
}

fn about(name: &str) -> String {
    GIS_WORKLOADS
        .iter()
        .find(|(n, _)| *n == name)
        .map_or(String::new(), |(_, a)| a.to_string())
}

/// The benchmark field as float32 on a `side` x `side` grid.
fn field_f32(width: u32, height: u32) -> Vec<f32> {
    let raster = workload::Field::new(FIELD_SEED).raster(width, height);
    raster.values().iter().map(|&v| v as f32).collect()
}

fn unit_grid(width: u32, height: u32) -> Grid {
    Grid {
        width,
        height,
        transform: GeoTransform::new(0.0, f64::from(height), 1.0, 1.0).ok(),
        crs: Some(32631),
    }
}

/// A float32 deflate GeoTIFF (pixel scale, tiepoint, GeoKeys), striped as the tiff crate
/// chooses.
fn write_f32(grid: &Grid, values: &[f32]) -> Result<Vec<u8>, String> {
    use tiff::encoder::compression::DeflateLevel;
    use tiff::encoder::{colortype, Compression, TiffEncoder};
    use tiff::tags::Tag;
    let t = grid.transform.ok_or("a benchmark grid has a transform")?;
    let fail = |e: tiff::TiffError| format!("cannot write the benchmark GeoTIFF: {e}");
    let mut out = std::io::Cursor::new(Vec::new());
    {
        let mut encoder = TiffEncoder::new(&mut out)
            .map_err(fail)?
            .with_compression(Compression::Deflate(DeflateLevel::Balanced));
        let mut image = encoder
            .new_image::<colortype::Gray32Float>(grid.width, grid.height)
            .map_err(fail)?;
        let dir = image.encoder();
        dir.write_tag(
            Tag::ModelPixelScaleTag,
            &[t.cell_width, t.cell_height, 0.0][..],
        )
        .map_err(fail)?;
        dir.write_tag(
            Tag::ModelTiepointTag,
            &[0.0, 0.0, 0.0, t.origin_x, t.origin_y, 0.0][..],
        )
        .map_err(fail)?;
        let keys: [u16; 16] = [
            1,
            1,
            0,
            3,
            1024,
            0,
            1,
            1,
            1025,
            0,
            1,
            1,
            3072,
            0,
            1,
            grid.crs.unwrap_or(32631) as u16,
        ];
        dir.write_tag(Tag::GeoKeyDirectoryTag, &keys[..])
            .map_err(fail)?;
        image.write_data(values).map_err(fail)?;
    }
    Ok(out.into_inner())
}

/// Runs the rasterio script; `None` with a note when it cannot run.
fn rasterio_seconds(task: &str, path: &Path, notes: &mut Vec<String>) -> Option<f64> {
    let script = Path::new(env!("CARGO_MANIFEST_DIR")).join("src/bench/rasterio_times.py");
    let out = Command::new("python3")
        .arg(&script)
        .arg(task)
        .arg(path)
        .args(["--repeat", &REPEAT.to_string()])
        .output();
    let out = match out {
        Ok(o) => o,
        Err(e) => {
            notes.push(format!("rasterio not run: cannot start python3: {e}"));
            return None;
        }
    };
    let text = String::from_utf8_lossy(&out.stdout);
    let doc: serde_json::Value = serde_json::from_str(text.trim()).unwrap_or_default();
    match doc["seconds"].as_f64() {
        Some(s) => {
            notes.push(format!(
                "rasterio {} (GDAL {})",
                doc["rasterio"].as_str().unwrap_or("?"),
                doc["gdal"].as_str().unwrap_or("?")
            ));
            Some(s)
        }
        None => {
            let why = doc["error"]
                .as_str()
                .map(str::to_string)
                .unwrap_or_else(|| String::from_utf8_lossy(&out.stderr).trim().to_string());
            notes.push(format!("rasterio not run: {why}"));
            None
        }
    }
}

/// A row of ours against the rasterio script's `task` on `path`.
fn against_rasterio(
    name: &str,
    task: &str,
    path: &Path,
    ours_s: f64,
    mut notes: Vec<String>,
) -> GisRow {
    let rasterio_s = rasterio_seconds(task, path, &mut notes);
    GisRow {
        workload: name.into(),
        about: about(name),
        ours_s,
        rasterio_s,
        ratio: rasterio_s.map(|r| ours_s / r),
        notes,
        ..GisRow::default()
    }
}

fn best_of(mut run: impl FnMut() -> Result<(), String>) -> Result<f64, String> {
    let mut best = f64::INFINITY;
    for _ in 0..REPEAT {
        let t = Instant::now();
        run()?;
        best = best.min(secs(t));
    }
    Ok(best)
}

fn read_row(dir: &Path) -> Result<GisRow, String> {
    let name = "G-read-5000";
    let grid = unit_grid(SIDE, SIDE);
    let bytes = write_f32(&grid, &field_f32(SIDE, SIDE))?;
    let path = dir.join("field-5000.tif");
    std::fs::write(&path, &bytes).map_err(|e| format!("cannot write {}: {e}", path.display()))?;
    let limits = geotiff::ReadLimits {
        max_cells: u64::MAX,
    };
    let ours_s = best_of(|| {
        let bytes = std::fs::read(&path).map_err(|e| e.to_string())?;
        let read = geotiff::read(&bytes, &limits).map_err(|e| e.to_string())?;
        if read.samples.len() != (SIDE * SIDE) as usize {
            return Err("the benchmark GeoTIFF read back short".into());
        }
        Ok(())
    })?;
    let notes = vec![format!(
        "{} MiB on disk, striped as the tiff crate writes it; ours decodes strips in parallel on {} threads, rasterio with GDAL's defaults",
        bytes.len() >> 20,
        rayon::current_num_threads()
    )];
    Ok(against_rasterio(name, "read", &path, ours_s, notes))
}

/// 10,000 jittered octagons, one per 50x50 block, in the unit grid's map coordinates.
fn octagons(height: u32) -> Vec<Polygon> {
    let mut rng = SplitMix64::new(0x0c7a_9011);
    let block = f64::from(SIDE / POLYGONS_PER_SIDE);
    let mut out = Vec::new();
    for br in 0..POLYGONS_PER_SIDE {
        for bc in 0..POLYGONS_PER_SIDE {
            let (cx, cy) = (
                (f64::from(bc) + 0.5) * block,
                f64::from(height) - (f64::from(br) + 0.5) * block,
            );
            let mut ring: Vec<[f64; 2]> = (0..8)
                .map(|i| {
                    let a = std::f64::consts::TAU * (f64::from(i) + 0.3 * rng.next_f64()) / 8.0;
                    let r = block * (0.3 + 0.18 * rng.next_f64());
                    [cx + r * a.cos(), cy + r * a.sin()]
                })
                .collect();
            ring.push(ring[0]);
            out.push(Polygon { rings: vec![ring] });
        }
    }
    out
}

fn rasterise_row(dir: &Path) -> Result<GisRow, String> {
    let name = "G-rasterise-10k";
    let grid = unit_grid(SIDE, SIDE);
    let polygons = octagons(SIDE);
    let mut cells = 0usize;
    let ours_s = best_of(|| {
        cells = polygons
            .iter()
            .map(|p| rasterize(std::slice::from_ref(p), &grid, false).len())
            .sum();
        Ok(())
    })?;
    let path: PathBuf = dir.join("octagons.json");
    let doc = serde_json::json!({
        "width": SIDE,
        "height": SIDE,
        "gdal": grid.transform.map(|t| t.to_gdal()),
        "polygons": polygons.iter().map(|p| &p.rings).collect::<Vec<_>>(),
    });
    std::fs::write(&path, doc.to_string())
        .map_err(|e| format!("cannot write {}: {e}", path.display()))?;
    let notes = vec![format!(
        "{} polygons, {cells} cells burned (cell-centre rule)",
        polygons.len()
    )];
    Ok(against_rasterio(name, "rasterize", &path, ours_s, notes))
}

/// GeoJSON squares, one per `block` x `block` block of the unit grid (the W25M partition).
fn squares_geojson(width: u32, height: u32, block: u32) -> String {
    let mut features = Vec::new();
    for br in 0..height.div_ceil(block) {
        for bc in 0..width.div_ceil(block) {
            let (x0, x1) = (
                f64::from(bc * block),
                f64::from(((bc + 1) * block).min(width)),
            );
            let (y1, y0) = (
                f64::from(height - br * block),
                f64::from(height - ((br + 1) * block).min(height)),
            );
            features.push(serde_json::json!({
                "type": "Feature",
                "id": format!("r{br}c{bc}"),
                "properties": {},
                "geometry": {"type": "Polygon", "coordinates": [[[x0, y0], [x1, y0], [x1, y1], [x0, y1], [x0, y0]]]},
            }));
        }
    }
    serde_json::json!({"type": "FeatureCollection", "features": features}).to_string()
}

fn service_row() -> Result<GisRow, String> {
    use crate::api::decode::{raster_tiff, Limits};
    let name = "G-service-W25M";
    let w = workload::find("W25M-partition").ok_or("W25M-partition is a workload")?;
    let block = match w.shape {
        workload::Shape::Partition { block } => block,
        _ => return Err("W25M-partition is a partition".into()),
    };
    let grid = unit_grid(w.width, w.height);
    let tif = write_f32(&grid, &field_f32(w.width, w.height))?;
    let zones_text = squares_geojson(w.width, w.height, block);
    let limits = Limits::default();
    let (raster, _) = raster_tiff(&tif, None, &limits).map_err(|e| e.to_string())?;
    let total = workload::observed_total(&raster);
    let raster_bytes = raster.heap_bytes() as u64;
    drop(raster);

    // Through the service first, so the peak holds no leftovers of the engine's own run. The
    // GeoTIFF's bytes move into the request body: the service holds the only copy.
    let start_rss = status_bytes("VmRSS:");
    let reset = reset_peak_rss();
    let t = Instant::now();
    let (doc, status) = through_service(tif, &zones_text, total)?;
    let wall = secs(t);
    let peak = if reset { peak_rss() } else { None };
    if status != 200 {
        return Err(format!("the service answered {status}: {doc}"));
    }

    // The engine alone on the same decoded raster and zones. The GeoTIFF is made again rather
    // than kept: a kept copy would sit in the service run's peak, which the client's copy does
    // not share in a real deployment.
    let tif = write_f32(&grid, &field_f32(w.width, w.height))?;
    let (raster, _) = raster_tiff(&tif, None, &limits).map_err(|e| e.to_string())?;
    drop(tif);
    let zones = workload::partition(&raster, block);
    let control = Control::new();
    let t = Instant::now();
    let normaliser = Normaliser::new(&raster, total, &control).map_err(|e| e.to_string())?;
    let plan = engine::plan(&raster, &zones);
    let summaries = engine::execute(
        &plan,
        &raster,
        &zones,
        &normaliser,
        &Settings::default(),
        &control,
    )
    .map_err(|e| e.to_string())?;
    let engine_s = secs(t);

    let mut notes = vec![format!(
        "{} zones; the peak includes the client's GeoJSON and request text (about {} MiB)",
        doc["zones"].as_array().map_or(0, Vec::len),
        (2 * zones_text.len()) >> 20
    )];
    let same = summaries
        .iter()
        .zip(doc["zones"].as_array().into_iter().flatten())
        .all(|(s, z)| {
            z["mean"].as_f64() == Some(s.mean) && z["id"].as_str() == Some(s.id.as_str())
        });
    if !same || summaries.len() != doc["zones"].as_array().map_or(0, Vec::len) {
        notes.push("the service's zones differ from the engine's".into());
    }
    if !reset {
        notes.push("peak RSS not measured: /proc/self/clear_refs is not writable".into());
    }
    Ok(GisRow {
        workload: name.into(),
        about: about(name),
        ours_s: wall,
        engine_s: Some(engine_s),
        wall_over_engine: Some(wall / engine_s),
        raster_bytes: Some(raster_bytes),
        start_rss_bytes: start_rss,
        peak_rss_bytes: peak,
        peak_rss_ratio: peak.map(|p| p as f64 / raster_bytes as f64),
        notes,
        ..GisRow::default()
    })
}

/// Posts the GeoTIFF to `/rasters` and runs `zone-counts` on it with the GeoJSON zones,
/// through the service's router in process. Returns the results and the execution's status.
fn through_service(
    tif: Vec<u8>,
    zones: &str,
    total: u64,
) -> Result<(serde_json::Value, u16), String> {
    use axum::body::Body;
    use axum::http::Request;
    use http_body_util::BodyExt;
    use tower::ServiceExt;
    let runtime = tokio::runtime::Builder::new_multi_thread()
        .enable_all()
        .build()
        .map_err(|e| format!("cannot start a runtime: {e}"))?;
    runtime.block_on(async move {
        let config = crate::Config {
            sync_budget: f64::INFINITY,
            request_timeout: 600.0,
            ..crate::Config::default()
        };
        let state = crate::AppState::new(config).map_err(|e| e.to_string())?;
        let router = crate::app(state);
        let send = |req: Request<Body>| {
            let router = router.clone();
            async move {
                let resp = router.oneshot(req).await.map_err(|e| e.to_string())?;
                let status = resp.status().as_u16();
                let body = resp
                    .into_body()
                    .collect()
                    .await
                    .map_err(|e| e.to_string())?
                    .to_bytes();
                let doc: serde_json::Value = serde_json::from_slice(&body).unwrap_or_default();
                Ok::<_, String>((doc, status))
            }
        };
        let (posted, status) = send(
            Request::post("/rasters")
                .header("content-type", "image/tiff; application=geotiff")
                .body(Body::from(tif))
                .map_err(|e| e.to_string())?,
        )
        .await?;
        if status != 201 {
            return Err(format!("POST /rasters answered {status}: {posted}"));
        }
        let reference = posted["ref"].as_str().unwrap_or_default();
        let body = format!(
            "{{\"inputs\": {{\"raster\": {{\"ref\": \"{reference}\"}}, \"zones\": {zones}, \"evidence\": {{\"total\": {total}}}}}}}"
        );
        send(
            Request::post("/processes/zone-counts/execution")
                .header("content-type", "application/json")
                .body(Body::from(body))
                .map_err(|e| e.to_string())?,
        )
        .await
    })
}

/// Small sync requests timed while two large async jobs run.
const PROBES: usize = 20;

fn latency_row() -> Result<GisRow, String> {
    let name = "S-sync-latency";
    let own = sync_latency(false)?;
    let shared = sync_latency(true)?;
    let mut notes = vec![format!(
        "{PROBES} sequential probes (8 cells, 2 zones) while two async jobs of 9,409 overlapping 40x40 zones on 1000x1000 cells run; the jobs are dismissed afterwards"
    )];
    for (mode, (_, _, all_ran)) in [("own pool", own), ("shared pool", shared)] {
        if !all_ran {
            notes.push(format!(
                "{mode}: a job ended before the probes did; the later probes ran beside less work"
            ));
        }
    }
    Ok(GisRow {
        workload: name.into(),
        about: about(name),
        ours_s: own.0[1],
        sync_latency_s: Some([own.0[0], own.0[1], shared.0[0], shared.0[1]]),
        // The worst probe decides whether a client was starved.
        ratio: Some(own.0[1] / shared.0[1]),
        notes,
        ..GisRow::default()
    })
}

/// ([median, max] probe latency, probes, whether both jobs ran throughout).
fn sync_latency(shared: bool) -> Result<([f64; 2], usize, bool), String> {
    use axum::body::Body;
    use axum::http::Request;
    use tower::ServiceExt;
    let values: Vec<f64> = (0..1_000_000u64)
        .map(|i| 0.05 + 0.55 * ((i * 7919 % 101) as f64 / 100.0))
        .collect();
    let zones: Vec<serde_json::Value> = (0..97)
        .flat_map(|r| {
            (0..97).map(move |c| {
                serde_json::json!({"id": format!("z{r}-{c}"), "rect": {"row": r * 10, "col": c * 10, "rows": 40, "cols": 40}})
            })
        })
        .collect();
    let big = serde_json::json!({"inputs": {
        "raster": {"width": 1000, "height": 1000, "values": values},
        "zones": zones,
        "evidence": {"total": 330_000},
        "summaries": {"pmf": false}
    }})
    .to_string();
    let probe = serde_json::json!({"inputs": {
        "raster": {"width": 4, "height": 2, "values": [0.5, 0.5, 0.5, 0.5, 0.5, 0.5, 0.5, 0.5]},
        "zones": [{"id": "cups", "rect": {"row": 0, "col": 0, "rows": 1, "cols": 4}}, {"id": "pair", "cells": [4, 5]}],
        "evidence": {"total": 4}
    }})
    .to_string();
    let runtime = tokio::runtime::Builder::new_multi_thread()
        .enable_all()
        .build()
        .map_err(|e| format!("cannot start a runtime: {e}"))?;
    runtime.block_on(async move {
        let state = crate::AppState::new(crate::Config {
            shared_pool: shared,
            ..crate::Config::default()
        })?;
        let router = crate::app(state.clone());
        let post = |body: String, prefer: Option<&'static str>| {
            let router = router.clone();
            async move {
                let mut req = Request::post("/processes/zone-counts/execution")
                    .header("content-type", "application/json");
                if let Some(p) = prefer {
                    req = req.header("prefer", p);
                }
                let req = req.body(Body::from(body)).map_err(|e| e.to_string())?;
                let resp = router.oneshot(req).await.map_err(|e| e.to_string())?;
                Ok::<_, String>((resp.status().as_u16(), resp.headers().clone()))
            }
        };
        let mut jobs = Vec::new();
        for _ in 0..2 {
            let (status, headers) = post(big.clone(), Some("respond-async")).await?;
            if status != 201 {
                return Err(format!("a large job was refused with {status}"));
            }
            let location = headers
                .get("location")
                .and_then(|v| v.to_str().ok())
                .unwrap_or_default()
                .to_string();
            jobs.push(location);
        }
        let running = || {
            let counts = state.jobs().counts().unwrap_or_default();
            counts.of(crate::jobs::JobState::Running)
        };
        let waited = Instant::now();
        while running() < 2 && waited.elapsed().as_secs() < 60 {
            tokio::time::sleep(std::time::Duration::from_millis(5)).await;
        }
        let mut times = Vec::with_capacity(PROBES);
        for _ in 0..PROBES {
            let t = Instant::now();
            let (status, _) = post(probe.clone(), None).await?;
            if status != 200 {
                return Err(format!("a probe was answered {status}"));
            }
            times.push(secs(t));
        }
        let all_ran = running() == 2;
        for location in jobs {
            let req = Request::delete(location.as_str())
                .body(Body::empty())
                .map_err(|e| e.to_string())?;
            let _ = router.clone().oneshot(req).await;
        }
        times.sort_by(f64::total_cmp);
        Ok(([times[PROBES / 2], times[PROBES - 1]], PROBES, all_ran))
    })
}

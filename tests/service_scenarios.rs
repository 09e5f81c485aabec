//! The `scenarios` process through the service: its draws against the exact laws the other
//! processes compute (zone pmfs, cell posteriors), the evidence held by every draw, seeds,
//! jobs, the command line and the limits.

mod service_support;

use axum::http::StatusCode;
use serde_json::{json, Value};
use service_support::*;
use statrs::distribution::{ChiSquared, ContinuousCDF};
use zonetally::Config;

const PATH: &str = "/processes/scenarios/execution";

/// Pearson's statistic of observed counts against expected ones, pooling the classes expected
/// fewer than 5 times into one (common practice), and its p-value from statrs' chi-square law.
fn chi_square_p(observed: &[u64], expected: &[f64]) -> f64 {
    let (mut stat, mut classes) = (0.0, 0usize);
    let (mut po, mut pe) = (0.0, 0.0);
    for (&o, &e) in observed.iter().zip(expected) {
        if e < 5.0 {
            po += o as f64;
            pe += e;
            continue;
        }
        stat += (o as f64 - e).powi(2) / e;
        classes += 1;
    }
    if pe > 0.0 {
        stat += (po - pe).powi(2) / pe;
        classes += 1;
    }
    // reference: statrs::distribution::ChiSquared, upper tail
    1.0 - ChiSquared::new((classes - 1) as f64).unwrap().cdf(stat)
}

/// A service that draws the 20,000 scenarios the frequency checks need.
fn roomy() -> axum::Router {
    state_with(Config {
        max_scenarios: 20_000,
        ..config()
    })
    .1
}

fn samples(doc: &Value) -> &Vec<Value> {
    doc["samples"].as_array().expect("samples")
}

/// A scenario's event cells.
fn cells_of(sample: &Value) -> Vec<u64> {
    sample["cells"]
        .as_array()
        .unwrap_or_else(|| panic!("no cells: {sample}"))
        .iter()
        .map(|c| c.as_u64().unwrap())
        .collect()
}

fn count_in(sample: &Value, zone: &str) -> u64 {
    sample["zones"][zone]
        .as_u64()
        .unwrap_or_else(|| panic!("no count for {zone}: {sample}"))
}

#[tokio::test]
async fn zone_counts_of_the_scenarios_follow_the_zone_counts_pmf() {
    let app = roomy();
    let zones = json!([
        {"id": "west", "rect": {"row": 0, "col": 0, "rows": 10, "cols": 4}},
        {"id": "band", "rect": {"row": 3, "col": 2, "rows": 3, "cols": 9}},
        {"id": "spot", "cells": [5, 17, 60, 119]}
    ]);
    let evidence = json!({"total": {"min": 36, "max": 44}});
    let inputs = json!({"raster": uneven_raster(12, 10), "zones": zones, "evidence": evidence,
        "count": 20_000, "seed": 1, "at_least": [3, 12]});
    let doc = post_json(&app, PATH, &json!({"inputs": inputs}), None)
        .await
        .ok_json();
    let exact = post_json(
        &app,
        "/processes/zone-counts/execution",
        &json!({"inputs": {"raster": uneven_raster(12, 10), "zones": zones, "evidence": evidence}}),
        None,
    )
    .await
    .ok_json();
    let draws = samples(&doc);
    assert_eq!(draws.len(), 20_000);
    for (z, zone) in exact["zones"].as_array().unwrap().iter().enumerate() {
        let id = zone["id"].as_str().unwrap();
        let offset = zone["pmf"]["offset"].as_u64().unwrap();
        let pmf: Vec<f64> = zone["pmf"]["values"]
            .as_array()
            .unwrap()
            .iter()
            .map(|v| v.as_f64().unwrap())
            .collect();
        let mut observed = vec![0u64; pmf.len()];
        for d in draws {
            let c = count_in(d, id);
            assert!(
                c >= offset && c < offset + pmf.len() as u64,
                "{id}: {c} is outside the exact law's support"
            );
            observed[(c - offset) as usize] += 1;
        }
        // reference: the zone-counts pmf, itself checked against mpmath's 60-digit naive
        // recursion in tests/reference
        let expected: Vec<f64> = pmf.iter().map(|p| p * 20_000.0).collect();
        let p = chi_square_p(&observed, &expected);
        assert!(p > 1e-3, "{id}: chi-square p-value {p}");
        let mean = doc["summary"]["zones"][z]["mean"].as_f64().unwrap();
        let sd = zone["sd"].as_f64().unwrap();
        let want = zone["mean"].as_f64().unwrap();
        assert!(
            (mean - want).abs() < 4.0 * sd / (20_000f64).sqrt(),
            "{id}: sampled mean {mean} vs exact {want}"
        );
    }
    // The summary's tallies are those of the samples sent.
    for at in doc["summary"]["at_least"].as_array().unwrap() {
        let k = at["k"].as_u64().unwrap();
        let mut tally = [0u64; 4];
        for d in draws {
            let reached = ["west", "band", "spot"]
                .iter()
                .filter(|z| count_in(d, z) >= k)
                .count();
            tally[reached] += 1;
        }
        let sent: Vec<u64> = at["scenarios"]
            .as_array()
            .unwrap()
            .iter()
            .map(|v| v.as_u64().unwrap())
            .collect();
        assert_eq!(sent[..], tally[..sent.len()], "k = {k}");
        assert!(tally[sent.len()..].iter().all(|&t| t == 0));
    }
    let matrix = &doc["summary"]["correlation"]["matrix"];
    assert_eq!(
        doc["summary"]["correlation"]["zones"],
        json!(["west", "band", "spot"])
    );
    assert_eq!(matrix[0][0], 1.0);
    assert_eq!(matrix[0][1], matrix[1][0]);
    assert!(doc["error_bound"].as_f64().unwrap() < 1e-9);
}

#[tokio::test]
async fn event_cells_of_the_scenarios_follow_the_cell_posterior() {
    let app = roomy();
    let raster = uneven_raster(10, 10);
    let evidence = json!({"total": {"min": 30, "max": 36}});
    let k = 20_000u64;
    let inputs = json!({"raster": raster, "zones": [{"id": "corner", "rect": {"row": 0, "col": 0, "rows": 5, "cols": 5}}],
        "evidence": evidence, "count": k, "seed": 9, "cells": true});
    let doc = post_json(&app, PATH, &json!({"inputs": inputs}), None)
        .await
        .ok_json();
    let posterior = post_json(
        &app,
        "/processes/cell-posterior/execution",
        &json!({"inputs": {"raster": raster, "evidence": evidence}}),
        None,
    )
    .await
    .ok_json();
    let mut hits = vec![0u64; 100];
    for d in samples(&doc) {
        let cells = cells_of(d);
        assert!(
            (30..=36).contains(&cells.len()),
            "a scenario of {} events breaks the evidence",
            cells.len()
        );
        assert!(cells.windows(2).all(|w| w[0] < w[1]), "cells not ascending");
        let corner = cells.iter().filter(|&&c| c / 10 < 5 && c % 10 < 5).count();
        assert_eq!(count_in(d, "corner"), corner as u64);
        for c in cells {
            hits[c as usize] += 1;
        }
    }
    // reference: the cell-posterior process, itself checked against brute-force enumeration
    // in tests/service_api (cell_posterior_matches_enumeration)
    for cell in posterior["cells"].as_array().unwrap() {
        let i = cell["cell"].as_u64().unwrap() as usize;
        let p = cell["posterior"].as_f64().unwrap();
        let freq = hits[i] as f64 / k as f64;
        let se = (p * (1.0 - p) / k as f64).sqrt();
        assert!(
            (freq - p).abs() < 4.0 * se,
            "cell {i}: frequency {freq} vs posterior {p} (se {se})"
        );
    }
}

#[tokio::test]
async fn every_scenario_holds_each_stratum_evidence() {
    let (_, app) = state_with(config());
    let mut inputs = tea_inputs();
    inputs.as_object_mut().unwrap().remove("summaries");
    inputs["evidence"] = json!({"strata": [
        {"id": "top", "rect": {"row": 0, "col": 0, "rows": 1, "cols": 4}, "total": 2},
        {"id": "pair", "cells": [4, 5], "total": {"min": 0, "max": 1}}
    ]});
    inputs["count"] = json!(4000);
    inputs["cells"] = json!(true);
    let doc = post_json(&app, PATH, &json!({"inputs": inputs}), None)
        .await
        .ok_json();
    let mut pair_one = 0u64;
    for d in samples(&doc) {
        let cells = cells_of(d);
        assert_eq!(cells.iter().filter(|&&c| c < 4).count(), 2, "{d}");
        let pair = cells.iter().filter(|&&c| c == 4 || c == 5).count();
        assert!(pair <= 1, "{d}");
        assert_eq!(count_in(d, "cups"), 2);
        assert_eq!(count_in(d, "pair"), pair as u64);
        pair_one += pair as u64;
    }
    // reference: closed form, P(one event in the pair | at most one) = (2/4) / (3/4)
    let share = pair_one as f64 / 4000.0;
    let se = (2.0f64 / 9.0 / 4000.0).sqrt();
    assert!((share - 2.0 / 3.0).abs() < 4.0 * se, "{share}");
    assert_eq!(doc["total"]["evidence"], "strata");
}

#[tokio::test]
async fn scenarios_repeat_with_their_seed_and_run_as_jobs() {
    let (_, app) = state_with(config());
    let mut inputs = tea_inputs();
    inputs.as_object_mut().unwrap().remove("summaries");
    inputs["count"] = json!(300);
    inputs["seed"] = json!(7);
    inputs["cells"] = json!(true);
    let body = json!({"inputs": inputs});
    let one = post_json(&app, PATH, &body, None).await;
    let two = post_json(&app, PATH, &body, None).await;
    assert_eq!(one.status, StatusCode::OK);
    assert_eq!(one.body, two.body, "one seed gave two sets of scenarios");
    let mut other = body.clone();
    other["inputs"]["seed"] = json!(8);
    let three = post_json(&app, PATH, &other, None).await;
    assert_ne!(one.body, three.body, "two seeds gave the same scenarios");
    let created = post_json(&app, PATH, &body, Some("respond-async")).await;
    assert_eq!(created.status, StatusCode::CREATED);
    let location = created.header("location").unwrap();
    let done = wait_job(&app, &location).await;
    assert_eq!(done["status"], "successful", "{done}");
    assert_eq!(done["progress"], 100);
    let results = get(&app, &format!("{location}/results")).await;
    assert_eq!(
        results.body, one.body,
        "the job and the sync request differ"
    );
    // The command line runs the same process on the same inputs.
    let dir = std::env::temp_dir().join(format!("zonetally-scenarios-{}", std::process::id()));
    std::fs::create_dir_all(&dir).unwrap();
    let file = dir.join("request.json");
    std::fs::write(&file, serde_json::to_vec(&inputs).unwrap()).unwrap();
    let out = std::process::Command::new(env!("CARGO_BIN_EXE_zonetally"))
        .args(["eval", "--process", "scenarios"])
        .arg(&file)
        .output()
        .unwrap();
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    assert_eq!(out.stdout.strip_suffix(b"\n").unwrap(), &one.body[..]);
    let bad = std::process::Command::new(env!("CARGO_BIN_EXE_zonetally"))
        .args(["eval", "--process", "scenario"])
        .arg(&file)
        .output()
        .unwrap();
    assert_eq!(bad.status.code(), Some(2));
    assert!(String::from_utf8_lossy(&bad.stderr).contains("scenarios"));
}

#[tokio::test]
async fn scenario_requests_past_the_limits_are_refused_with_their_field() {
    let (_, app) = state_with(Config {
        max_scenario_bytes: 1 << 20,
        ..config()
    });
    let mut inputs = tea_inputs();
    inputs.as_object_mut().unwrap().remove("summaries");
    let cases = [
        (
            json!({"count": 0}),
            StatusCode::BAD_REQUEST,
            "/inputs/count",
        ),
        (
            json!({"count": 10_001}),
            StatusCode::PAYLOAD_TOO_LARGE,
            "/inputs/count",
        ),
        (
            json!({"count": 10_000, "cells": true}),
            StatusCode::PAYLOAD_TOO_LARGE,
            "/inputs/cells",
        ),
        (
            json!({"count": 10, "correlation": ["cups", "nowhere"]}),
            StatusCode::BAD_REQUEST,
            "/inputs/correlation/1",
        ),
        (
            json!({"count": 10, "correlation": ["cups", "cups"]}),
            StatusCode::BAD_REQUEST,
            "/inputs/correlation/1",
        ),
        (
            json!({"count": 10, "correlation": vec!["cups"; 51]}),
            StatusCode::PAYLOAD_TOO_LARGE,
            "/inputs/correlation",
        ),
        (
            json!({"count": -1}),
            StatusCode::BAD_REQUEST,
            "/inputs/count",
        ),
    ];
    for (extra, status, pointer) in cases {
        let mut body = inputs.clone();
        for (k, v) in extra.as_object().unwrap() {
            body[k] = v.clone();
        }
        let r = post_json(&app, PATH, &json!({"inputs": body}), None).await;
        assert_eq!(
            r.status,
            status,
            "{extra}: {}",
            String::from_utf8_lossy(&r.body)
        );
        let problem = r.json();
        assert_eq!(problem["pointer"], pointer, "{extra}: {problem}");
        assert!(problem["detail"].as_str().unwrap().len() > 20, "{problem}");
    }
    // The server still serves.
    let mut body = inputs.clone();
    body["count"] = json!(5);
    post_json(&app, PATH, &json!({"inputs": body}), None)
        .await
        .ok_json();
}

#[tokio::test]
async fn the_process_is_listed_and_described() {
    let (_, app) = state_with(config());
    let d = get(&app, "/processes/scenarios").await.ok_json();
    assert_eq!(d["id"], "scenarios");
    for input in [
        "raster",
        "zones",
        "evidence",
        "count",
        "seed",
        "cells",
        "at_least",
        "correlation",
    ] {
        assert!(d["inputs"][input].is_object(), "no input {input}: {d}");
    }
    assert!(d["outputs"]["scenarios"]["schema"].is_object());
}

#[tokio::test]
async fn event_cells_come_as_geojson_points_at_the_cell_centres() {
    let (_, app) = state_with(config());
    // A georeferenced 4x3 raster of 10 m cells from (1000, 2000).
    let mut raster = uneven_raster(4, 3);
    raster["geotransform"] = json!([1000.0, 10.0, 0.0, 2000.0, 0.0, -10.0]);
    let inputs = json!({"raster": raster, "zones": [{"id": "all", "rect": {"row": 0, "col": 0, "rows": 3, "cols": 4}}],
        "evidence": {"total": 5}, "count": 40, "seed": 3, "cells": true});
    let json_doc = post_json(&app, PATH, &json!({"inputs": inputs}), None)
        .await
        .ok_json();
    let body = json!({"inputs": inputs, "outputs": {"scenarios": {"format": {"mediaType": "application/geo+json"}}}});
    let r = post_json(&app, PATH, &body, None).await;
    assert_eq!(
        r.header("content-type").as_deref(),
        Some("application/geo+json")
    );
    let points = r.ok_json();
    assert_eq!(points["type"], "FeatureCollection");
    let features = points["features"].as_array().unwrap();
    assert_eq!(
        features.len(),
        40 * 5,
        "one point per event cell and scenario"
    );
    let mut at = 0;
    for (i, d) in samples(&json_doc).iter().enumerate() {
        for cell in cells_of(d) {
            let f = &features[at];
            at += 1;
            assert_eq!(f["properties"]["scenario"], i);
            assert_eq!(f["properties"]["cell"], cell);
            let (row, col) = ((cell / 4) as f64, (cell % 4) as f64);
            // reference: closed form, the cell-centre rule (x0 + (col + 1/2) dx, y0 + (row +
            // 1/2) dy), as rasterio.transform.xy gives with offset="center"
            assert_eq!(
                f["geometry"],
                json!({"type": "Point", "coordinates": [1000.0 + (col + 0.5) * 10.0, 2000.0 - (row + 0.5) * 10.0]})
            );
        }
    }
    assert_eq!(points["summary"], json_doc["summary"]);
    assert_eq!(points["grid"]["geotransform"], raster["geotransform"]);
    // Points need the event cells.
    let mut without = body.clone();
    without["inputs"]["cells"] = json!(false);
    let r = post_json(&app, PATH, &without, None).await;
    assert_eq!(r.status, StatusCode::BAD_REQUEST);
    assert_eq!(r.json()["pointer"], "/inputs/cells");
}

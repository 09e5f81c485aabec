//! In-process tests of the service: every endpoint through `app(state).oneshot(..)`.

mod service_support;

use std::time::Duration;

use axum::body::Body;
use axum::http::{Request, StatusCode};
use serde_json::{json, Value};
use service_support::*;
use statrs::distribution::{Binomial, Discrete, Hypergeometric};
use zonetally::Config;

#[tokio::test]
async fn landing_page_links_the_ogc_resources_and_the_demo() {
    let (_, app) = state_with(config());
    let r = get(&app, "/").await;
    assert_eq!(r.status, StatusCode::OK);
    let links = r.json()["links"].as_array().unwrap().clone();
    let find = |rel: &str| {
        links
            .iter()
            .find(|l| l["rel"] == rel)
            .cloned()
            .unwrap_or_else(|| panic!("no {rel} link"))
    };
    assert_eq!(find("service-desc")["href"], "/openapi.json");
    assert_eq!(
        find("service-desc")["type"],
        "application/vnd.oai.openapi+json;version=3.1"
    );
    for rel in ["conformance", "processes", "job-list"] {
        find(&format!("http://www.opengis.net/def/rel/ogc/1.0/{rel}"));
    }
    assert_eq!(find("service-doc")["href"], "/demo");
}

#[tokio::test]
async fn conformance_claims_the_tested_classes_only() {
    let (_, app) = state_with(config());
    let v = get(&app, "/conformance").await.json();
    let got: Vec<&str> = v["conformsTo"]
        .as_array()
        .unwrap()
        .iter()
        .map(|c| c.as_str().unwrap())
        .collect();
    let base = "http://www.opengis.net/spec/ogcapi-processes-1/1.0/conf";
    for c in [
        "core",
        "ogc-process-description",
        "json",
        "job-list",
        "dismiss",
    ] {
        assert!(got.contains(&format!("{base}/{c}").as_str()), "missing {c}");
    }
    assert_eq!(got.len(), 5, "claims more than is tested: {got:?}");
}

#[tokio::test]
async fn processes_are_listed_and_described_with_schemas() {
    let (_, app) = state_with(config());
    let v = get(&app, "/processes").await.json();
    let ids: Vec<&str> = v["processes"]
        .as_array()
        .unwrap()
        .iter()
        .map(|p| p["id"].as_str().unwrap())
        .collect();
    assert_eq!(
        ids,
        ["zone-counts", "cell-posterior", "total-check", "scenarios"]
    );
    let d = get(&app, "/processes/zone-counts").await.json();
    assert_eq!(
        d["jobControlOptions"],
        json!(["sync-execute", "async-execute", "dismiss"])
    );
    for input in ["raster", "zones", "evidence", "summaries"] {
        assert!(
            d["inputs"][input]["schema"].is_object(),
            "input {input} has no schema: {d}"
        );
    }
    assert_eq!(d["inputs"]["summaries"]["minOccurs"], 0);
    assert!(
        d["outputs"]["counts"]["schema"]["properties"]["zones"].is_object(),
        "{d}"
    );
    // Every $ref of a description resolves in the served OpenAPI document.
    let spec: Value = serde_json::from_str(zonetally::api::openapi_json()).unwrap();
    let mut refs = Vec::new();
    collect_refs(&d, &mut refs);
    for other in ["cell-posterior", "scenarios"] {
        collect_refs(
            &get(&app, &format!("/processes/{other}")).await.json(),
            &mut refs,
        );
    }
    assert!(!refs.is_empty());
    for r in refs {
        let name = r
            .strip_prefix("/openapi.json#/components/schemas/")
            .unwrap_or_else(|| panic!("odd ref {r}"));
        assert!(
            spec["components"]["schemas"][name].is_object(),
            "ref {r} does not resolve"
        );
    }
    let missing = get(&app, "/processes/nowhere").await;
    assert_eq!(missing.status, StatusCode::NOT_FOUND);
    assert_eq!(
        missing.json()["type"],
        "http://www.opengis.net/def/exceptions/ogcapi-processes-1/1.0/no-such-process"
    );
}

fn collect_refs(v: &Value, out: &mut Vec<String>) {
    match v {
        Value::Object(m) => m.iter().for_each(|(k, c)| {
            if k == "$ref" {
                out.push(c.as_str().unwrap().to_string());
            } else {
                collect_refs(c, out)
            }
        }),
        Value::Array(a) => a.iter().for_each(|c| collect_refs(c, out)),
        _ => {}
    }
}

#[tokio::test]
async fn sync_zone_counts_match_the_hypergeometric_law() {
    let (_, app) = state_with(config());
    let r = post_json(
        &app,
        "/processes/zone-counts/execution",
        &json!({"inputs": tea_inputs()}),
        None,
    )
    .await;
    assert_eq!(
        r.status,
        StatusCode::OK,
        "{}",
        String::from_utf8_lossy(&r.body)
    );
    assert_eq!(
        r.header("content-type").as_deref(),
        Some("application/json")
    );
    assert!(
        r.header("preference-applied").is_none(),
        "no preference was asked for"
    );
    let v = r.json();
    // reference: 8 equal cells, 4 events, a zone of 4 is hypergeometric(N=8, K=4, n=4);
    // statrs::distribution::Hypergeometric
    let hyper = Hypergeometric::new(8, 4, 4).unwrap();
    let pmf = v["zones"][0]["pmf"]["values"].as_array().unwrap();
    assert_eq!(pmf.len(), 5);
    for (k, p) in pmf.iter().enumerate() {
        assert!(
            (p.as_f64().unwrap() - hyper.pmf(k as u64)).abs() < 1e-14,
            "k {k}"
        );
    }
    // reference: closed form, P(N >= 3) = (16 + 1) / 70
    assert!((v["zones"][0]["exceedance"][0]["p"].as_f64().unwrap() - 17.0 / 70.0).abs() < 1e-14);
    // reference: statrs Hypergeometric(N=8, K=4, n=2) for the pair
    let pair = Hypergeometric::new(8, 4, 2).unwrap();
    for (k, p) in v["zones"][1]["pmf"]["values"]
        .as_array()
        .unwrap()
        .iter()
        .enumerate()
    {
        assert!((p.as_f64().unwrap() - pair.pmf(k as u64)).abs() < 1e-14);
    }
    assert_eq!(v["total"]["observed"], 4);
}

#[tokio::test]
async fn sync_results_equal_the_eval_command_output() {
    let (_, app) = state_with(config());
    let inputs = json!({"raster": uneven_raster(12, 10), "zones": [
        {"id": "west", "rect": {"row": 0, "col": 0, "rows": 10, "cols": 4}},
        {"id": "spot", "cells": [5, 17, 60, 119]}], "evidence": {"total": 30}, "summaries": {"exceedance": [5, 10], "interval": 0.8}});
    let dir = std::env::temp_dir().join(format!("zonetally-eval-{}", std::process::id()));
    std::fs::create_dir_all(&dir).unwrap();
    let file = dir.join("request.json");
    std::fs::write(&file, serde_json::to_vec(&inputs).unwrap()).unwrap();
    let out = std::process::Command::new(env!("CARGO_BIN_EXE_zonetally"))
        .arg("eval")
        .arg(&file)
        .output()
        .unwrap();
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let eval: Value = serde_json::from_slice(&out.stdout).unwrap();
    let r = post_json(
        &app,
        "/processes/zone-counts/execution",
        &json!({"inputs": inputs, "response": "document"}),
        Some("respond-sync"),
    )
    .await;
    assert_eq!(r.status, StatusCode::OK);
    assert_eq!(
        r.header("preference-applied").as_deref(),
        Some("respond-sync")
    );
    assert_eq!(
        r.json()["counts"],
        eval,
        "the service and `zonetally eval` disagree"
    );
}

#[tokio::test]
async fn async_results_agree_with_sync_bit_for_bit() {
    let (_, app) = state_with(config());
    for response in ["raw", "document"] {
        let body = json!({"inputs": tea_inputs(), "response": response});
        let sync = post_json(&app, "/processes/zone-counts/execution", &body, None).await;
        let created = post_json(
            &app,
            "/processes/zone-counts/execution",
            &body,
            Some("respond-async"),
        )
        .await;
        assert_eq!(created.status, StatusCode::CREATED);
        assert_eq!(
            created.header("preference-applied").as_deref(),
            Some("respond-async")
        );
        let location = created.header("location").unwrap();
        let info = created.json();
        assert_eq!(
            location,
            format!("/jobs/{}", info["jobID"].as_str().unwrap())
        );
        assert_eq!(info["processID"], "zone-counts");
        assert_eq!(info["type"], "process");
        let done = wait_job(&app, &location).await;
        assert_eq!(done["status"], "successful", "{done}");
        assert_eq!(done["progress"], 100);
        for f in ["created", "started", "finished", "updated"] {
            assert!(done[f].is_string(), "no {f}: {done}");
        }
        let results = get(&app, &format!("{location}/results")).await;
        assert_eq!(results.status, StatusCode::OK);
        assert_eq!(
            results.body, sync.body,
            "async and sync bodies differ for {response}"
        );
    }
}

#[tokio::test]
async fn get_requests_ignore_prefer() {
    let (_, app) = state_with(config());
    let r = send(
        &app,
        Request::get("/processes")
            .header("prefer", "respond-async")
            .body(Body::empty())
            .unwrap(),
    )
    .await;
    assert_eq!(r.status, StatusCode::OK);
    assert!(r.header("preference-applied").is_none());
    let unknown = json!({"inputs": tea_inputs()});
    let r = post_json(
        &app,
        "/processes/zone-counts/execution",
        &unknown,
        Some("handling=lenient, wait=5"),
    )
    .await;
    assert_eq!(r.status, StatusCode::OK, "unknown preferences are ignored");
}

#[tokio::test]
async fn polling_gets_etags_304s_and_retry_after_while_queued() {
    let (state, app) = state_with(config());
    let block = block_pool(&state);
    let created = submit_tea_job(&app).await;
    let location = created.header("location").unwrap();
    let first = get(&app, &location).await;
    assert_eq!(first.status, StatusCode::OK);
    assert_eq!(first.json()["status"], "accepted");
    assert_eq!(first.header("retry-after").as_deref(), Some("1"));
    let etag = first.header("etag").unwrap();
    let again = send(
        &app,
        Request::get(&location)
            .header("if-none-match", &etag)
            .body(Body::empty())
            .unwrap(),
    )
    .await;
    assert_eq!(again.status, StatusCode::NOT_MODIFIED);
    assert!(again.body.is_empty());
    assert_eq!(again.header("etag").as_deref(), Some(etag.as_str()));
    let not_ready = get(&app, &format!("{location}/results")).await;
    assert_eq!(not_ready.status, StatusCode::NOT_FOUND);
    assert_eq!(
        not_ready.json()["type"],
        "http://www.opengis.net/def/exceptions/ogcapi-processes-1/1.0/result-not-ready"
    );
    drop(block);
    let done = wait_job(&app, &location).await;
    assert_eq!(done["status"], "successful");
    let after = send(
        &app,
        Request::get(&location)
            .header("if-none-match", &etag)
            .body(Body::empty())
            .unwrap(),
    )
    .await;
    assert_eq!(
        after.status,
        StatusCode::OK,
        "a changed status must not match the old ETag"
    );
    assert_ne!(after.header("etag").unwrap(), etag);
    assert!(
        after.header("retry-after").is_none(),
        "finished jobs need no more polling"
    );
}

#[tokio::test]
async fn finished_jobs_expire_after_their_ttl() {
    let (_, app) = state_with(Config {
        job_ttl: 0.2,
        ..config()
    });
    let created = submit_tea_job(&app).await;
    let location = created.header("location").unwrap();
    assert_eq!(wait_job(&app, &location).await["status"], "successful");
    tokio::time::sleep(Duration::from_millis(400)).await;
    let gone = get(&app, &location).await;
    assert_eq!(gone.status, StatusCode::NOT_FOUND);
    assert_eq!(
        gone.json()["type"],
        "http://www.opengis.net/def/exceptions/ogcapi-processes-1/1.0/no-such-job"
    );
    assert_eq!(get(&app, "/jobs").await.json()["numberMatched"], 0);
}

#[tokio::test]
async fn dismissing_a_queued_job_cancels_it_before_it_runs() {
    let (state, app) = state_with(config());
    let block = block_pool(&state);
    let created = submit_tea_job(&app).await;
    let location = created.header("location").unwrap();
    let job_id = created.json()["jobID"].as_str().unwrap().to_string();
    assert!(!state
        .jobs()
        .record(&job_id)
        .unwrap()
        .unwrap()
        .cancel_requested());
    let dismissed = send(
        &app,
        Request::delete(&location).body(Body::empty()).unwrap(),
    )
    .await;
    assert_eq!(dismissed.status, StatusCode::OK);
    assert_eq!(dismissed.json()["status"], "dismissed");
    assert!(
        state
            .jobs()
            .record(&job_id)
            .unwrap()
            .unwrap()
            .cancel_requested(),
        "dismiss must set the job's stored cancellation flag"
    );
    assert_eq!(
        get(&app, &location).await.status,
        StatusCode::NOT_FOUND,
        "a dismissed job is forgotten"
    );
    drop(block);
    until("the pool to skip the cancelled work", || {
        state.pool_stats().skipped_cancelled == 1
    })
    .await;
    assert_eq!(state.pool_stats().running, 0);
    let text = get(&app, "/metrics").await;
    assert_eq!(
        metric(
            std::str::from_utf8(&text.body).unwrap(),
            "zonetally_computations_cancelled_total"
        ),
        1.0
    );
    assert_eq!(
        send(
            &app,
            Request::delete(&location).body(Body::empty()).unwrap()
        )
        .await
        .status,
        StatusCode::NOT_FOUND
    );
}

#[tokio::test]
async fn a_full_queue_answers_503_with_retry_after() {
    let (state, app) = state_with(Config {
        queue: 2,
        ..config()
    });
    let block = block_pool(&state);
    let body = json!({"inputs": tea_inputs()});
    for _ in 0..2 {
        let r = post_json(
            &app,
            "/processes/zone-counts/execution",
            &body,
            Some("respond-async"),
        )
        .await;
        assert_eq!(r.status, StatusCode::CREATED);
    }
    let refused = post_json(
        &app,
        "/processes/zone-counts/execution",
        &body,
        Some("respond-async"),
    )
    .await;
    assert_eq!(refused.status, StatusCode::SERVICE_UNAVAILABLE);
    assert_eq!(refused.header("retry-after").as_deref(), Some("1"));
    assert_eq!(refused.json()["type"], "/problems/busy");
    let text = String::from_utf8(get(&app, "/metrics").await.body.to_vec()).unwrap();
    assert_eq!(metric(&text, "zonetally_queue_depth"), 2.0);
    assert_eq!(metric(&text, "zonetally_queue_rejections_total"), 1.0);
    assert_eq!(
        get(&app, "/jobs").await.json()["numberMatched"],
        2,
        "the refused job is not kept"
    );
    drop(block);
    until("the queue to drain", || state.pool_stats().queued == 0).await;
    let r = post_json(&app, "/processes/zone-counts/execution", &body, None).await;
    assert_eq!(
        r.status,
        StatusCode::OK,
        "the service serves again once the queue drains"
    );
}

#[tokio::test]
async fn sync_requests_over_the_budget_are_sent_to_async() {
    let (_, app) = state_with(Config {
        sync_budget: 1.0,
        ..config()
    });
    let body = json!({"inputs": tea_inputs()});
    let r = post_json(&app, "/processes/zone-counts/execution", &body, None).await;
    assert_eq!(r.status, StatusCode::PAYLOAD_TOO_LARGE);
    let p = r.json();
    assert_eq!(p["type"], "/problems/sync-too-costly");
    assert!(
        p["detail"]
            .as_str()
            .unwrap()
            .contains("Prefer: respond-async"),
        "{p}"
    );
    let r = post_json(
        &app,
        "/processes/zone-counts/execution",
        &body,
        Some("respond-async"),
    )
    .await;
    assert_eq!(
        r.status,
        StatusCode::CREATED,
        "the same request is taken async"
    );
}

#[tokio::test]
async fn job_list_pages_and_filters() {
    let (_, app) = state_with(config());
    let mut ids = Vec::new();
    for _ in 0..3 {
        let r = submit_tea_job(&app).await;
        ids.push(r.header("location").unwrap());
    }
    let post = json!({"inputs": {"raster": {"width": 2, "height": 1, "values": [0.5, 0.5]}, "evidence": {"total": 1}}});
    let r = post_json(
        &app,
        "/processes/cell-posterior/execution",
        &post,
        Some("respond-async"),
    )
    .await;
    ids.push(r.header("location").unwrap());
    for loc in &ids {
        wait_job(&app, loc).await;
    }
    let page = get(&app, "/jobs?limit=2").await.json();
    assert_eq!(page["jobs"].as_array().unwrap().len(), 2);
    assert_eq!(page["numberMatched"], 4);
    let next = page["links"]
        .as_array()
        .unwrap()
        .iter()
        .find(|l| l["rel"] == "next")
        .unwrap()["href"]
        .as_str()
        .unwrap()
        .to_string();
    let page2 = get(&app, &next).await.json();
    assert_eq!(page2["jobs"].as_array().unwrap().len(), 2);
    assert!(page2["links"]
        .as_array()
        .unwrap()
        .iter()
        .all(|l| l["rel"] != "next"));
    let mut seen: Vec<String> = page["jobs"]
        .as_array()
        .unwrap()
        .iter()
        .chain(page2["jobs"].as_array().unwrap())
        .map(|j| j["jobID"].as_str().unwrap().to_string())
        .collect();
    seen.sort();
    seen.dedup();
    assert_eq!(seen.len(), 4, "pages overlap");
    let only = get(&app, "/jobs?processID=cell-posterior").await.json();
    assert_eq!(only["numberMatched"], 1);
    assert_eq!(only["jobs"][0]["processID"], "cell-posterior");
    assert_eq!(
        get(&app, "/jobs?status=successful").await.json()["numberMatched"],
        4
    );
    assert_eq!(
        get(&app, "/jobs?status=running,failed").await.json()["numberMatched"],
        0
    );
    let bad = get(&app, "/jobs?status=finished").await;
    assert_eq!(bad.status, StatusCode::BAD_REQUEST);
    assert_eq!(bad.json()["type"], "/problems/bad-query");
    assert_eq!(
        get(&app, "/jobs?limit=zero").await.status,
        StatusCode::BAD_REQUEST
    );
}

#[tokio::test]
async fn rasters_by_reference_reuse_the_cached_normaliser() {
    let (_, app) = state_with(config());
    let raster = uneven_raster(10, 8);
    let posted = post_json(&app, "/rasters", &raster, None).await;
    assert_eq!(
        posted.status,
        StatusCode::CREATED,
        "{}",
        String::from_utf8_lossy(&posted.body)
    );
    let info = posted.json();
    let reference = info["ref"].as_str().unwrap().to_string();
    assert!(reference.starts_with("sha256:") && reference.len() == 71);
    assert_eq!(info["width"], 10);
    assert_eq!(info["valid_cells"], 80);
    let sum: f64 = raster["values"]
        .as_array()
        .unwrap()
        .iter()
        .map(|v| v.as_f64().unwrap())
        .sum();
    assert!((info["sum_p"].as_f64().unwrap() - sum).abs() < 1e-12);
    assert_eq!(
        posted.header("location").unwrap(),
        format!("/rasters/{reference}")
    );
    assert_eq!(
        get(&app, &format!("/rasters/{reference}")).await.json()["ref"],
        reference.as_str()
    );

    let zones = json!([{"id": "a", "rect": {"row": 0, "col": 0, "rows": 4, "cols": 5}}]);
    let by_ref = json!({"inputs": {"raster": {"ref": reference}, "zones": zones, "evidence": {"total": 20}}});
    let inline = json!({"inputs": {"raster": raster, "zones": zones, "evidence": {"total": 20}}});
    let metrics = |t: &str| {
        (
            metric(t, "zonetally_cache_hits_total{cache=\"normaliser\"}"),
            metric(t, "zonetally_cache_misses_total{cache=\"normaliser\"}"),
        )
    };
    let text = |r: Reply| String::from_utf8(r.body.to_vec()).unwrap();
    let r1 = post_json(&app, "/processes/zone-counts/execution", &by_ref, None).await;
    assert_eq!(
        r1.status,
        StatusCode::OK,
        "{}",
        String::from_utf8_lossy(&r1.body)
    );
    assert_eq!(
        metrics(&text(get(&app, "/metrics").await)),
        (0.0, 1.0),
        "first request computes the normaliser"
    );
    let r2 = post_json(&app, "/processes/zone-counts/execution", &inline, None).await;
    assert_eq!(
        metrics(&text(get(&app, "/metrics").await)),
        (1.0, 1.0),
        "the inline copy hashes alike and reuses it"
    );
    assert_eq!(r1.body, r2.body);
    let m = text(get(&app, "/metrics").await);
    assert!(metric(&m, "zonetally_cache_bytes{cache=\"raster\"}") >= 80.0 * 8.0);
    assert!(metric(&m, "zonetally_cache_hits_total{cache=\"raster\"}") >= 2.0);

    let unknown = json!({"inputs": {"raster": {"ref": format!("sha256:{}", "0".repeat(64))}, "zones": zones, "evidence": {"total": 20}}});
    let r = post_json(&app, "/processes/zone-counts/execution", &unknown, None).await;
    assert_eq!(r.status, StatusCode::BAD_REQUEST);
    assert_eq!(r.json()["pointer"], "/inputs/raster/ref");
    assert_eq!(
        get(&app, &format!("/rasters/sha256:{}", "1".repeat(64)))
            .await
            .status,
        StatusCode::NOT_FOUND
    );
}

#[tokio::test]
async fn total_check_and_zone_counts_take_a_range_and_a_detected_count() {
    let (_, app) = state_with(config());
    let raster = tea_inputs()["raster"].clone();
    let body = json!({"inputs": {"raster": raster, "evidence": {"total": {"min": 2, "max": 5}}}});
    let r = post_json(&app, "/processes/total-check/execution", &body, None).await;
    assert_eq!(
        r.status,
        StatusCode::OK,
        "{}",
        String::from_utf8_lossy(&r.body)
    );
    let v = r.json();
    // reference: statrs::distribution::Binomial(8, 0.5) is the prior of the total of 8 fair cells
    let prior = Binomial::new(0.5, 8).unwrap();
    assert_eq!(v["evidence"], "range");
    assert!(v.get("observed").is_none());
    // (the pmf summed: statrs's cdf goes through the incomplete beta and is a few ulp off)
    let cdf = |b: &Binomial, k: u64| (0..=k).map(|j| b.pmf(j)).sum::<f64>();
    assert!((v["p_at_most"].as_f64().unwrap() - cdf(&prior, 5)).abs() < 1e-15);
    assert!((v["p_at_least"].as_f64().unwrap() - (1.0 - cdf(&prior, 1))).abs() < 1e-15);
    let mass: f64 = (2..=5).map(|m| prior.pmf(m)).sum();
    assert!((v["log_likelihood"].as_f64().unwrap() - mass.ln()).abs() < 1e-13);
    // reference: statrs Binomial(8, 0.5) quantiles, 0.5% and 99.5%
    assert_eq!(
        v["prior_interval"],
        json!({"level": 0.99, "lower": 1, "upper": 7})
    );
    let post = &v["posterior"];
    assert_eq!(post["pmf"]["offset"], 2);
    for (i, p) in post["pmf"]["values"].as_array().unwrap().iter().enumerate() {
        let want = prior.pmf(2 + i as u64) / mass;
        assert!(
            (p.as_f64().unwrap() - want).abs() < 1e-15,
            "P(total = {})",
            2 + i
        );
    }
    assert!(post["error_bound"].as_f64().unwrap() <= 1e-13);
    assert!(v.get("warning").is_none());

    // The zone of 4 cells: reference: the mixture over the range of statrs Hypergeometric(8, m, 4)
    let mut zc = json!({"inputs": tea_inputs()});
    zc["inputs"]["evidence"]["total"] = json!({"min": 2, "max": 5});
    let z = post_json(&app, "/processes/zone-counts/execution", &zc, None)
        .await
        .json();
    let pmf = z["zones"][0]["pmf"]["values"].as_array().unwrap();
    for (k, p) in pmf.iter().enumerate() {
        let want: f64 = (2..=5)
            .map(|m| prior.pmf(m) / mass * Hypergeometric::new(8, m, 4).unwrap().pmf(k as u64))
            .sum();
        assert!((p.as_f64().unwrap() - want).abs() < 1e-14, "k {k}");
    }
    assert_eq!(z["total"]["posterior"]["pmf"], post["pmf"]);

    // 3 detected at rate 0.5: the detected count is Binomial(8, 0.25); the posterior of the true
    // total is proportional to Binomial(8, 0.5)(m) x Binomial(m, 0.5)(3).
    let body = json!({"inputs": {"raster": tea_inputs()["raster"], "evidence": {"total": {"detected": 3, "detection": 0.5}}, "summaries": {"interval": 0.8}}});
    let v = post_json(&app, "/processes/total-check/execution", &body, None)
        .await
        .json();
    assert_eq!(v["observed"], 3);
    let thinned = Binomial::new(0.25, 8).unwrap();
    assert!((v["p_at_most"].as_f64().unwrap() - cdf(&thinned, 3)).abs() < 1e-15);
    assert!((v["log_likelihood"].as_f64().unwrap() - thinned.ln_pmf(3)).abs() < 1e-13);
    let w: Vec<f64> = (3..=8)
        .map(|m| prior.pmf(m) * Binomial::new(0.5, m).unwrap().pmf(3))
        .collect();
    let s: f64 = w.iter().sum();
    let got = &v["posterior"]["pmf"];
    assert_eq!(got["offset"], 3);
    for (i, p) in got["values"].as_array().unwrap().iter().enumerate() {
        assert!(
            (p.as_f64().unwrap() - w[i] / s).abs() < 1e-15,
            "P(total = {} | 3 found)",
            3 + i
        );
    }
    assert_eq!(v["posterior"]["interval"]["level"], 0.8);
}

#[tokio::test]
async fn strata_each_with_their_own_total_reach_zone_counts_and_the_total_check() {
    let (_, app) = state_with(config());
    // Two strata of the 8 fair cells: the top row with exactly 2 events, cells 4 and 5 with a
    // range [0, 1]; cells 6 and 7 unconstrained.
    let mut body = json!({"inputs": tea_inputs()});
    body["inputs"]["evidence"] = json!({"strata": [
        {"id": "top", "rect": {"row": 0, "col": 0, "rows": 1, "cols": 4}, "total": 2},
        {"id": "pair", "cells": [4, 5], "total": {"min": 0, "max": 1}}
    ]});
    let r = post_json(&app, "/processes/zone-counts/execution", &body, None).await;
    assert_eq!(
        r.status,
        StatusCode::OK,
        "{}",
        String::from_utf8_lossy(&r.body)
    );
    let v = r.json();
    // reference: closed form; the zone "cups" is the top row, so it holds exactly 2.
    assert_eq!(v["zones"][0]["pmf"], json!({"offset": 2, "values": [1.0]}));
    // The pair given at most one event: P(0) = 1/3, P(1) = 2/3 (closed form: 1/4 vs 2/4).
    let pair = v["zones"][1]["pmf"]["values"].as_array().unwrap();
    assert!((pair[0].as_f64().unwrap() - 1.0 / 3.0).abs() < 1e-15);
    assert!((pair[1].as_f64().unwrap() - 2.0 / 3.0).abs() < 1e-15);
    let total = &v["total"];
    assert_eq!(total["evidence"], "strata");
    assert_eq!(total["strata"][0]["id"], "top");
    assert_eq!(total["strata"][1]["check"]["evidence"], "range");
    // The true total: 2 + (pair: 1/3, 2/3) + Binomial(2, 1/2) for cells 6 and 7.
    // reference: closed form, the convolution (1/3, 2/3) * (1/4, 1/2, 1/4) shifted by 2
    let want = [
        1.0 / 12.0,
        1.0 / 6.0 + 1.0 / 6.0,
        1.0 / 12.0 + 1.0 / 3.0,
        1.0 / 6.0,
    ];
    let got = total["posterior"]["pmf"]["values"].as_array().unwrap();
    assert_eq!(total["posterior"]["pmf"]["offset"], 2);
    for (g, w) in got.iter().zip(want) {
        assert!((g.as_f64().unwrap() - w).abs() < 1e-15, "{got:?}");
    }
    let check = post_json(
        &app,
        "/processes/total-check/execution",
        &json!({"inputs": {"raster": tea_inputs()["raster"], "evidence": body["inputs"]["evidence"]}}),
        None,
    )
    .await
    .json();
    assert_eq!(check["posterior"], total["posterior"]);
    // The cell posterior under the same strata. reference: closed form; a top-row cell holds an
    // event in 2 of 4 fair cells (1/2), cell 4 given at most one event in the pair (1/4 over
    // 3/4), cell 6 is unconstrained (its prior 1/2)
    let cells = post_json(
        &app,
        "/processes/cell-posterior/execution",
        &json!({"inputs": {"raster": tea_inputs()["raster"], "evidence": body["inputs"]["evidence"], "cells": [0, 4, 6]}}),
        None,
    )
    .await;
    assert_eq!(
        cells.status,
        StatusCode::OK,
        "{}",
        String::from_utf8_lossy(&cells.body)
    );
    let cells = cells.json();
    for (i, want) in [0.5, 1.0 / 3.0, 0.5].iter().enumerate() {
        let got = cells["cells"][i]["posterior"].as_f64().unwrap();
        assert!(
            (got - want).abs() < 1e-15,
            "cell {}: {got} vs {want}",
            cells["cells"][i]["cell"]
        );
    }
    assert_eq!(cells["total"]["posterior"], total["posterior"]);
}

#[tokio::test]
async fn strata_by_geometry_or_by_label_hold_the_cells_a_list_names() {
    let (_, app) = state_with(config());
    // A georeferenced 4x3 raster, 10 m cells from (1000, 2000) down to (1040, 1970); cell 8
    // (row 2, column 0) is nodata, so no stratum can hold it.
    let mut raster = uneven_raster(4, 3);
    raster["values"][8] = Value::Null;
    raster["geotransform"] = json!([1000.0, 10.0, 0.0, 2000.0, 0.0, -10.0]);
    let zones = json!([
        {"id": "north", "rect": {"row": 0, "col": 0, "rows": 1, "cols": 4}},
        {"id": "west", "rect": {"row": 0, "col": 0, "rows": 3, "cols": 2}},
        {"id": "east", "cells": [3, 7, 11]}
    ]);
    let square = |x0: f64, y0: f64, x1: f64, y1: f64| {
        json!([[[x0, y0], [x1, y0], [x1, y1], [x0, y1], [x0, y0]]])
    };
    // The same two strata three ways: the top row with 2 events, and the 2x2 block below it on
    // the west (cells 4, 5, 9 once nodata cell 8 is left out) with 1 to 2 events.
    let by_cells = json!([
        {"id": "upper", "rect": {"row": 0, "col": 0, "rows": 1, "cols": 4}, "total": 2},
        {"id": "lower-west", "cells": [4, 5, 9], "total": {"min": 1, "max": 2}}
    ]);
    // reference: common practice (the cell-centre rule of raster burning, as GDAL's
    // rasteriser and rasterio.features.rasterize apply it by default): a cell belongs to a
    // polygon when its centre lies inside; centres here sit 5 m from every edge.
    let by_geometry = json!([
        {"id": "upper", "geometry": {"type": "Polygon", "coordinates": square(1000.0, 1990.0, 1040.0, 2000.0)}, "total": 2},
        {"id": "lower-west", "geometry": {"type": "MultiPolygon", "coordinates": [
            square(1000.0, 1980.0, 1020.0, 1990.0), square(1000.0, 1970.0, 1020.0, 1980.0)
        ]}, "total": {"min": 1, "max": 2}}
    ]);
    let by_label = json!([
        {"id": "upper", "label": 7, "total": 2},
        {"id": "lower-west", "label": -3, "total": {"min": 1, "max": 2}}
    ]);
    let labels =
        json!({"width": 4, "height": 3, "values": [7, 7, 7, 7, -3, -3, 0, 0, -3, -3, 0, null]});
    let mut answers = Vec::new();
    for evidence in [
        json!({"strata": by_cells}),
        json!({"strata": by_geometry}),
        json!({"strata": by_label, "labels": labels}),
    ] {
        let body = json!({"inputs": {"raster": raster, "zones": zones, "evidence": evidence}});
        let v = post_json(&app, "/processes/zone-counts/execution", &body, None)
            .await
            .ok_json();
        let check = post_json(
            &app,
            "/processes/total-check/execution",
            &json!({"inputs": {"raster": raster, "evidence": evidence}}),
            None,
        )
        .await
        .ok_json();
        answers.push((v["zones"].clone(), v["total"].clone(), check));
    }
    // The zone "north" is the upper stratum: exactly 2 (reference: closed form).
    assert_eq!(
        answers[0].0[0]["pmf"],
        json!({"offset": 2, "values": [1.0]})
    );
    assert_eq!(answers[0].1["strata"][1]["cells"], 3);
    assert_eq!(answers[1], answers[0], "geometry strata");
    assert_eq!(answers[2], answers[0], "label strata");
}

#[tokio::test]
async fn cell_posterior_matches_enumeration() {
    let (_, app) = state_with(config());
    let p = [0.2, 0.5, 0.9];
    let body = json!({"inputs": {"raster": {"width": 3, "height": 1, "values": p}, "evidence": {"total": 1}, "cells": [2, 0]}});
    let r = post_json(&app, "/processes/cell-posterior/execution", &body, None).await;
    assert_eq!(
        r.status,
        StatusCode::OK,
        "{}",
        String::from_utf8_lossy(&r.body)
    );
    let v = r.json();
    // reference: closed form by enumeration of the three one-event worlds,
    // P(only i) = p_i * prod_{j != i} (1 - p_j), normalised
    let w: Vec<f64> = (0..3)
        .map(|i| {
            (0..3)
                .map(|j| if i == j { p[j] } else { 1.0 - p[j] })
                .product()
        })
        .collect();
    let z: f64 = w.iter().sum();
    let cells = v["cells"].as_array().unwrap();
    assert_eq!(cells.len(), 2);
    for (c, want) in [(2usize, w[2] / z), (0, w[0] / z)].iter().zip(cells) {
        let (cell, post) = (c.0, c.1);
        assert_eq!(want["cell"], cell);
        assert!((want["prior"].as_f64().unwrap() - p[cell]).abs() < 1e-15);
        assert!(
            (want["posterior"].as_f64().unwrap() - post).abs() < 1e-13,
            "cell {cell}"
        );
    }
    let doc = post_json(
        &app,
        "/processes/cell-posterior/execution",
        &json!({"inputs": body["inputs"], "response": "document"}),
        None,
    )
    .await
    .json();
    assert_eq!(doc["posterior"], v);
}

#[tokio::test]
async fn operations_endpoints_answer() {
    let (_, app) = state_with(config());
    assert_eq!(get(&app, "/healthz").await.json()["status"], "alive");
    let ready = get(&app, "/readyz").await;
    assert_eq!(ready.status, StatusCode::OK);
    assert_eq!(ready.json()["compute_threads"], 2);
    let _ = post_json(
        &app,
        "/processes/zone-counts/execution",
        &json!({"inputs": tea_inputs()}),
        None,
    )
    .await;
    let m = get(&app, "/metrics").await;
    assert!(m.header("content-type").unwrap().starts_with("text/plain"));
    let text = String::from_utf8(m.body.to_vec()).unwrap();
    let series = "{route=\"/processes/{processId}/execution\",method=\"POST\",status=\"200\"}";
    assert_eq!(
        metric(&text, &format!("zonetally_http_requests_total{series}")),
        1.0
    );
    let labels = series.trim_start_matches('{').trim_end_matches('}');
    assert_eq!(
        metric(
            &text,
            &format!("zonetally_http_request_duration_seconds_bucket{{{labels},le=\"+Inf\"}}")
        ),
        1.0
    );
    assert_eq!(metric(&text, "zonetally_cells_processed_total"), 6.0);
    assert!(metric(&text, "zonetally_compute_seconds_total") > 0.0);
    let demo = get(&app, "/demo").await;
    assert!(demo
        .header("content-type")
        .unwrap()
        .starts_with("text/html"));
    assert_eq!(
        demo.body,
        include_str!("../demo/page/index.html").as_bytes()
    );
    let scenario = get(&app, "/demo/valley.json").await;
    assert_eq!(
        scenario.body,
        include_str!("../demo/valley.json").as_bytes()
    );
    let r = post_json(
        &app,
        "/processes/zone-counts/execution",
        &json!({"inputs": scenario.json()}),
        None,
    )
    .await;
    assert_eq!(
        r.status,
        StatusCode::OK,
        "the demo scenario is a valid request: {}",
        String::from_utf8_lossy(&r.body)
    );
}

#[tokio::test]
async fn responses_are_gzipped_on_request_and_carry_a_request_id() {
    let (_, app) = state_with(config());
    let r = send(
        &app,
        Request::get("/openapi.json")
            .header("accept-encoding", "gzip")
            .body(Body::empty())
            .unwrap(),
    )
    .await;
    assert_eq!(r.header("content-encoding").as_deref(), Some("gzip"));
    assert!(r.header("x-request-id").is_some_and(|id| id.len() == 36));
    let r = send(
        &app,
        Request::get("/healthz")
            .header("x-request-id", "poll-42")
            .body(Body::empty())
            .unwrap(),
    )
    .await;
    assert_eq!(
        r.header("x-request-id").as_deref(),
        Some("poll-42"),
        "a caller's request id is kept"
    );
}

#[tokio::test]
async fn cors_allows_listed_origins_only() {
    let (_, app) = state_with(Config {
        cors_origins: vec!["http://dashboard.test".into()],
        ..config()
    });
    let pre = |origin: &str| {
        Request::options("/processes/zone-counts/execution")
            .header("origin", origin)
            .header("access-control-request-method", "POST")
            .header("access-control-request-headers", "content-type,prefer")
            .body(Body::empty())
            .unwrap()
    };
    let ok = send(&app, pre("http://dashboard.test")).await;
    assert_eq!(
        ok.header("access-control-allow-origin").as_deref(),
        Some("http://dashboard.test")
    );
    let other = send(&app, pre("http://elsewhere.test")).await;
    assert!(other.header("access-control-allow-origin").is_none());
}

#[tokio::test]
async fn shutdown_fails_unfinished_jobs_and_refuses_new_work() {
    let (state, app) = state_with(config());
    let block = block_pool(&state);
    let created = submit_tea_job(&app).await;
    let location = created.header("location").unwrap();
    assert_eq!(state.begin_shutdown(), 1);
    let st = get(&app, &location).await.json();
    assert_eq!(st["status"], "failed");
    assert!(
        st["message"].as_str().unwrap().contains("shut down"),
        "{st}"
    );
    let res = get(&app, &format!("{location}/results")).await;
    assert_eq!(res.status, StatusCode::SERVICE_UNAVAILABLE);
    assert_eq!(res.json()["type"], "/problems/shutting-down");
    let refused = post_json(
        &app,
        "/processes/zone-counts/execution",
        &json!({"inputs": tea_inputs()}),
        None,
    )
    .await;
    assert_eq!(refused.status, StatusCode::SERVICE_UNAVAILABLE);
    assert_eq!(
        get(&app, "/readyz").await.status,
        StatusCode::SERVICE_UNAVAILABLE
    );
    assert_eq!(get(&app, "/healthz").await.status, StatusCode::OK);
    drop(block);
    until("the cancelled job to be skipped", || {
        state.pool_stats().skipped_cancelled == 1
    })
    .await;
    assert_eq!(
        get(&app, &location).await.json()["status"],
        "failed",
        "the runner must not overwrite the shutdown failure"
    );
}

#[tokio::test]
async fn the_committed_openapi_document_matches_the_code() {
    // Regenerate with: cargo run -- openapi > openapi/openapi.json
    let committed = include_str!("../openapi/openapi.json");
    let served = zonetally::api::openapi_json();
    assert!(
        committed == served,
        "openapi/openapi.json is stale: run `cargo run -- openapi > openapi/openapi.json`"
    );
    let (_, app) = state_with(config());
    let r = get(&app, "/openapi.json").await;
    assert_eq!(
        r.header("content-type").as_deref(),
        Some("application/vnd.oai.openapi+json;version=3.1")
    );
    assert_eq!(r.body, served.as_bytes());
    let spec: Value = serde_json::from_str(served).unwrap();
    assert_eq!(spec["openapi"], "3.1.0");
    for path in [
        "/",
        "/conformance",
        "/processes",
        "/processes/{processId}",
        "/processes/{processId}/execution",
        "/jobs",
        "/jobs/{jobId}",
        "/jobs/{jobId}/results",
        "/rasters",
        "/healthz",
        "/readyz",
        "/metrics",
        "/demo",
    ] {
        assert!(
            spec["paths"][path].is_object(),
            "{path} missing from the spec"
        );
    }
    assert!(spec["paths"]["/jobs/{jobId}"]["delete"].is_object());
}

#[test]
fn eval_refuses_raster_references_with_a_clear_message() {
    let dir = std::env::temp_dir().join(format!("zonetally-ref-{}", std::process::id()));
    std::fs::create_dir_all(&dir).unwrap();
    let file = dir.join("by-ref.json");
    let doc = json!({"raster": {"ref": format!("sha256:{}", "ab".repeat(32))}, "zones": [{"id": "a", "cells": [0]}], "evidence": {"total": 1}});
    std::fs::write(&file, serde_json::to_vec(&doc).unwrap()).unwrap();
    let out = std::process::Command::new(env!("CARGO_BIN_EXE_zonetally"))
        .arg("eval")
        .arg(&file)
        .output()
        .unwrap();
    assert_eq!(out.status.code(), Some(2));
    let err = String::from_utf8_lossy(&out.stderr);
    assert!(
        err.contains("/raster/ref") && err.contains("inline"),
        "{err}"
    );
}

#[test]
fn the_openapi_subcommand_prints_the_committed_document() {
    let out = std::process::Command::new(env!("CARGO_BIN_EXE_zonetally"))
        .arg("openapi")
        .output()
        .unwrap();
    assert!(out.status.success());
    assert_eq!(
        String::from_utf8(out.stdout).unwrap(),
        include_str!("../openapi/openapi.json")
    );
}

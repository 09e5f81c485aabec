//! Limits that bound what one client can hold or take: a job's running time, the jobs and
//! bytes the store holds, and the exceedance probabilities one request may ask for.

mod service_support;

use std::time::{Duration, Instant};

use axum::http::StatusCode;
use serde_json::json;
use service_support::{config, get, post_json, state_with, submit_tea_job, tea_inputs, wait_job};
use zonetally::Config;

const ZC: &str = "/processes/zone-counts/execution";

#[tokio::test]
async fn a_job_past_the_timeout_is_stopped_and_fails_saying_so() {
    let (_, router) = state_with(Config {
        job_timeout: 0.05,
        ..config()
    });
    // 1000x1000 cells in 9,409 overlapping 40x40 zones: seconds of work in a test build, far
    // past the limit. (The exact stopping is tested on the job manager with work that runs
    // until cancelled; this checks the service's end of it.)
    let zones: Vec<_> = (0..97)
        .flat_map(|r| {
            (0..97).map(move |c| {
                json!({"id": format!("z{r}-{c}"), "rect": {"row": r * 10, "col": c * 10, "rows": 40, "cols": 40}})
            })
        })
        .collect();
    let values: Vec<f64> = (0..1_000_000u64)
        .map(|i| 0.05 + 0.55 * ((i * 7919 % 101) as f64 / 100.0))
        .collect();
    let body = json!({"inputs": {
        "raster": {"width": 1000, "height": 1000, "values": values},
        "zones": zones,
        "evidence": {"total": 330_000},
        "summaries": {"pmf": false}
    }});
    let started = Instant::now();
    let job = post_json(&router, ZC, &body, Some("respond-async")).await;
    assert_eq!(job.status, StatusCode::CREATED, "{:?}", job.body);
    let location = job.header("location").unwrap();
    let status = wait_job(&router, &location).await;
    assert_eq!(status["status"], "failed", "{status}");
    assert!(
        status["message"].as_str().unwrap().contains("0.05 s"),
        "{status}"
    );
    assert!(started.elapsed() < Duration::from_secs(15));
    let results = get(&router, &format!("{location}/results")).await;
    assert_eq!(results.status, StatusCode::GATEWAY_TIMEOUT);
    assert_eq!(results.json()["type"], "/problems/job-timeout");
}

#[tokio::test]
async fn the_store_refuses_jobs_past_its_count_and_byte_caps() {
    for capped in [
        Config {
            max_jobs: 1,
            ..config()
        },
        Config {
            max_job_bytes: Some(1),
            ..config()
        },
    ] {
        let (_, router) = state_with(capped);
        let first = submit_tea_job(&router).await;
        assert_eq!(first.status, StatusCode::CREATED);
        wait_job(&router, &first.header("location").unwrap()).await;
        let second = submit_tea_job(&router).await;
        assert_eq!(second.status, StatusCode::SERVICE_UNAVAILABLE);
        assert_eq!(second.json()["type"], "/problems/jobs-full");
        assert!(second.header("retry-after").is_some());
        // Synchronous requests hold nothing in the store and are still served.
        let sync = post_json(&router, ZC, &json!({"inputs": tea_inputs()}), None).await;
        assert_eq!(sync.status, StatusCode::OK);
    }
}

#[tokio::test]
async fn exceedance_probabilities_are_bounded_before_computing() {
    let (_, router) = state_with(Config {
        max_exceedance_values: 3,
        ..config()
    });
    let mut inputs = tea_inputs();
    inputs["summaries"]["exceedance"] = json!([1, 2]);
    let r = post_json(&router, ZC, &json!({"inputs": inputs}), None).await;
    assert_eq!(r.status, StatusCode::PAYLOAD_TOO_LARGE);
    let p = r.json();
    assert_eq!(p["pointer"], "/inputs/summaries/exceedance");
    assert!(
        p["detail"].as_str().unwrap().contains("4 exceedance"),
        "{p}"
    );
    inputs["summaries"]["exceedance"] = json!([1]);
    let r = post_json(&router, ZC, &json!({"inputs": inputs}), None).await;
    assert_eq!(r.status, StatusCode::OK);
}

#[tokio::test]
async fn a_page_of_no_jobs_is_refused_not_widened() {
    let (_, router) = state_with(config());
    let r = get(&router, "/jobs?limit=0").await;
    assert_eq!(r.status, StatusCode::BAD_REQUEST);
    assert!(r.json()["detail"].as_str().unwrap().contains("from 1 to"));
    // An empty value is refused too, rather than read as the default page (schemathesis found it).
    for query in ["limit=", "offset=", "limit=5&limit="] {
        let r = get(&router, &format!("/jobs?{query}")).await;
        assert_eq!(r.status, StatusCode::BAD_REQUEST, "{query}");
    }
    assert_eq!(get(&router, "/jobs?limit=1").await.status, StatusCode::OK);
}

#[tokio::test]
async fn queued_jobs_are_held_to_the_memory_budget_and_give_it_back() {
    // Each job: 2,000 overlapping rects of 50x50 cells, 20 MB of cell lists once expanded
    // (the flood that once held 330 MB per queued job, scaled down), charged with the 80 MB of
    // shared and fringe lists it needs to run and its results: about 113 MB. The budget's part
    // for request data, 370 MiB once the caches and results have theirs, fits three, beside the
    // charge for decoding the next body (its 3.2 MB, nine times).
    let (state, router) = state_with(Config {
        memory_budget: Some(420 << 20),
        raster_cache_bytes: Some(20 << 20),
        normaliser_cache_bytes: Some(10 << 20),
        max_job_bytes: Some(20 << 20),
        ..config()
    });
    let zones: Vec<_> = (0..2000)
        .map(|i| {
            json!({"id": format!("z{i}"), "rect": {"row": (i / 45) * 10, "col": (i % 45) * 10, "rows": 50, "cols": 50}})
        })
        .collect();
    let body = json!({"inputs": {
        "raster": service_support::uneven_raster(500, 500),
        "zones": zones,
        "evidence": {"total": 80_000},
        "summaries": {"pmf": false}
    }});
    let block = service_support::block_pool(&state);
    let mut accepted = Vec::new();
    let mut refused = None;
    for _ in 0..6 {
        let r = post_json(&router, ZC, &body, Some("respond-async")).await;
        match r.status {
            StatusCode::CREATED => accepted.push(r.header("location").unwrap()),
            _ => {
                refused = Some(r);
                break;
            }
        }
    }
    let refused = refused.expect("the budget refused a job");
    assert_eq!(
        accepted.len(),
        3,
        "three jobs of about 113 MB fit in 370 MiB: {:?}",
        refused.body
    );
    assert_eq!(refused.status, StatusCode::SERVICE_UNAVAILABLE);
    assert_eq!(refused.json()["type"], "/problems/memory-budget");
    assert!(refused.header("retry-after").is_some());
    assert!(state.budget().used() <= state.budget().limit());
    // Health checks are served meanwhile.
    assert_eq!(get(&router, "/healthz").await.status, StatusCode::OK);
    drop(block);
    for location in &accepted {
        assert_eq!(wait_job(&router, location).await["status"], "successful");
    }
    service_support::until("the charges to be given back", || {
        state.budget().used() == 0
    })
    .await;
    let again = post_json(&router, ZC, &body, Some("respond-async")).await;
    assert_eq!(again.status, StatusCode::CREATED);
}

#[tokio::test]
async fn a_body_that_does_not_fit_the_budget_is_refused_before_it_is_read() {
    let big = json!({"inputs": {
        "raster": service_support::uneven_raster(400, 400),
        "zones": [{"id": "all", "rect": {"row": 0, "col": 0, "rows": 400, "cols": 400}}],
        "evidence": {"total": 50_000}
    }});
    // A JSON body of 3 MB may hold nine times that while decoded: more than a 1 MiB budget
    // could ever give, so 413 with what to do instead, not a 503 to retry forever.
    let (state, router) = state_with(Config {
        memory_budget: Some(1 << 20),
        ..config()
    });
    let r = post_json(&router, ZC, &big, None).await;
    assert_eq!(r.status, StatusCode::PAYLOAD_TOO_LARGE, "{:?}", r.body);
    let detail = r.json()["detail"].as_str().unwrap().to_string();
    assert!(
        detail.contains("--memory-budget") && detail.contains("GeoTIFF"),
        "{detail}"
    );
    assert_eq!(state.budget().used(), 0);
    let small = post_json(&router, ZC, &json!({"inputs": tea_inputs()}), None).await;
    assert_eq!(small.status, StatusCode::OK);

    // With room for it, but not while other requests hold most of the budget: 503 to retry.
    let (state, router) = state_with(Config {
        memory_budget: Some(256 << 20),
        ..config()
    });
    let limit = state.budget().limit();
    let held = state.budget().charge(limit - (1 << 20)).unwrap();
    let r = post_json(&router, ZC, &big, None).await;
    assert_eq!(r.status, StatusCode::SERVICE_UNAVAILABLE, "{:?}", r.body);
    assert_eq!(r.json()["type"], "/problems/memory-budget");
    assert!(r.header("retry-after").is_some());
    drop(held);
    let r = post_json(&router, ZC, &big, None).await;
    assert_eq!(r.status, StatusCode::OK, "{:?}", r.body);
    assert_eq!(state.budget().used(), 0);
}

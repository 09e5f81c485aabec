//! The service over a real socket on 127.0.0.1:0, with reqwest: every endpoint, sync/async
//! agreement, cancellation when a sync client goes away, the time limit, a full queue, and a
//! graceful shutdown.

mod service_support;

use std::time::Duration;

use serde_json::{json, Value};
use service_support::socket::Server;
use service_support::{block_pool, metric, tea_inputs, uneven_raster, until};
use zonetally::Config;

fn config() -> Config {
    Config {
        threads: 2,
        queue: 8,
        ..Config::default()
    }
}

async fn poll(client: &reqwest::Client, url: &str) -> Value {
    for _ in 0..2000 {
        let v: Value = client.get(url).send().await.unwrap().json().await.unwrap();
        if ["successful", "failed", "dismissed"].contains(&v["status"].as_str().unwrap()) {
            return v;
        }
        tokio::time::sleep(Duration::from_millis(10)).await;
    }
    panic!("job at {url} did not finish");
}

#[tokio::test]
async fn every_endpoint_answers_over_a_real_socket() {
    let server = Server::start(config()).await;
    let c = reqwest::Client::new();
    for (path, media) in [
        ("/", "application/json"),
        ("/conformance", "application/json"),
        ("/processes", "application/json"),
        ("/processes/zone-counts", "application/json"),
        ("/processes/cell-posterior", "application/json"),
        ("/jobs", "application/json"),
        ("/healthz", "application/json"),
        ("/readyz", "application/json"),
        ("/metrics", "text/plain"),
        ("/openapi.json", "application/vnd.oai.openapi+json"),
        ("/demo", "text/html"),
        ("/demo/valley.json", "application/json"),
    ] {
        let r = c.get(server.url(path)).send().await.unwrap();
        assert_eq!(r.status(), 200, "{path}");
        let ct = r.headers()["content-type"].to_str().unwrap().to_string();
        assert!(ct.starts_with(media), "{path}: {ct}");
        assert!(
            r.headers().contains_key("x-request-id"),
            "{path}: no request id"
        );
    }

    let body = json!({"inputs": tea_inputs()});
    let sync = c
        .post(server.url("/processes/zone-counts/execution"))
        .json(&body)
        .send()
        .await
        .unwrap();
    assert_eq!(sync.status(), 200);
    let sync_bytes = sync.bytes().await.unwrap();
    let created = c
        .post(server.url("/processes/zone-counts/execution"))
        .header("prefer", "respond-async")
        .json(&body)
        .send()
        .await
        .unwrap();
    assert_eq!(created.status(), 201);
    let location = created.headers()["location"].to_str().unwrap().to_string();
    let done = poll(&c, &server.url(&location)).await;
    assert_eq!(done["status"], "successful");
    let first = c.get(server.url(&location)).send().await.unwrap();
    let etag = first.headers()["etag"].to_str().unwrap().to_string();
    let again = c
        .get(server.url(&location))
        .header("if-none-match", &etag)
        .send()
        .await
        .unwrap();
    assert_eq!(again.status(), 304);
    let results = c
        .get(server.url(&format!("{location}/results")))
        .send()
        .await
        .unwrap()
        .bytes()
        .await
        .unwrap();
    assert_eq!(results, sync_bytes, "sync and async must agree bit for bit");
    let listed: Value = c
        .get(server.url("/jobs"))
        .send()
        .await
        .unwrap()
        .json()
        .await
        .unwrap();
    assert_eq!(listed["jobs"][0]["jobID"], done["jobID"]);
    let dismissed = c.delete(server.url(&location)).send().await.unwrap();
    assert_eq!(dismissed.status(), 200);
    assert_eq!(
        c.get(server.url(&location)).send().await.unwrap().status(),
        404
    );

    let posted = c
        .post(server.url("/rasters"))
        .json(&uneven_raster(6, 5))
        .send()
        .await
        .unwrap();
    assert_eq!(posted.status(), 201);
    let info: Value = posted.json().await.unwrap();
    let reference = info["ref"].as_str().unwrap();
    assert_eq!(
        c.get(server.url(&format!("/rasters/{reference}")))
            .send()
            .await
            .unwrap()
            .status(),
        200
    );
    let by_ref = json!({"inputs": {"raster": {"ref": reference}, "evidence": {"total": 8}, "cells": [0, 29]}});
    let post = c
        .post(server.url("/processes/cell-posterior/execution"))
        .json(&by_ref)
        .send()
        .await
        .unwrap();
    assert_eq!(post.status(), 200);
    let v: Value = post.json().await.unwrap();
    assert_eq!(v["cells"].as_array().unwrap().len(), 2);
    for cell in v["cells"].as_array().unwrap() {
        let (prior, posterior) = (
            cell["prior"].as_f64().unwrap(),
            cell["posterior"].as_f64().unwrap(),
        );
        assert!(posterior > 0.0 && posterior < 1.0 && prior > 0.0);
    }
}

#[tokio::test]
async fn a_sync_client_that_disconnects_cancels_its_computation() {
    let server = Server::start(config()).await;
    let block = block_pool(&server.state);
    let client = reqwest::Client::builder()
        .timeout(Duration::from_millis(300))
        .build()
        .unwrap();
    let err = client
        .post(server.url("/processes/zone-counts/execution"))
        .json(&json!({"inputs": tea_inputs()}))
        .send()
        .await;
    assert!(
        err.is_err_and(|e| e.is_timeout()),
        "the client should have given up"
    );
    assert_eq!(
        server.state.pool_stats().queued,
        1,
        "the computation waits for a thread"
    );
    // hyper drops the handler's future when the connection closes; its guard cancels.
    tokio::time::sleep(Duration::from_millis(200)).await;
    drop(block);
    let state = server.state.clone();
    until("the abandoned computation to be skipped", || {
        state.pool_stats().skipped_cancelled == 1
    })
    .await;
    assert_eq!(
        server.state.pool_stats().compute_seconds,
        0.0,
        "nothing ran for the gone client"
    );
}

#[tokio::test]
async fn a_request_past_the_time_limit_gets_504_and_is_cancelled() {
    let server = Server::start(Config {
        request_timeout: 0.3,
        ..config()
    })
    .await;
    let block = block_pool(&server.state);
    let c = reqwest::Client::new();
    let r = c
        .post(server.url("/processes/zone-counts/execution"))
        .json(&json!({"inputs": tea_inputs()}))
        .send()
        .await
        .unwrap();
    assert_eq!(r.status(), 504);
    let p: Value = r.json().await.unwrap();
    assert_eq!(p["type"], "/problems/timeout");
    assert!(p["detail"].as_str().unwrap().contains("respond-async"));
    drop(block);
    let state = server.state.clone();
    until("the timed-out computation to be skipped", || {
        state.pool_stats().skipped_cancelled == 1
    })
    .await;
    let m = c
        .get(server.url("/metrics"))
        .send()
        .await
        .unwrap()
        .text()
        .await
        .unwrap();
    assert_eq!(metric(&m, "zonetally_http_requests_total{route=\"/processes/{processId}/execution\",method=\"POST\",status=\"504\"}"), 1.0);
}

#[tokio::test]
async fn a_full_queue_answers_503_over_the_socket() {
    // One pool for both, so the async job's slot is the one the sync request needs.
    let server = Server::start(Config {
        queue: 1,
        shared_pool: true,
        ..config()
    })
    .await;
    let block = block_pool(&server.state);
    let c = reqwest::Client::new();
    let body = json!({"inputs": tea_inputs()});
    let first = c
        .post(server.url("/processes/zone-counts/execution"))
        .header("prefer", "respond-async")
        .json(&body)
        .send()
        .await
        .unwrap();
    assert_eq!(first.status(), 201);
    let refused = c
        .post(server.url("/processes/zone-counts/execution"))
        .json(&body)
        .send()
        .await
        .unwrap();
    assert_eq!(refused.status(), 503);
    assert_eq!(refused.headers()["retry-after"], "1");
    drop(block);
    let location = first.headers()["location"].to_str().unwrap().to_string();
    assert_eq!(
        poll(&c, &server.url(&location)).await["status"],
        "successful"
    );
}

#[tokio::test]
async fn shutdown_fails_unfinished_jobs_and_lets_the_server_stop() {
    let mut server = Server::start(Config {
        shutdown_grace: 2.0,
        ..config()
    })
    .await;
    let block = block_pool(&server.state);
    let c = reqwest::Client::new();
    let created = c
        .post(server.url("/processes/zone-counts/execution"))
        .header("prefer", "respond-async")
        .json(&json!({"inputs": tea_inputs()}))
        .send()
        .await
        .unwrap();
    let id = created.json::<Value>().await.unwrap()["jobID"]
        .as_str()
        .unwrap()
        .to_string();
    server.stop.take().unwrap().send(()).unwrap();
    let stopped = tokio::time::timeout(Duration::from_secs(5), &mut server.handle).await;
    assert!(
        matches!(stopped, Ok(Ok(Ok(())))),
        "the server did not stop cleanly: {stopped:?}"
    );
    let job = server.state.jobs().record(&id).unwrap().unwrap();
    assert_eq!(job.state().as_str(), "failed");
    assert!(job.message().contains("shut down"));
    assert!(job.cancel_requested());
    assert!(
        c.get(server.url("/healthz")).send().await.is_err(),
        "the listener must be closed"
    );
    drop(block);
}

//! The service over a job store that goes away: while it cannot be reached, job routes answer
//! 503 problem documents with Retry-After, readiness fails and liveness does not; nothing is
//! accepted that could be lost, and a job accepted before keeps its results.

mod service_support;

use std::sync::Arc;

use axum::http::StatusCode;
use service_support::*;
use zonetally::jobs::{JobStore, Store, SwitchedStore};
use zonetally::{app, AppState};

fn assert_store_down(reply: &Reply, what: &str) {
    assert_eq!(
        reply.status,
        StatusCode::SERVICE_UNAVAILABLE,
        "{what}: {:?}",
        reply.body
    );
    assert_eq!(reply.json()["type"], "/problems/job-store", "{what}");
    assert!(
        reply.header("retry-after").is_some(),
        "{what}: no Retry-After"
    );
    // The cause stays in the log.
    assert!(
        !String::from_utf8_lossy(&reply.body).contains("switched off"),
        "{what}"
    );
}

#[tokio::test]
async fn a_store_out_of_reach_gets_503s_and_loses_no_job() {
    let store = Arc::new(SwitchedStore::new());
    let state = AppState::with_job_store(config(), Store::of(store.clone())).unwrap();
    let router = app(state);
    // A job accepted while the store is there, polled until done.
    let created = submit_tea_job(&router).await;
    assert_eq!(created.status, StatusCode::CREATED);
    let location = created.header("location").unwrap();
    let before = wait_job(&router, &location).await;
    assert_eq!(before["status"], "successful");
    let results = get(&router, &format!("{location}/results")).await.ok_json();

    store.set_off(true);
    assert_store_down(&submit_tea_job(&router).await, "submit");
    assert_store_down(&get(&router, &location).await, "poll");
    assert_store_down(&get(&router, "/jobs").await, "listing");
    assert_store_down(&get(&router, "/readyz").await, "readiness");
    assert_eq!(
        get(&router, "/healthz").await.status,
        StatusCode::OK,
        "liveness"
    );
    // Synchronous work needs no store.
    let sync = post_json(
        &router,
        "/processes/zone-counts/execution",
        &serde_json::json!({"inputs": tea_inputs()}),
        None,
    )
    .await;
    assert_eq!(sync.status, StatusCode::OK);
    // Nothing was accepted meanwhile.
    assert_eq!(store.behind().counts().unwrap().total(), 1);

    store.set_off(false);
    assert_eq!(get(&router, "/readyz").await.status, StatusCode::OK);
    assert_eq!(
        get(&router, &format!("{location}/results")).await.ok_json(),
        results
    );
    let again = submit_tea_job(&router).await;
    assert_eq!(again.status, StatusCode::CREATED);
    let done = wait_job(&router, &again.header("location").unwrap()).await;
    assert_eq!(done["status"], "successful");
}

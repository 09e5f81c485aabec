//! Helpers shared by the service tests: an in-process app, request builders, and a way to
//! occupy every compute thread so queued work stays queued while a test looks at it.
#![allow(dead_code)]

use std::sync::mpsc;
use std::time::{Duration, Instant};

use axum::body::Body;
use axum::http::{HeaderMap, Request, StatusCode};
use axum::Router;
use bytes::Bytes;
use http_body_util::BodyExt;
use serde_json::{json, Value};
use tower::ServiceExt;
use zonetally::{app, AppState, Config};

pub mod socket;

pub fn config() -> Config {
    Config {
        threads: 2,
        queue: 16,
        ..Config::default()
    }
}

pub fn state_with(config: Config) -> (AppState, Router) {
    let state = AppState::new(config).expect("state");
    let router = app(state.clone());
    (state, router)
}

pub struct Reply {
    pub status: StatusCode,
    pub headers: HeaderMap,
    pub body: Bytes,
}

impl Reply {
    pub fn json(&self) -> Value {
        serde_json::from_slice(&self.body)
            .unwrap_or_else(|e| panic!("not JSON ({e}): {}", String::from_utf8_lossy(&self.body)))
    }
    /// The body as JSON, after asserting the status is 200 (the body is shown when it is not).
    pub fn ok_json(&self) -> Value {
        assert_eq!(
            self.status,
            StatusCode::OK,
            "{}",
            String::from_utf8_lossy(&self.body)
        );
        self.json()
    }
    pub fn header(&self, name: &str) -> Option<String> {
        self.headers
            .get(name)
            .map(|v| v.to_str().unwrap().to_string())
    }
}

pub async fn send(router: &Router, req: Request<Body>) -> Reply {
    let resp = router.clone().oneshot(req).await.expect("infallible");
    let status = resp.status();
    let headers = resp.headers().clone();
    let body = resp.into_body().collect().await.expect("body").to_bytes();
    Reply {
        status,
        headers,
        body,
    }
}

pub async fn get(router: &Router, path: &str) -> Reply {
    send(router, Request::get(path).body(Body::empty()).unwrap()).await
}

pub async fn post_json(router: &Router, path: &str, body: &Value, prefer: Option<&str>) -> Reply {
    let mut b = Request::post(path).header("content-type", "application/json");
    if let Some(p) = prefer {
        b = b.header("prefer", p);
    }
    send(
        router,
        b.body(Body::from(serde_json::to_vec(body).unwrap()))
            .unwrap(),
    )
    .await
}

/// The demo's tea example: 8 cells at p = 1/2, 4 events observed, one zone of 4 cells.
/// Submits the tea example as an asynchronous `zone-counts` job.
pub async fn submit_tea_job(router: &Router) -> Reply {
    post_json(
        router,
        "/processes/zone-counts/execution",
        &serde_json::json!({"inputs": tea_inputs()}),
        Some("respond-async"),
    )
    .await
}

pub fn tea_inputs() -> Value {
    json!({
        "raster": {"width": 4, "height": 2, "values": [0.5, 0.5, 0.5, 0.5, 0.5, 0.5, 0.5, 0.5]},
        "zones": [{"id": "cups", "rect": {"row": 0, "col": 0, "rows": 1, "cols": 4}}, {"id": "pair", "cells": [4, 5]}],
        "evidence": {"total": 4},
        "summaries": {"exceedance": [3]}
    })
}

/// A small uneven raster: w x h cells with p varying smoothly in (0.05, 0.6).
pub fn uneven_raster(w: u32, h: u32) -> Value {
    let values: Vec<f64> = (0..w * h)
        .map(|i| 0.05 + 0.55 * (((i * 7919) % 101) as f64 / 100.0))
        .collect();
    json!({"width": w, "height": h, "values": values})
}

/// Holds every compute thread (of the jobs' pool and the synchronous one) until dropped.
pub struct PoolBlock {
    release: Vec<mpsc::Sender<()>>,
}

pub fn block_pool(state: &AppState) -> PoolBlock {
    let (started_tx, started_rx) = mpsc::channel();
    let mut release = Vec::new();
    let mut threads = 0;
    let pools = [state.pool(), state.sync_pool()];
    let distinct = if std::ptr::eq(pools[0], pools[1]) {
        1
    } else {
        2
    };
    for pool in &pools[..distinct] {
        threads += pool.stats().threads;
        for _ in 0..pool.stats().threads {
            let (tx, rx) = mpsc::channel::<()>();
            release.push(tx);
            let started = started_tx.clone();
            pool.rayon().spawn(move || {
                let _ = started.send(());
                let _ = rx.recv();
            });
        }
    }
    for _ in 0..threads {
        started_rx
            .recv_timeout(Duration::from_secs(10))
            .expect("compute threads did not start");
    }
    PoolBlock { release }
}

impl Drop for PoolBlock {
    fn drop(&mut self) {
        self.release.clear();
    }
}

/// Waits until `cond` holds, polling; panics after 10 s.
pub async fn until(what: &str, mut cond: impl FnMut() -> bool) {
    let start = Instant::now();
    while !cond() {
        assert!(
            start.elapsed() < Duration::from_secs(10),
            "timed out waiting for {what}"
        );
        tokio::time::sleep(Duration::from_millis(5)).await;
    }
}

/// The value of a metric line `name{labels} value` (labels as written, or "" for none).
pub fn metric(text: &str, series: &str) -> f64 {
    text.lines()
        .find_map(|l| {
            l.strip_prefix(series)
                .and_then(|rest| rest.strip_prefix(' '))
                .and_then(|v| v.trim().parse().ok())
        })
        .unwrap_or_else(|| panic!("metric {series} not found in:\n{text}"))
}

/// Polls a job until it is finished; returns its status document.
pub async fn wait_job(router: &Router, location: &str) -> Value {
    let start = Instant::now();
    loop {
        let r = get(router, location).await;
        assert_eq!(
            r.status,
            StatusCode::OK,
            "{}",
            String::from_utf8_lossy(&r.body)
        );
        let v = r.json();
        if ["successful", "failed", "dismissed"].contains(&v["status"].as_str().unwrap()) {
            return v;
        }
        assert!(
            start.elapsed() < Duration::from_secs(20),
            "job did not finish: {v}"
        );
        tokio::time::sleep(Duration::from_millis(10)).await;
    }
}

//! Measurements, not checks: run by hand in release, one at a time (see each test's comment).
//!
//! Small requests under load (wrk, Debian's package):
//!
//! ```text
//! cargo test --release --test service_load -- --ignored write_small_request --nocapture
//! target/release/zonetally serve --bind 127.0.0.1:18080 &
//! cat > /tmp/zonetally-post.lua <<'LUA'
//! wrk.method = "POST"
//! wrk.headers["Content-Type"] = "application/json"
//! local f = io.open("/tmp/zonetally-small.json", "r"); wrk.body = f:read("*a"); f:close()
//! LUA
//! wrk -t2 -c16 -d30s --latency -s /tmp/zonetally-post.lua http://127.0.0.1:18080/processes/zone-counts/execution
//! ```
//!
//! The JSON share of a large inline request:
//! `cargo test --release --test service_load -- --ignored json_share --nocapture`.

mod service_support;

use std::time::{Duration, Instant};

use serde_json::{json, Value};
use service_support::socket::Server;
use zonetally::api::decode::{self, Limits, LocalFiles};
use zonetally::api::wire::EvalRequest;
use zonetally::engine::{self, Control, Normaliser};
use zonetally::Config;

/// A w x w raster of smoothly varying p, and zones of `side` x `side` cells tiling it
/// (`count` of them, row by row).
fn request(w: u32, side: u32, count: u32, total: u64) -> Value {
    let values: Vec<f64> = (0..w * w)
        .map(|i| {
            let (r, c) = ((i / w) as f64, (i % w) as f64);
            0.02 + 0.2 * (0.5 + 0.5 * (r / 17.0).sin() * (c / 23.0).cos())
        })
        .collect();
    let per_row = w / side;
    let zones: Vec<Value> = (0..count)
        .map(|z| json!({"id": format!("z{z}"), "rect": {"row": (z / per_row) * side, "col": (z % per_row) * side, "rows": side, "cols": side}}))
        .collect();
    json!({"raster": {"width": w, "height": w, "values": values}, "zones": zones, "evidence": {"total": total}, "summaries": {"exceedance": [5]}})
}

#[test]
#[ignore = "writes the wrk body; run by hand"]
fn write_small_request() {
    // 100 x 100 raster, 20 zones of 10 x 10.
    let doc = request(100, 10, 20, 1200);
    let body = serde_json::to_vec(&json!({"inputs": doc})).unwrap();
    std::fs::write("/tmp/zonetally-small.json", &body).unwrap();
    println!("wrote /tmp/zonetally-small.json ({} bytes)", body.len());
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
#[ignore = "a measurement; run by hand in release"]
async fn json_share() {
    // W250k-partition: 500 x 500 raster, 2,500 zones of 10 x 10 tiling it, sent inline.
    let doc = request(500, 10, 2500, 14_000);
    let body = serde_json::to_vec(&json!({"inputs": doc.clone()})).unwrap();
    let reps = 5;
    let (mut engine_s, mut server_s) = (Vec::new(), Vec::new());
    for rep in 0..reps {
        // Engine alone: decode excluded, normaliser + plan + execute, on a rayon pool as in the service.
        let req: EvalRequest = serde_json::from_value(doc.clone()).unwrap();
        let decoded = decode::zone_counts(req, &Limits::default(), &LocalFiles).unwrap();
        let decode::DecodedEvidence::Whole(evidence) = &decoded.evidence else {
            panic!("the request states one overall total");
        };
        let pool = rayon::ThreadPoolBuilder::new().build().unwrap();
        let t = Instant::now();
        pool.install(|| {
            let control = Control::new();
            let n = Normaliser::of(&decoded.raster, evidence, &control).unwrap();
            let plan = engine::plan(&decoded.raster, decoded.zones.engine_zones());
            engine::execute(
                &plan,
                &decoded.raster,
                decoded.zones.engine_zones(),
                &n,
                &decoded.settings,
                &control,
            )
            .unwrap()
        });
        engine_s.push(t.elapsed().as_secs_f64());
        // The service, fresh each time so the normaliser is computed (no cache hit).
        let server = Server::start(Config {
            request_timeout: 600.0,
            ..Config::default()
        })
        .await;
        let client = reqwest::Client::builder()
            .timeout(Duration::from_secs(600))
            .build()
            .unwrap();
        let t = Instant::now();
        let resp = client
            .post(server.url("/processes/zone-counts/execution"))
            .header("content-type", "application/json")
            .body(body.clone())
            .send()
            .await
            .unwrap();
        assert_eq!(resp.status(), 200);
        let out = resp.bytes().await.unwrap();
        server_s.push(t.elapsed().as_secs_f64());
        if rep == 0 {
            println!("request {} bytes, response {} bytes", body.len(), out.len());
        }
    }
    let median = |v: &mut Vec<f64>| {
        v.sort_by(f64::total_cmp);
        v[v.len() / 2]
    };
    let (e, s) = (median(&mut engine_s), median(&mut server_s));
    println!(
        "engine {e:.3} s, server (client-side, loopback) {s:.3} s, ratio {:.2}, medians of {reps}",
        s / e
    );
    println!("engine runs {engine_s:?}\nserver runs {server_s:?}");
}

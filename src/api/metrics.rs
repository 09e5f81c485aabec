//! Prometheus text exposition: request counts and latency histograms by route and status,
//! plus gauges and counters from a `Snapshot` of the pool, the caches and the job counts taken
//! at scrape time (the job store keeps its counts as it changes; nothing walks the jobs).

use std::collections::BTreeMap;
use std::fmt::Write;
use std::sync::atomic::{AtomicU64, Ordering};
use std::sync::Mutex;

use std::sync::Arc;

use axum::extract::{MatchedPath, Request, State};
use axum::middleware::Next;
use axum::response::Response;

use super::allocator::AllocatorStats;
use super::cache::CacheStats;
use crate::jobs::{JobCounts, JobState, PoolStats};

/// Upper bounds of the latency buckets, in seconds: 1 ms to 1 min, about x2.5 apart.
const BUCKETS: [f64; 13] = [
    0.001, 0.0025, 0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1.0, 2.5, 10.0, 60.0,
];

#[derive(Default)]
struct Series {
    count: u64,
    sum: f64,
    buckets: [u64; BUCKETS.len()],
}

/// The figures read off the rest of the service for one scrape.
#[derive(Clone, Copy, Debug, Default, PartialEq)]
pub struct Snapshot {
    pub pool: PoolStats,
    pub rasters: CacheStats,
    pub normalisers: CacheStats,
    pub jobs: JobCounts,
    /// The allocator's accounting, when the binary allocates with jemalloc.
    pub allocator: Option<AllocatorStats>,
}

#[derive(Default)]
pub struct Metrics {
    requests: Mutex<BTreeMap<(String, String, u16), Series>>,
    cells: AtomicU64,
    cancelled: AtomicU64,
}

impl Metrics {
    /// Counts one response. Labels come from fixed sets only, so clients cannot grow the
    /// exposition: methods other than the standard ones become `other`, and so do statuses
    /// outside 100..=599 (routes are templates or `other`, see `record`).
    pub fn observe(&self, route: &str, method: &str, status: u16, seconds: f64) {
        const METHODS: [&str; 7] = ["GET", "POST", "DELETE", "PUT", "PATCH", "HEAD", "OPTIONS"];
        let method = METHODS
            .iter()
            .find(|m| **m == method)
            .copied()
            .unwrap_or("other");
        let status = if (100..=599).contains(&status) {
            status
        } else {
            0
        };
        let mut map = self.requests.lock().unwrap_or_else(|p| p.into_inner());
        let s = map
            .entry((route.to_string(), method.to_string(), status))
            .or_default();
        s.count += 1;
        s.sum += seconds;
        for (i, &b) in BUCKETS.iter().enumerate() {
            if seconds <= b {
                s.buckets[i] += 1;
            }
        }
    }

    /// Counts cells of zones (or posterior cells) that a finished computation went through.
    pub fn add_cells(&self, n: u64) {
        self.cells.fetch_add(n, Ordering::Relaxed);
    }

    /// Counts a computation stopped by cancellation (dismissed job, client gone, timeout).
    pub fn add_cancelled(&self) {
        self.cancelled.fetch_add(1, Ordering::Relaxed);
    }

    pub fn render(&self, snapshot: &Snapshot) -> String {
        let mut out = String::new();
        {
            let map = self.requests.lock().unwrap_or_else(|p| p.into_inner());
            out.push_str("# HELP zonetally_http_requests_total HTTP requests answered.\n# TYPE zonetally_http_requests_total counter\n");
            for ((route, method, status), s) in map.iter() {
                let _ = writeln!(out, "zonetally_http_requests_total{{route=\"{route}\",method=\"{method}\",status=\"{status}\"}} {}", s.count);
            }
            out.push_str("# HELP zonetally_http_request_duration_seconds Time to answer, from request to response headers.\n# TYPE zonetally_http_request_duration_seconds histogram\n");
            for ((route, method, status), s) in map.iter() {
                let labels = format!("route=\"{route}\",method=\"{method}\",status=\"{status}\"");
                for (i, b) in BUCKETS.iter().enumerate() {
                    let _ = writeln!(
                        out,
                        "zonetally_http_request_duration_seconds_bucket{{{labels},le=\"{b}\"}} {}",
                        s.buckets[i]
                    );
                }
                let _ = writeln!(
                    out,
                    "zonetally_http_request_duration_seconds_bucket{{{labels},le=\"+Inf\"}} {}",
                    s.count
                );
                let _ = writeln!(
                    out,
                    "zonetally_http_request_duration_seconds_sum{{{labels}}} {}",
                    s.sum
                );
                let _ = writeln!(
                    out,
                    "zonetally_http_request_duration_seconds_count{{{labels}}} {}",
                    s.count
                );
            }
        }
        let pool = snapshot.pool;
        let mut metric = |name: &str, kind: &str, help: &str, value: String| {
            let _ = writeln!(
                out,
                "# HELP {name} {help}\n# TYPE {name} {kind}\n{name} {value}"
            );
        };
        metric(
            "zonetally_compute_threads",
            "gauge",
            "Threads of the shared compute pool.",
            pool.threads.to_string(),
        );
        metric(
            "zonetally_queue_capacity",
            "gauge",
            "Computations admitted at once.",
            pool.capacity.to_string(),
        );
        metric(
            "zonetally_queue_depth",
            "gauge",
            "Computations waiting for a compute thread.",
            pool.queued.to_string(),
        );
        metric(
            "zonetally_computations_running",
            "gauge",
            "Computations on a compute thread now.",
            pool.running.to_string(),
        );
        metric(
            "zonetally_queue_rejections_total",
            "counter",
            "Requests refused with 503 because the queue was full.",
            pool.rejected.to_string(),
        );
        metric(
            "zonetally_compute_seconds_total",
            "counter",
            "Seconds spent on compute threads.",
            pool.compute_seconds.to_string(),
        );
        metric(
            "zonetally_computation_panics_total",
            "counter",
            "Computations that panicked.",
            pool.panics.to_string(),
        );
        metric(
            "zonetally_computations_cancelled_total",
            "counter",
            "Computations stopped by cancellation, before or while running.",
            (self.cancelled.load(Ordering::Relaxed) + pool.skipped_cancelled).to_string(),
        );
        metric(
            "zonetally_cells_processed_total",
            "counter",
            "Zone cells (or posterior cells) of finished computations.",
            self.cells.load(Ordering::Relaxed).to_string(),
        );
        out.push_str("# HELP zonetally_cache_hits_total Cache lookups that found the entry.\n# TYPE zonetally_cache_hits_total counter\n");
        let (r, n) = (snapshot.rasters, snapshot.normalisers);
        let _ = writeln!(out, "zonetally_cache_hits_total{{cache=\"raster\"}} {}\nzonetally_cache_hits_total{{cache=\"normaliser\"}} {}", r.hits, n.hits);
        out.push_str("# HELP zonetally_cache_misses_total Cache lookups that did not.\n# TYPE zonetally_cache_misses_total counter\n");
        let _ = writeln!(out, "zonetally_cache_misses_total{{cache=\"raster\"}} {}\nzonetally_cache_misses_total{{cache=\"normaliser\"}} {}", r.misses, n.misses);
        out.push_str("# HELP zonetally_cache_bytes Bytes held by a cache.\n# TYPE zonetally_cache_bytes gauge\n");
        let _ = writeln!(out, "zonetally_cache_bytes{{cache=\"raster\"}} {}\nzonetally_cache_bytes{{cache=\"normaliser\"}} {}", r.bytes, n.bytes);
        out.push_str("# HELP zonetally_jobs Jobs held, by status.\n# TYPE zonetally_jobs gauge\n");
        for st in [
            JobState::Accepted,
            JobState::Running,
            JobState::Successful,
            JobState::Failed,
        ] {
            let n = snapshot.jobs.of(st);
            let _ = writeln!(out, "zonetally_jobs{{status=\"{}\"}} {n}", st.as_str());
        }
        if let Some(a) = snapshot.allocator {
            out.push_str("# HELP zonetally_allocator_bytes Bytes by the allocator's accounting: allocated, the pages holding them (active), resident, and freed pages not yet handed back (dirty).\n# TYPE zonetally_allocator_bytes gauge\n");
            for (kind, bytes) in [
                ("allocated", a.allocated),
                ("active", a.active),
                ("resident", a.resident),
                ("dirty", a.dirty),
            ] {
                let _ = writeln!(out, "zonetally_allocator_bytes{{kind=\"{kind}\"}} {bytes}");
            }
        }
        out
    }
}

/// Middleware recording every response under its route template, never the raw path (so ids
/// and invented paths do not grow the label set): requests that matched no route are counted
/// under `other`. Runs outside the router's routing, so the template comes back on the
/// response (`router` copies it there); a `MatchedPath` on the request is used when present.
pub async fn record(State(metrics): State<Arc<Metrics>>, req: Request, next: Next) -> Response {
    let matched = req
        .extensions()
        .get::<MatchedPath>()
        .map(|m| m.as_str().to_string());
    let method = req.method().clone();
    let start = std::time::Instant::now();
    let resp = next.run(req).await;
    let route = matched
        .or_else(|| {
            resp.extensions()
                .get::<MatchedPath>()
                .map(|m| m.as_str().to_string())
        })
        .unwrap_or_else(|| "other".into());
    metrics.observe(
        &route,
        method.as_str(),
        resp.status().as_u16(),
        start.elapsed().as_secs_f64(),
    );
    resp
}

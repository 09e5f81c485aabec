//! The service's settings: every flag of `zonetally serve`, each also an environment variable
//! `ZONETALLY_*`. Defaults are the embedded set-up (loopback, in-memory jobs).

use std::net::SocketAddr;
use std::time::Duration;

use clap::Parser;

use super::budget::{default_budget, MemoryPlan};
use super::decode::Limits;

#[derive(Clone, Debug, Parser)]
#[command(name = "zonetally serve")]
pub struct Config {
    /// Address to listen on.
    #[arg(long, env = "ZONETALLY_BIND", default_value = "127.0.0.1:8080")]
    pub bind: SocketAddr,
    /// Compute threads of the pool async jobs run on (0: one per core).
    #[arg(long, env = "ZONETALLY_THREADS", default_value_t = 0)]
    pub threads: usize,
    /// Compute threads of the pool synchronous requests run on, apart from async jobs so that
    /// long jobs cannot starve them (0: one per core).
    #[arg(long, env = "ZONETALLY_SYNC_THREADS", default_value_t = 0)]
    pub sync_threads: usize,
    /// Run synchronous requests on the async jobs' pool instead of their own (no fairness).
    #[arg(long, env = "ZONETALLY_SHARED_POOL", default_value_t = false)]
    pub shared_pool: bool,
    /// Computations admitted at once, queued or running; beyond it requests get 503.
    #[arg(long, env = "ZONETALLY_QUEUE", default_value_t = 64)]
    pub queue: usize,
    /// Seconds a finished job (and its results) is kept.
    #[arg(long, env = "ZONETALLY_JOB_TTL", default_value_t = 3600.0)]
    pub job_ttl: f64,
    /// Where jobs are kept: `memory` (this process, lost on restart) or `redis://host:port/db`
    /// (shared by every replica using it).
    #[arg(long, env = "ZONETALLY_JOB_STORE", default_value = "memory")]
    pub job_store: String,
    /// Seconds an async job may run before it is cancelled and ends failed (0: no limit).
    #[arg(long, env = "ZONETALLY_JOB_TIMEOUT", default_value_t = 3600.0)]
    pub job_timeout: f64,
    /// Most jobs held at once, finished ones included; submissions beyond get 503.
    #[arg(long, env = "ZONETALLY_MAX_JOBS", default_value_t = 10_000)]
    pub max_jobs: usize,
    /// Most bytes held by job records and their results, taken out of the memory budget;
    /// submissions beyond get 503. Default: a quarter of the budget.
    #[arg(long, env = "ZONETALLY_MAX_JOB_BYTES")]
    pub max_job_bytes: Option<u64>,
    /// Bytes of memory the process may hold for its work: request data (bodies being read,
    /// queued and running requests), results kept for polling, and the caches; requests beyond
    /// get 503. Default: half the container's memory limit, else half the machine's memory.
    #[arg(long, env = "ZONETALLY_MEMORY_BUDGET")]
    pub memory_budget: Option<u64>,
    /// Requests decoded at once (0: one per core); more wait their turn.
    #[arg(long, env = "ZONETALLY_MAX_DECODES", default_value_t = 0)]
    pub max_decodes: usize,
    /// A file of SHA-256 hashes of API keys, one per line: every request but the health checks
    /// must then send `Authorization: Bearer <key>`, and jobs belong to their key. Off when absent.
    #[arg(long, env = "ZONETALLY_API_KEYS")]
    pub api_keys: Option<std::path::PathBuf>,
    /// Requests per second each API key may send (0: no limit); beyond it 429.
    #[arg(long, env = "ZONETALLY_RATE_LIMIT", default_value_t = 0)]
    pub rate_limit: u32,
    /// Requests a key may send at once above its rate (0: the rate itself).
    #[arg(long, env = "ZONETALLY_RATE_BURST", default_value_t = 0)]
    pub rate_burst: u32,
    /// Serve `/metrics` without a key even when keys are on.
    #[arg(long, env = "ZONETALLY_PUBLIC_METRICS", default_value_t = false)]
    pub public_metrics: bool,
    /// Most exceedance probabilities one request may ask for: zones x thresholds.
    #[arg(
        long,
        env = "ZONETALLY_MAX_EXCEEDANCE_VALUES",
        default_value_t = 10_000_000
    )]
    pub max_exceedance_values: u64,
    /// Most scenarios one `scenarios` request may draw.
    #[arg(long, env = "ZONETALLY_MAX_SCENARIOS", default_value_t = 10_000)]
    pub max_scenarios: u64,
    /// Largest estimated size of one `scenarios` output (its samples, with their event cells
    /// when asked); larger requests get 413 before anything is drawn.
    #[arg(long, env = "ZONETALLY_MAX_SCENARIO_BYTES", default_value_t = 256 << 20)]
    pub max_scenario_bytes: u64,
    /// Bytes of rasters kept for reuse and for `{"ref": ...}`, taken out of the memory budget.
    /// Default: a quarter of the budget.
    #[arg(long, env = "ZONETALLY_RASTER_CACHE_BYTES")]
    pub raster_cache_bytes: Option<u64>,
    /// Bytes of normalisers kept, keyed by (raster hash, observed total), taken out of the
    /// memory budget. Default: a sixteenth of the budget.
    #[arg(long, env = "ZONETALLY_NORMALISER_CACHE_BYTES")]
    pub normaliser_cache_bytes: Option<u64>,
    /// Largest request body, in bytes.
    #[arg(long, env = "ZONETALLY_MAX_BODY_BYTES", default_value_t = 64 << 20)]
    pub max_body_bytes: usize,
    /// Largest raster, in cells.
    #[arg(long, env = "ZONETALLY_MAX_CELLS", default_value_t = 25_000_000)]
    pub max_cells: u64,
    /// Most zones in one request.
    #[arg(long, env = "ZONETALLY_MAX_ZONES", default_value_t = 200_000)]
    pub max_zones: usize,
    /// Most cells over all zones of one request (counted with multiplicity).
    #[arg(long, env = "ZONETALLY_MAX_ZONE_CELLS", default_value_t = 100_000_000)]
    pub max_zone_cells: u64,
    /// Most polygon vertices over all GeoJSON zones of one request.
    #[arg(long, env = "ZONETALLY_MAX_VERTICES", default_value_t = 4_000_000)]
    pub max_vertices: u64,
    /// Folder whose GeoTIFF files requests may name as `{"href": "file.tif"}` (relative paths
    /// only, never outside it); none by default, which refuses every `href`.
    #[arg(long, env = "ZONETALLY_DATA_DIR")]
    pub data_dir: Option<std::path::PathBuf>,
    /// Largest planned cost (the planner's multiply-adds) of any request.
    #[arg(long, env = "ZONETALLY_MAX_COST", default_value_t = 1e13)]
    pub max_cost: f64,
    /// Largest planned cost of a synchronous request; costlier ones must be sent async.
    #[arg(long, env = "ZONETALLY_SYNC_BUDGET", default_value_t = 2e10)]
    pub sync_budget: f64,
    /// Seconds a request may take before it is answered 504 (its computation is cancelled).
    #[arg(long, env = "ZONETALLY_REQUEST_TIMEOUT", default_value_t = 120.0)]
    pub request_timeout: f64,
    /// Deepest nesting of arrays and objects accepted in a JSON body.
    #[arg(long, env = "ZONETALLY_MAX_JSON_DEPTH", default_value_t = 16)]
    pub max_json_depth: usize,
    /// Origins allowed to call from a browser (comma-separated); none by default.
    #[arg(long, env = "ZONETALLY_CORS_ORIGINS", value_delimiter = ',')]
    pub cors_origins: Vec<String>,
    /// Log one JSON object per line instead of text.
    #[arg(long, env = "ZONETALLY_LOG_JSON", default_value_t = false)]
    pub log_json: bool,
    /// Seconds to let running requests finish after SIGTERM or Ctrl-C.
    #[arg(long, env = "ZONETALLY_SHUTDOWN_GRACE", default_value_t = 10.0)]
    pub shutdown_grace: f64,
    /// Seconds suggested in `Retry-After` to pollers and to clients refused by a full queue.
    #[arg(long, env = "ZONETALLY_RETRY_AFTER", default_value_t = 1)]
    pub retry_after: u64,
    /// Connections served in full at once; beyond it a connection gets health checks only.
    // 768 stays below the common soft limit of 1,024 descriptors with room for the listener, the
    // runtime, logs, a job store and the connections beyond the cap (served health checks under
    // --overflow-timeout); `serve` also raises the soft limit to the hard one, and warns when
    // the limit leaves less room than that.
    #[arg(long, env = "ZONETALLY_MAX_CONNECTIONS", default_value_t = 768)]
    pub max_connections: usize,
    /// Seconds for a request's headers to arrive, counted from when the connection is ready for
    /// that request (opened, or the previous response sent); 0: no limit.
    #[arg(long, env = "ZONETALLY_HEADER_TIMEOUT", default_value_t = 10.0)]
    pub header_timeout: f64,
    /// Seconds a connection may stay open with no request in flight and no byte moving; 0:
    /// close each connection after one response.
    #[arg(long, env = "ZONETALLY_KEEP_ALIVE_TIMEOUT", default_value_t = 5.0)]
    pub keep_alive_timeout: f64,
    /// Seconds for a request body to arrive once its headers have; beyond it the request is
    /// answered 408 and the connection closed. 0: no limit.
    #[arg(long, env = "ZONETALLY_BODY_TIMEOUT", default_value_t = 60.0)]
    pub body_timeout: f64,
    /// Seconds a connection beyond --max-connections has to send its one health check.
    #[arg(long, env = "ZONETALLY_OVERFLOW_TIMEOUT", default_value_t = 1.0)]
    pub overflow_timeout: f64,
}

impl Default for Config {
    /// The defaults above, with no environment read.
    fn default() -> Self {
        Config {
            bind: SocketAddr::from(([127, 0, 0, 1], 8080)),
            threads: 0,
            sync_threads: 0,
            shared_pool: false,
            queue: 64,
            job_ttl: 3600.0,
            job_store: "memory".into(),
            job_timeout: 3600.0,
            max_jobs: 10_000,
            max_job_bytes: None,
            max_exceedance_values: 10_000_000,
            max_scenarios: 10_000,
            max_scenario_bytes: 256 << 20,
            memory_budget: None,
            api_keys: None,
            public_metrics: false,
            rate_limit: 0,
            rate_burst: 0,
            max_decodes: 0,
            raster_cache_bytes: None,
            normaliser_cache_bytes: None,
            max_body_bytes: 64 << 20,
            max_cells: 25_000_000,
            max_zones: 200_000,
            max_zone_cells: 100_000_000,
            max_vertices: 4_000_000,
            data_dir: None,
            max_cost: 1e13,
            sync_budget: 2e10,
            request_timeout: 120.0,
            max_json_depth: 16,
            cors_origins: Vec::new(),
            log_json: false,
            shutdown_grace: 10.0,
            retry_after: 1,
            max_connections: 768,
            header_timeout: 10.0,
            keep_alive_timeout: 5.0,
            body_timeout: 60.0,
            overflow_timeout: 1.0,
        }
    }
}

impl Config {
    pub fn limits(&self) -> Limits {
        Limits {
            max_cells: self.max_cells,
            max_zones: self.max_zones,
            max_zone_cells: self.max_zone_cells,
            max_cost: self.max_cost,
            max_vertices: self.max_vertices,
            max_exceedance_values: self.max_exceedance_values,
            max_scenarios: self.max_scenarios,
            max_scenario_bytes: self.max_scenario_bytes,
        }
    }
    /// How the memory budget is shared out; an error names the flags that do not fit.
    pub fn memory_plan(&self) -> Result<MemoryPlan, String> {
        MemoryPlan::new(
            self.memory_budget.unwrap_or_else(default_budget),
            self.raster_cache_bytes,
            self.normaliser_cache_bytes,
            self.max_job_bytes,
        )
    }
    /// What the job manager holds jobs to, with results bounded by `results_bytes`.
    pub fn job_limits(&self, results_bytes: u64) -> crate::jobs::JobLimits {
        crate::jobs::JobLimits {
            ttl: self.job_ttl(),
            timeout: (self.job_timeout > 0.0).then(|| secs(self.job_timeout)),
            max_held: self.max_jobs,
            max_held_bytes: results_bytes,
        }
    }
    pub fn job_ttl(&self) -> Duration {
        secs(self.job_ttl)
    }
    pub fn request_timeout(&self) -> Duration {
        secs(self.request_timeout)
    }
    pub fn shutdown_grace(&self) -> Duration {
        secs(self.shutdown_grace)
    }
    pub fn header_timeout(&self) -> Duration {
        secs(self.header_timeout)
    }
    pub fn keep_alive_timeout(&self) -> Duration {
        secs(self.keep_alive_timeout)
    }
    pub fn body_timeout(&self) -> Duration {
        secs(self.body_timeout)
    }
    pub fn overflow_timeout(&self) -> Duration {
        secs(self.overflow_timeout)
    }
}

fn secs(s: f64) -> Duration {
    Duration::try_from_secs_f64(s.max(0.0)).unwrap_or(Duration::MAX)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn default_matches_the_flags() {
        let parsed = Config::parse_from(["serve"]);
        let d = Config::default();
        assert_eq!(
            format!("{parsed:?}"),
            format!("{d:?}"),
            "Config::default and the clap defaults diverged"
        );
    }
}

//! The state every handler shares: settings, the job manager (with the compute pool), the
//! caches, the process registry and the metrics. Cheap to clone (one `Arc`).
//!
//! Processes never see this: `context()` hands them the narrow `processes::Context`.

use super::auth::Keys;
use super::budget::{Charge, MemoryBudget, MemoryPlan};
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::Arc;

use super::cache::Caches;
use super::config::Config;
use super::metrics::{Metrics, Snapshot};
use super::problem::{ApiError, JobFailures};
use super::processes::{self, Context, Process};
use crate::engine::Control;
use crate::jobs::{Finished, Jobs, Pool};

#[derive(Clone)]
pub struct AppState {
    inner: Arc<Inner>,
}

struct Inner {
    config: Config,
    /// The API keys, when they are on.
    keys: Option<Keys>,
    /// Requests per key, when keys and a rate limit are on.
    rates: Option<governor::DefaultKeyedRateLimiter<String>>,
    /// Synchronous requests' own pool; `None` when they share the jobs' pool.
    sync_pool: Option<Pool>,
    memory: MemoryPlan,
    /// The part of the memory budget that request data charges (`memory.requests`).
    budget: Arc<MemoryBudget>,
    decodes: Arc<tokio::sync::Semaphore>,
    jobs: Jobs,
    caches: Caches,
    metrics: Arc<Metrics>,
    processes: Vec<Arc<dyn Process>>,
    shutting_down: AtomicBool,
}

impl AppState {
    /// The service as its configuration says (the embedded default: an in-memory job store).
    pub fn new(config: Config) -> Result<AppState, String> {
        let store = crate::jobs::Store::open(&config.job_store)?;
        AppState::with_job_store(config, store)
    }

    /// The service keeping its jobs in `store`.
    pub fn with_job_store(config: Config, store: crate::jobs::Store) -> Result<AppState, String> {
        let pool = Pool::new(config.threads, config.queue)?;
        let memory = config.memory_plan()?;
        let jobs = Jobs::new(
            store,
            pool,
            Arc::new(JobFailures),
            config.job_limits(memory.job_results),
        );
        let caches = Caches::new(memory.raster_cache, memory.normaliser_cache)
            .with_data_dir(config.data_dir.clone());
        let sync_pool = match config.shared_pool {
            true => None,
            false => Some(Pool::new(config.sync_threads, config.queue)?),
        };
        let keys = config.api_keys.as_deref().map(Keys::load).transpose()?;
        let rates = std::num::NonZeroU32::new(config.rate_limit)
            .filter(|_| keys.is_some())
            .map(|rate| {
                let burst = std::num::NonZeroU32::new(config.rate_burst).unwrap_or(rate);
                governor::RateLimiter::keyed(governor::Quota::per_second(rate).allow_burst(burst))
            });
        let budget = MemoryBudget::new(memory.requests);
        let decodes = match config.max_decodes {
            0 => std::thread::available_parallelism().map_or(2, |n| n.get()),
            n => n,
        };
        Ok(AppState {
            inner: Arc::new(Inner {
                config,
                memory,
                keys,
                rates,
                sync_pool,
                budget,
                decodes: Arc::new(tokio::sync::Semaphore::new(decodes)),
                jobs,
                caches,
                metrics: Arc::default(),
                processes: processes::registry(),
                shutting_down: AtomicBool::new(false),
            }),
        })
    }

    /// The API keys, when they are on.
    pub fn keys(&self) -> Option<&Keys> {
        self.inner.keys.as_ref()
    }

    /// Counts a request of `owner` against its rate; the seconds to wait when it is over.
    pub fn over_rate(&self, owner: &str) -> Option<u64> {
        use governor::clock::{Clock, DefaultClock};
        let rates = self.inner.rates.as_ref()?;
        let not_until = rates.check_key(&owner.to_string()).err()?;
        let wait = not_until.wait_time_from(DefaultClock::default().now());
        Some(wait.as_secs_f64().ceil().max(1.0) as u64)
    }

    /// How the memory budget was shared out at start-up.
    pub fn memory_plan(&self) -> &MemoryPlan {
        &self.inner.memory
    }

    /// The part of the memory budget that request data charges.
    pub fn budget(&self) -> &Arc<MemoryBudget> {
        &self.inner.budget
    }

    /// Charges `bytes` of request data, or refuses with 503.
    pub fn charge(&self, bytes: u64) -> Result<Charge, ApiError> {
        self.inner
            .budget
            .charge(bytes)
            .map_err(|o| ApiError::OverBudget {
                asked: o.asked,
                used: o.used,
                limit: o.limit,
                retry_after: self.inner.config.retry_after,
            })
    }

    pub fn config(&self) -> &Config {
        &self.inner.config
    }
    pub fn jobs(&self) -> &Jobs {
        &self.inner.jobs
    }
    /// The answer to a job store that cannot be reached: a 503 with Retry-After; the cause
    /// goes to the log only.
    pub fn store_down(&self, e: crate::jobs::StoreDown) -> ApiError {
        tracing::warn!(error = %e, "job store unavailable");
        ApiError::StoreDown {
            retry_after: self.config().retry_after,
        }
    }
    /// The pool async jobs run on.
    pub fn pool(&self) -> &Pool {
        self.inner.jobs.pool()
    }
    /// The figures of both pools together.
    pub fn pool_stats(&self) -> crate::jobs::PoolStats {
        match &self.inner.sync_pool {
            Some(own) => self.pool().stats().plus(&own.stats()),
            None => self.pool().stats(),
        }
    }
    /// The pool synchronous requests run on (their own, unless `--shared-pool`).
    pub fn sync_pool(&self) -> &Pool {
        self.inner
            .sync_pool
            .as_ref()
            .unwrap_or(self.inner.jobs.pool())
    }
    pub fn caches(&self) -> &Caches {
        &self.inner.caches
    }
    pub fn metrics(&self) -> &Arc<Metrics> {
        &self.inner.metrics
    }
    pub fn processes(&self) -> &[Arc<dyn Process>] {
        &self.inner.processes
    }
    pub fn process(&self, id: &str) -> Option<Arc<dyn Process>> {
        self.inner.processes.iter().find(|p| p.id() == id).cloned()
    }

    /// What processes see: the limits and the caches as their raster and normaliser sources.
    pub fn context(&self) -> Context<'_> {
        Context {
            limits: self.inner.config.limits(),
            rasters: &self.inner.caches,
            normalisers: &self.inner.caches,
        }
    }

    /// The figures `/metrics` renders, read now.
    pub fn snapshot(&self) -> Snapshot {
        let caches = &self.inner.caches;
        Snapshot {
            pool: self.pool_stats(),
            rasters: caches.raster_stats(),
            normalisers: caches.normaliser_stats(),
            jobs: self.inner.jobs.counts().unwrap_or_default(),
            allocator: super::allocator::stats(),
        }
    }

    pub fn is_shutting_down(&self) -> bool {
        self.inner.shutting_down.load(Ordering::Relaxed)
    }

    /// Refuses new executions from now on and fails every unfinished job (their computations
    /// are cancelled). Returns how many jobs were failed.
    pub fn begin_shutdown(&self) -> usize {
        self.inner.shutting_down.store(true, Ordering::Relaxed);
        self.inner.jobs.shut_down()
    }

    /// Parses and validates a body on the runtime's blocking threads (not the compute pool, whose
    /// queue bounds the kernels only, and not the async workers).
    pub async fn decode<T, F>(&self, work: F) -> Result<T, ApiError>
    where
        T: Send + 'static,
        F: FnOnce() -> Result<T, ApiError> + Send + 'static,
    {
        // At most --max-decodes at once: each may expand its body up to the request limits.
        let permit = self
            .inner
            .decodes
            .clone()
            .acquire_owned()
            .await
            .map_err(|_| ApiError::ShuttingDown)?;
        let work = move || {
            let _permit = permit;
            work()
        };
        match tokio::task::spawn_blocking(work).await {
            Ok(r) => r,
            Err(e) => Err(ApiError::Internal {
                cause: format!("decoding failed: {e}"),
            }),
        }
    }

    /// Runs `work` on the synchronous requests' pool and waits for it; never computes on the
    /// caller's thread.
    pub async fn compute<T, F>(&self, control: Arc<Control>, work: F) -> Result<T, ApiError>
    where
        T: Send + 'static,
        F: FnOnce(&Control) -> Result<T, ApiError> + Send + 'static,
    {
        let rx = self
            .sync_pool()
            .submit(control, work)
            .map_err(|_| ApiError::Busy {
                retry_after: self.inner.config.retry_after,
            })?;
        match rx.await {
            Ok(Finished::Done(r)) => r,
            Ok(Finished::Cancelled) => Err(ApiError::Cancelled),
            Ok(Finished::Panicked(cause)) => Err(ApiError::Internal {
                cause: format!("computation panicked: {cause}"),
            }),
            Err(_) => Err(ApiError::Internal {
                cause: "the compute pool dropped a computation".into(),
            }),
        }
    }
}

//! The state every handler shares: settings, the compute pool, the job store, the caches, the
//! process registry and the metrics. Cheap to clone (one `Arc`).

use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::Arc;

use super::cache::Caches;
use super::config::Config;
use super::metrics::Metrics;
use super::problem::ApiError;
use super::processes::{self, Process};
use crate::engine::Control;
use crate::jobs::{Finished, JobStore, MemoryStore, Pool};

#[derive(Clone)]
pub struct AppState {
    inner: Arc<Inner>,
}

struct Inner {
    config: Config,
    pool: Pool,
    store: Arc<dyn JobStore>,
    caches: Caches,
    metrics: Metrics,
    processes: Vec<Arc<dyn Process>>,
    shutting_down: AtomicBool,
}

impl AppState {
    /// The embedded set-up: an in-memory job store.
    pub fn new(config: Config) -> Result<AppState, String> {
        AppState::with_store(config, Arc::new(MemoryStore::new()))
    }

    pub fn with_store(config: Config, store: Arc<dyn JobStore>) -> Result<AppState, String> {
        let pool = Pool::new(config.threads, config.queue)?;
        let caches = Caches::new(config.raster_cache_bytes, config.normaliser_cache_bytes);
        Ok(AppState {
            inner: Arc::new(Inner {
                config,
                pool,
                store,
                caches,
                metrics: Metrics::default(),
                processes: processes::registry(),
                shutting_down: AtomicBool::new(false),
            }),
        })
    }

    pub fn config(&self) -> &Config {
        &self.inner.config
    }
    pub fn pool(&self) -> &Pool {
        &self.inner.pool
    }
    pub fn store(&self) -> &Arc<dyn JobStore> {
        &self.inner.store
    }
    pub fn caches(&self) -> &Caches {
        &self.inner.caches
    }
    pub fn metrics(&self) -> &Metrics {
        &self.inner.metrics
    }
    pub fn processes(&self) -> &[Arc<dyn Process>] {
        &self.inner.processes
    }
    pub fn process(&self, id: &str) -> Option<Arc<dyn Process>> {
        self.inner.processes.iter().find(|p| p.id() == id).cloned()
    }

    pub fn is_shutting_down(&self) -> bool {
        self.inner.shutting_down.load(Ordering::Relaxed)
    }

    /// Refuses new executions from now on and fails every unfinished job (their computations
    /// are cancelled). Returns how many jobs were failed.
    pub fn begin_shutdown(&self) -> usize {
        self.inner.shutting_down.store(true, Ordering::Relaxed);
        let message = "the service shut down before this job finished: submit it again";
        let failure = ApiError::ShuttingDown;
        self.inner
            .store
            .fail_unfinished(message, &|_| crate::jobs::Outcome::Failure {
                status: failure.status().as_u16(),
                body: failure.to_body(),
            })
    }

    /// Parses and validates a body on the runtime's blocking threads (not the compute pool, whose
    /// queue bounds the kernels only, and not the async workers).
    pub async fn decode<T, F>(&self, work: F) -> Result<T, ApiError>
    where
        T: Send + 'static,
        F: FnOnce() -> Result<T, ApiError> + Send + 'static,
    {
        match tokio::task::spawn_blocking(work).await {
            Ok(r) => r,
            Err(e) => Err(ApiError::Internal {
                cause: format!("decoding failed: {e}"),
            }),
        }
    }

    /// Runs `work` on the compute pool and waits for it; never computes on the caller's thread.
    pub async fn compute<T, F>(&self, control: Arc<Control>, work: F) -> Result<T, ApiError>
    where
        T: Send + 'static,
        F: FnOnce(&Control) -> Result<T, ApiError> + Send + 'static,
    {
        let rx = self
            .inner
            .pool
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

//! Where jobs live and how computations run: the job lifecycle and its storable record, the
//! `JobStore` trait with its in-memory store, the `Jobs` manager that runs jobs and applies
//! every transition, and the runner (the one shared compute pool with its bounded queue).
//!
//! Only this module knows where jobs are kept and changes them. It knows nothing of HTTP or
//! JSON: results and failures are opaque byte bodies that `api` encoded; the store only keeps
//! them, stamps times, and forgets finished jobs once their time to live has passed.

mod lifecycle;
mod manager;
mod memory;
mod redis;
mod runner;
mod switched;

use std::sync::Arc;
use std::time::SystemTime;

pub use lifecycle::{Failure, JobRecord, JobState, Outcome, Refused, Results};
pub use manager::{Ending, Failures, JobLimits, Jobs, SubmitRefused, WorkError};
pub use memory::MemoryStore;
pub use redis::RedisStore;
pub use runner::{CancelOnDrop, Finished, Pool, PoolStats, QueueFull};
pub use switched::SwitchedStore;

/// Which jobs a listing wants.
#[derive(Clone, Debug, Default)]
pub struct JobFilter {
    pub processes: Vec<String>,
    pub states: Vec<JobState>,
    /// Only this owner's jobs, when set.
    pub owner: Option<String>,
}

impl JobFilter {
    fn admits(&self, job: &JobRecord) -> bool {
        (self.processes.is_empty() || self.processes.iter().any(|p| p == job.process()))
            && (self.states.is_empty() || self.states.contains(&job.state()))
            && self.owner.as_deref().is_none_or(|o| job.owner() == Some(o))
    }
}

/// A listing being collected: records offered newest first, those admitted counted, and those
/// from `offset` kept up to `limit`.
struct Paging<'a> {
    filter: &'a JobFilter,
    now: SystemTime,
    offset: usize,
    limit: usize,
    page: Vec<JobRecord>,
    matched: usize,
}

impl<'a> Paging<'a> {
    fn new(filter: &'a JobFilter, offset: usize, limit: usize) -> Paging<'a> {
        Paging {
            filter,
            now: SystemTime::now(),
            offset,
            limit,
            page: Vec::with_capacity(limit.min(1024)),
            matched: 0,
        }
    }
    fn offer(&mut self, job: &JobRecord) {
        if job.is_expired(self.now) || !self.filter.admits(job) {
            return;
        }
        if self.matched >= self.offset && self.page.len() < self.limit {
            self.page.push(job.clone());
        }
        self.matched += 1;
    }
    fn done(self) -> (Vec<JobRecord>, usize) {
        (self.page, self.matched)
    }
}

/// How many jobs a store holds in each state.
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq)]
pub struct JobCounts([usize; 5]);

impl JobCounts {
    fn slot(state: JobState) -> usize {
        JobState::ALL
            .iter()
            .position(|s| *s == state)
            .unwrap_or_default()
    }
    fn add(&mut self, state: JobState) {
        self.0[Self::slot(state)] += 1;
    }
    fn remove(&mut self, state: JobState) {
        let n = &mut self.0[Self::slot(state)];
        *n = n.saturating_sub(1);
    }
    fn set(&mut self, state: JobState, n: usize) {
        self.0[Self::slot(state)] = n;
    }
    pub fn of(&self, state: JobState) -> usize {
        self.0[Self::slot(state)]
    }
    pub fn total(&self) -> usize {
        self.0.iter().sum()
    }
}

/// The store could not be reached, or did not answer in time: nothing was changed that the
/// caller can rely on. Occurs only with a store outside the process; the in-memory store never
/// fails.
#[derive(Clone, Debug, PartialEq, Eq, thiserror::Error)]
#[error("the job store is unavailable: {0}")]
pub struct StoreDown(pub String);

/// What a store operation gives back, or why it could not.
pub type Stored<T> = Result<T, StoreDown>;

/// Which store a service keeps its jobs in, as an opaque handle: the layers above choose it
/// and hand it to `Jobs::new`, and never call it.
#[derive(Clone)]
pub struct Store(Arc<dyn JobStore>);

impl Store {
    /// The embedded default: in this process's memory, lost on restart.
    pub fn memory() -> Store {
        Store(Arc::new(MemoryStore::new()))
    }
    /// Any implementation of the trait (a test's, or one outside the process).
    pub fn of(store: Arc<dyn JobStore>) -> Store {
        Store(store)
    }
    /// The store `--job-store` names: `memory`, or `redis://host:port/db` (keys under
    /// `zonetally:`).
    pub fn open(spec: &str) -> Result<Store, String> {
        match spec {
            "memory" => Ok(Store::memory()),
            url if url.starts_with("redis://") || url.starts_with("rediss://") => {
                Ok(Store(Arc::new(RedisStore::open(url, "zonetally")?)))
            }
            other => Err(format!(
                "--job-store `{other}` is neither `memory` nor a `redis://host:port/db` address"
            )),
        }
    }
}

/// A place to keep job records. Implementations must be cheap to call from async handlers: no
/// IO that blocks for long (a remote store bounds every call by a short timeout and answers
/// `StoreDown` past it), no computation. Records change only through `update`, whose closure
/// the `jobs` module writes with the lifecycle's transitions.
pub trait JobStore: Send + Sync + 'static {
    fn insert(&self, job: JobRecord) -> Stored<()>;
    /// A snapshot of the record, or `None` when it is unknown or expired.
    fn get(&self, id: &str) -> Stored<Option<JobRecord>>;
    /// Applies `change` to the record and returns the changed copy; `None` when unknown. The
    /// closure may run more than once (a remote store retries when the record changed under
    /// it), each time on a fresh copy.
    fn update(&self, id: &str, change: &mut dyn FnMut(&mut JobRecord))
        -> Stored<Option<JobRecord>>;
    /// Forgets a record at once (a submission the pool refused).
    fn remove(&self, id: &str) -> Stored<Option<JobRecord>>;
    /// Records admitted by `filter`, newest first, `limit` of them from `offset`, and how many
    /// matched in all.
    fn list(
        &self,
        filter: &JobFilter,
        offset: usize,
        limit: usize,
    ) -> Stored<(Vec<JobRecord>, usize)>;
    /// Forgets records whose time to live has passed; returns how many.
    fn purge_expired(&self, now: SystemTime) -> Stored<usize>;
    /// Records held per state.
    fn counts(&self) -> Stored<JobCounts>;
    /// Bytes the records hold in this process, results included (for admission).
    fn held_bytes(&self) -> u64;
    /// Whether the store can take work (a remote store checks its connection).
    fn ready(&self) -> bool;
}

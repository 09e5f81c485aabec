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
mod runner;

use std::time::SystemTime;

pub use lifecycle::{Failure, JobRecord, JobState, Outcome, Refused, Results};
pub use manager::{Ending, Failures, JobLimits, Jobs, SubmitRefused, WorkError};
pub use memory::MemoryStore;
pub use runner::{CancelOnDrop, Finished, Pool, PoolStats, QueueFull};

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
    pub fn of(&self, state: JobState) -> usize {
        self.0[Self::slot(state)]
    }
    pub fn total(&self) -> usize {
        self.0.iter().sum()
    }
}

/// A place to keep job records. Implementations must be cheap to call from async handlers: no
/// IO that blocks for long, no computation. Records change only through `update`, whose closure
/// the `jobs` module writes with the lifecycle's transitions.
pub trait JobStore: Send + Sync + 'static {
    fn insert(&self, job: JobRecord);
    /// A snapshot of the record, or `None` when it is unknown or expired.
    fn get(&self, id: &str) -> Option<JobRecord>;
    /// Applies `change` to the record and returns the changed copy; `None` when unknown.
    fn update(&self, id: &str, change: &mut dyn FnMut(&mut JobRecord)) -> Option<JobRecord>;
    /// Forgets a record at once (a submission the pool refused).
    fn remove(&self, id: &str) -> Option<JobRecord>;
    /// Records admitted by `filter`, newest first, `limit` of them from `offset`, and how many
    /// matched in all.
    fn list(&self, filter: &JobFilter, offset: usize, limit: usize) -> (Vec<JobRecord>, usize);
    /// Forgets records whose time to live has passed; returns how many.
    fn purge_expired(&self, now: SystemTime) -> usize;
    /// Records held per state.
    fn counts(&self) -> JobCounts;
    /// Bytes the records hold, results included (for admission).
    fn held_bytes(&self) -> u64;
    /// Whether the store can take work (a remote store would check its connection).
    fn ready(&self) -> bool;
}

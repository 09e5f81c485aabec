//! Where jobs live and how computations run: the job record, the `JobStore` trait with its
//! in-memory store, and the runner (the one shared compute pool with its bounded queue).
//!
//! Only this module knows where jobs are kept. It knows nothing of HTTP or JSON: results and
//! failures are opaque byte bodies that `api` encoded; the store only keeps them, stamps times,
//! and forgets finished jobs once their time to live has passed.

mod memory;
mod runner;

use std::sync::Arc;
use std::time::{Instant, SystemTime};

use bytes::Bytes;

use crate::engine::Control;

pub use memory::MemoryStore;
pub use runner::{CancelOnDrop, Finished, Pool, PoolStats, QueueFull};

/// Where a job is in its life. Names follow OGC API - Processes 1.0 `statusCode`.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash)]
pub enum JobState {
    Accepted,
    Running,
    Successful,
    Failed,
    Dismissed,
}

impl JobState {
    pub fn as_str(self) -> &'static str {
        match self {
            JobState::Accepted => "accepted",
            JobState::Running => "running",
            JobState::Successful => "successful",
            JobState::Failed => "failed",
            JobState::Dismissed => "dismissed",
        }
    }
    pub fn parse(s: &str) -> Option<JobState> {
        [
            JobState::Accepted,
            JobState::Running,
            JobState::Successful,
            JobState::Failed,
            JobState::Dismissed,
        ]
        .into_iter()
        .find(|k| k.as_str() == s)
    }
    pub fn is_finished(self) -> bool {
        matches!(
            self,
            JobState::Successful | JobState::Failed | JobState::Dismissed
        )
    }
}

/// What a finished job left behind, already encoded by the caller.
#[derive(Clone, Debug)]
pub enum Outcome {
    /// The results body, as served by `/jobs/{id}/results`.
    Results(Bytes),
    /// An HTTP status and the exception (problem) document explaining the failure.
    Failure { status: u16, body: Bytes },
}

/// One asynchronous execution.
#[derive(Clone, Debug)]
pub struct Job {
    pub id: String,
    pub process: String,
    pub state: JobState,
    pub message: String,
    pub created: SystemTime,
    pub started: Option<SystemTime>,
    pub finished: Option<SystemTime>,
    pub updated: SystemTime,
    /// Cancellation and progress of the computation behind the job.
    pub control: Arc<Control>,
    pub outcome: Option<Outcome>,
    /// When a finished job is forgotten.
    pub expires: Option<Instant>,
}

impl Job {
    pub fn new(id: String, process: String, control: Arc<Control>) -> Job {
        let now = SystemTime::now();
        Job {
            id,
            process,
            state: JobState::Accepted,
            message: "queued for the compute pool".into(),
            created: now,
            started: None,
            finished: None,
            updated: now,
            control,
            outcome: None,
            expires: None,
        }
    }
    /// Progress in percent: the engine's fraction while running, 100 once finished.
    pub fn progress(&self) -> u8 {
        match self.state {
            JobState::Successful | JobState::Failed | JobState::Dismissed => 100,
            JobState::Accepted => 0,
            JobState::Running => (self.control.progress() * 100.0).floor().clamp(0.0, 99.0) as u8,
        }
    }
}

/// Which jobs a listing wants.
#[derive(Clone, Debug, Default)]
pub struct JobFilter {
    pub processes: Vec<String>,
    pub states: Vec<JobState>,
}

impl JobFilter {
    fn admits(&self, job: &Job) -> bool {
        (self.processes.is_empty() || self.processes.contains(&job.process))
            && (self.states.is_empty() || self.states.contains(&job.state))
    }
}

/// A place to keep jobs. Implementations must be cheap to call from async handlers: no IO
/// that blocks for long, no computation.
pub trait JobStore: Send + Sync + 'static {
    fn insert(&self, job: Job);
    /// A snapshot of the job, or `None` when it is unknown or expired.
    fn get(&self, id: &str) -> Option<Job>;
    /// Applies `change` to the job; false when it is unknown.
    fn update(&self, id: &str, change: &mut dyn FnMut(&mut Job)) -> bool;
    fn remove(&self, id: &str) -> Option<Job>;
    /// Jobs admitted by `filter`, newest first, `limit` of them from `offset`, and how many
    /// matched in all.
    fn list(&self, filter: &JobFilter, offset: usize, limit: usize) -> (Vec<Job>, usize);
    /// Forgets finished jobs whose time to live has passed; returns how many.
    fn purge_expired(&self, now: Instant) -> usize;
    /// Marks every unfinished job failed with `message` and cancels its computation; returns
    /// how many. Used at shutdown.
    fn fail_unfinished(&self, message: &str, failure: &dyn Fn(&Job) -> Outcome) -> usize;
    /// Number of jobs held.
    fn len(&self) -> usize;
    fn is_empty(&self) -> bool {
        self.len() == 0
    }
    /// Whether the store can take work (a remote store would check its connection).
    fn ready(&self) -> bool;
}

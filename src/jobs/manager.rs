//! The job manager: submits work to the pool, owns every transition of every job, and watches
//! running jobs for their stored cancellation flag.
//!
//! Life of a job: `submit` stores an accepted record and queues the work; on a compute thread
//! the work first moves the record to running (refused if cancellation was asked meanwhile,
//! and then it does not run); a watcher task copies the computation's progress into the record
//! and, when the stored flag says so, cancels the computation; when the work ends the watcher
//! applies the ending (successful, failed) and the record is kept for its time to live.
//! Dismissing sets the stored flag (seen by whichever runner holds the job) and cancels a
//! computation running here at once.

use std::collections::HashMap;
use std::sync::{Arc, Mutex};
use std::time::{Duration, SystemTime};

use tokio::sync::oneshot;

use super::lifecycle::{Failure, JobRecord, JobState, Results};
use super::runner::{Finished, Pool, QueueFull};
use super::{JobCounts, JobFilter, JobStore};
use crate::engine::Control;

/// How often a watcher copies progress into the record and reads the cancellation flag: often
/// enough that a dismissed job stops within a tenth of a second, rarely enough to cost nothing.
const WATCH_EVERY: Duration = Duration::from_millis(100);

/// Endings the manager decides itself, for which the caller supplies the encoded failure.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Ending {
    /// The computation stopped on cancellation without having been dismissed.
    Cancelled,
    /// The computation panicked (already logged by the runner).
    Panicked,
    /// The service shut down before the job finished.
    ShutDown,
}

/// Encodes the failures the manager decides (the api layer's problem documents).
pub trait Failures: Send + Sync + 'static {
    fn failure(&self, ending: Ending) -> Failure;
}

/// How a job's work can end short of results.
#[derive(Clone, Debug, PartialEq)]
pub enum WorkError {
    /// It saw its computation cancelled.
    Cancelled,
    /// It failed, with this failure to keep.
    Failed(Failure),
}

/// A job's work: runs on a compute thread and returns the encoded results.
pub type Work = Box<dyn FnOnce(&Control) -> Result<Results, WorkError> + Send>;

#[derive(Clone)]
pub struct Jobs {
    inner: Arc<Inner>,
}

struct Inner {
    store: Arc<dyn JobStore>,
    pool: Pool,
    failures: Arc<dyn Failures>,
    ttl: Duration,
    /// Computations of jobs submitted here and not yet ended, by job id.
    live: Mutex<HashMap<String, Arc<Control>>>,
}

impl Inner {
    fn live(&self) -> std::sync::MutexGuard<'_, HashMap<String, Arc<Control>>> {
        // Poisoning only means a panic elsewhere while holding the lock; the map is consistent.
        self.live.lock().unwrap_or_else(|p| p.into_inner())
    }

    /// Applies the ending of a job's work to its record.
    fn end(
        &self,
        id: &str,
        finished: Result<Finished<Result<Results, WorkError>>, oneshot::error::RecvError>,
    ) {
        let now = SystemTime::now();
        let ttl = self.ttl;
        let failure = match finished {
            Ok(Finished::Done(Ok(results))) => {
                let mut results = Some(results);
                self.store.update(id, &mut |j| {
                    if let Some(r) = results.take() {
                        // Refused when the job was dismissed or failed meanwhile: keep that.
                        let _ = j.succeed(r, now, ttl);
                    }
                });
                None
            }
            Ok(Finished::Done(Err(WorkError::Failed(f)))) => Some(f),
            Ok(Finished::Done(Err(WorkError::Cancelled))) | Ok(Finished::Cancelled) => {
                Some(self.failures.failure(Ending::Cancelled))
            }
            Ok(Finished::Panicked(_)) | Err(_) => Some(self.failures.failure(Ending::Panicked)),
        };
        if let Some(f) = failure {
            let mut f = Some(f);
            self.store.update(id, &mut |j| {
                if let Some(f) = f.take() {
                    let _ = j.fail(f, now, ttl);
                }
            });
        }
        self.live().remove(id);
    }

    /// Copies progress in and the cancellation flag out; false once the job is gone.
    fn watch(&self, id: &str, control: &Control) {
        let percent = (control.progress() * 100.0).floor().clamp(0.0, 99.0) as u8;
        let now = SystemTime::now();
        let seen = self.store.update(id, &mut |j| {
            j.report_progress(percent, now);
        });
        if seen.is_none_or(|j| j.cancel_requested()) {
            control.cancel();
        }
    }
}

impl Jobs {
    /// A manager over `store`, running work on `pool`, keeping finished jobs for `ttl`.
    pub fn new(
        store: Arc<dyn JobStore>,
        pool: Pool,
        failures: Arc<dyn Failures>,
        ttl: Duration,
    ) -> Jobs {
        Jobs {
            inner: Arc::new(Inner {
                store,
                pool,
                failures,
                ttl,
                live: Mutex::new(HashMap::new()),
            }),
        }
    }

    /// A manager over a fresh in-memory store (the embedded set-up).
    pub fn in_memory(pool: Pool, failures: Arc<dyn Failures>, ttl: Duration) -> Jobs {
        Jobs::new(Arc::new(super::MemoryStore::new()), pool, failures, ttl)
    }

    pub fn pool(&self) -> &Pool {
        &self.inner.pool
    }

    /// Stores a new accepted job for `process` and queues `work`; the record as accepted, or
    /// `QueueFull` (and nothing stored) when every permit is taken. Must be called inside the
    /// async runtime (the job's watcher is a task).
    pub fn submit(
        &self,
        process: &str,
        owner: Option<String>,
        work: Work,
    ) -> Result<JobRecord, QueueFull> {
        let id = uuid::Uuid::new_v4().to_string();
        let record = JobRecord::accept(id.clone(), process.to_string(), owner, SystemTime::now());
        self.inner.store.insert(record.clone());
        let control = Arc::new(Control::new());
        self.inner.live().insert(id.clone(), control.clone());
        let (inner, job) = (self.inner.clone(), id.clone());
        let submitted = self.inner.pool.submit(control.clone(), move |c| {
            let started = inner
                .store
                .update(&job, &mut |j| {
                    let _ = j.start(SystemTime::now());
                })
                .is_some_and(|j| j.state() == JobState::Running);
            if !started {
                return Err(WorkError::Cancelled);
            }
            work(c)
        });
        let rx = match submitted {
            Ok(rx) => rx,
            Err(full) => {
                self.inner.live().remove(&id);
                self.inner.store.remove(&id);
                return Err(full);
            }
        };
        let inner = self.inner.clone();
        tokio::spawn(async move {
            let mut rx = rx;
            let mut tick = tokio::time::interval(WATCH_EVERY);
            tick.set_missed_tick_behavior(tokio::time::MissedTickBehavior::Delay);
            loop {
                tokio::select! {
                    finished = &mut rx => {
                        inner.end(&id, finished);
                        break;
                    }
                    _ = tick.tick() => inner.watch(&id, &control),
                }
            }
        });
        Ok(record)
    }

    /// The job as clients see it: `None` when unknown, expired or dismissed.
    pub fn status(&self, id: &str) -> Option<JobRecord> {
        self.record(id).filter(|j| j.state() != JobState::Dismissed)
    }

    /// The stored record, dismissed tombstones included.
    pub fn record(&self, id: &str) -> Option<JobRecord> {
        self.inner.store.get(id)
    }

    /// Dismisses a job: sets the stored flag, cancels its computation if it runs here, and
    /// forgets it for clients. `None` when unknown, expired or already dismissed.
    pub fn dismiss(&self, id: &str) -> Option<JobRecord> {
        let now = SystemTime::now();
        let mut applied = false;
        let record = self.inner.store.update(id, &mut |j| {
            applied = j.dismiss(now, self.inner.ttl).is_ok();
        })?;
        if let Some(control) = self.inner.live().get(id) {
            control.cancel();
        }
        applied.then_some(record)
    }

    /// Jobs clients can see, newest first: a page and how many matched in all.
    pub fn list(&self, filter: &JobFilter, offset: usize, limit: usize) -> (Vec<JobRecord>, usize) {
        let mut visible = filter.clone();
        if visible.states.is_empty() {
            visible.states = JobState::ALL
                .into_iter()
                .filter(|s| *s != JobState::Dismissed)
                .collect();
        } else {
            visible.states.retain(|s| *s != JobState::Dismissed);
            if visible.states.is_empty() {
                return (Vec::new(), 0);
            }
        }
        self.inner.store.list(&visible, offset, limit)
    }

    /// Records held per state.
    pub fn counts(&self) -> JobCounts {
        self.inner.store.counts()
    }

    /// Forgets records whose time to live has passed; returns how many.
    pub fn purge_expired(&self) -> usize {
        self.inner.store.purge_expired(SystemTime::now())
    }

    pub fn store_ready(&self) -> bool {
        self.inner.store.ready()
    }

    /// Fails every unfinished job submitted here (never other runners' jobs) and cancels their
    /// computations; returns how many. Used at shutdown.
    pub fn shut_down(&self) -> usize {
        let now = SystemTime::now();
        let live: Vec<(String, Arc<Control>)> = self
            .inner
            .live()
            .iter()
            .map(|(id, c)| (id.clone(), c.clone()))
            .collect();
        let mut failed = 0;
        for (id, control) in live {
            control.cancel();
            let failure = self.inner.failures.failure(Ending::ShutDown);
            let mut f = Some(failure);
            self.inner.store.update(&id, &mut |j| {
                if let Some(f) = f.take() {
                    failed += usize::from(j.fail(f, now, self.inner.ttl).is_ok());
                }
            });
        }
        failed
    }
}

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

/// What the manager holds jobs to: how long one may run, and how many (and how many bytes of
/// records and results) the store may hold before new submissions are refused.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct JobLimits {
    /// Finished jobs are kept this long.
    pub ttl: Duration,
    /// A job running longer is cancelled and ends failed; `None`: no limit.
    pub timeout: Option<Duration>,
    /// Most records held, finished ones included.
    pub max_held: usize,
    /// Most bytes held by records and their results.
    pub max_held_bytes: u64,
}

impl JobLimits {
    /// Only a time to live: no timeout, no caps (tests and embedded uses).
    pub fn ttl(ttl: Duration) -> JobLimits {
        JobLimits {
            ttl,
            timeout: None,
            max_held: usize::MAX,
            max_held_bytes: u64::MAX,
        }
    }
}

/// Why a submission was refused (nothing was stored).
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum SubmitRefused {
    /// Every compute permit is taken.
    QueueFull,
    /// The store holds as many jobs, or as many bytes, as it may.
    StoreFull {
        held: usize,
        bytes: u64,
        max_held: usize,
        max_bytes: u64,
    },
}

impl From<QueueFull> for SubmitRefused {
    fn from(_: QueueFull) -> Self {
        SubmitRefused::QueueFull
    }
}

/// Endings the manager decides itself, for which the caller supplies the encoded failure.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Ending {
    /// The job ran past the timeout and was cancelled.
    TimedOut(Duration),
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
    limits: JobLimits,
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
        timed_out: Option<Duration>,
    ) {
        let now = SystemTime::now();
        let ttl = self.limits.ttl;
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
                Some(self.failures.failure(match timed_out {
                    Some(limit) => Ending::TimedOut(limit),
                    None => Ending::Cancelled,
                }))
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
        // A job dismissed while it ran leaves a tombstone for its worker: it is no longer needed.
        if self
            .store
            .get(id)
            .is_some_and(|j| j.state() == JobState::Dismissed)
        {
            self.store.remove(id);
        }
    }

    /// Copies progress in and the cancellation flag out; returns whether the job runs.
    fn watch(&self, id: &str, control: &Control) -> bool {
        let percent = (control.progress() * 100.0).floor().clamp(0.0, 99.0) as u8;
        let now = SystemTime::now();
        let seen = self.store.update(id, &mut |j| {
            j.report_progress(percent, now);
        });
        if seen.as_ref().is_none_or(|j| j.cancel_requested()) {
            control.cancel();
        }
        seen.is_some_and(|j| j.state() == JobState::Running)
    }
}

impl Jobs {
    /// A manager over `store`, running work on `pool`, holding jobs to `limits`.
    pub fn new(
        store: Arc<dyn JobStore>,
        pool: Pool,
        failures: Arc<dyn Failures>,
        limits: JobLimits,
    ) -> Jobs {
        Jobs {
            inner: Arc::new(Inner {
                store,
                pool,
                failures,
                limits,
                live: Mutex::new(HashMap::new()),
            }),
        }
    }

    /// A manager over a fresh in-memory store (the embedded set-up).
    pub fn in_memory(pool: Pool, failures: Arc<dyn Failures>, limits: JobLimits) -> Jobs {
        Jobs::new(Arc::new(super::MemoryStore::new()), pool, failures, limits)
    }

    /// Bytes the store holds in records and results.
    pub fn held_bytes(&self) -> u64 {
        self.inner.store.held_bytes()
    }

    pub fn pool(&self) -> &Pool {
        &self.inner.pool
    }

    /// Stores a new accepted job for `process` and queues `work`; the record as accepted, or
    /// why not (and nothing stored): every permit taken, or the store at its count or byte cap.
    /// Must be called inside the async runtime (the job's watcher is a task).
    pub fn submit(
        &self,
        process: &str,
        owner: Option<String>,
        work: Work,
    ) -> Result<JobRecord, SubmitRefused> {
        let limits = self.inner.limits;
        let (held, bytes) = (
            self.inner.store.counts().total(),
            self.inner.store.held_bytes(),
        );
        if held >= limits.max_held || bytes >= limits.max_held_bytes {
            return Err(SubmitRefused::StoreFull {
                held,
                bytes,
                max_held: limits.max_held,
                max_bytes: limits.max_held_bytes,
            });
        }
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
                return Err(full.into());
            }
        };
        let inner = self.inner.clone();
        tokio::spawn(async move {
            let mut rx = rx;
            let mut tick = tokio::time::interval(WATCH_EVERY);
            tick.set_missed_tick_behavior(tokio::time::MissedTickBehavior::Delay);
            // When the watcher first saw the job running, and whether it cut it off.
            let mut started: Option<std::time::Instant> = None;
            let mut timed_out = None;
            loop {
                tokio::select! {
                    finished = &mut rx => {
                        inner.end(&id, finished, timed_out);
                        break;
                    }
                    _ = tick.tick() => {
                        if inner.watch(&id, &control) {
                            let since = *started.get_or_insert_with(std::time::Instant::now);
                            if let Some(limit) = inner.limits.timeout {
                                if timed_out.is_none() && since.elapsed() >= limit {
                                    timed_out = Some(limit);
                                    control.cancel();
                                }
                            }
                        }
                    }
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
    /// forgets it for clients. The record stays as a tombstone only while its computation is
    /// queued or running here (so the worker sees the flag), and is removed when that ends;
    /// a job whose work had ended is removed at once, so dismissed jobs hold no memory.
    /// `None` when unknown, expired or already dismissed.
    pub fn dismiss(&self, id: &str) -> Option<JobRecord> {
        let now = SystemTime::now();
        let mut applied = false;
        let record = self.inner.store.update(id, &mut |j| {
            applied = j.dismiss(now, self.inner.limits.ttl).is_ok();
        })?;
        let live = self.inner.live().get(id).cloned();
        match live {
            Some(control) => control.cancel(),
            // `end` removes the job from `live` before it looks for a tombstone, so one of the
            // two always sees the other's change.
            None => {
                self.inner.store.remove(id);
            }
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
                    failed += usize::from(j.fail(f, now, self.inner.limits.ttl).is_ok());
                }
            });
        }
        failed
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use bytes::Bytes;

    /// Failures as plain messages naming the ending.
    struct Named;

    impl Failures for Named {
        fn failure(&self, ending: Ending) -> Failure {
            Failure {
                message: format!("{ending:?}"),
                status: 500,
                body: Bytes::new(),
            }
        }
    }

    async fn finished(jobs: &Jobs, id: &str) -> JobRecord {
        for _ in 0..500 {
            let j = jobs.record(id).unwrap();
            if j.state().is_finished() {
                return j;
            }
            tokio::time::sleep(Duration::from_millis(10)).await;
        }
        panic!("job {id} did not finish");
    }

    #[tokio::test]
    async fn a_job_running_past_the_timeout_is_cancelled_and_fails_as_timed_out() {
        let limit = Duration::from_millis(50);
        let jobs = Jobs::in_memory(
            Pool::new(1, 4).unwrap(),
            Arc::new(Named),
            JobLimits {
                timeout: Some(limit),
                ..JobLimits::ttl(Duration::from_secs(60))
            },
        );
        // Runs until cancelled, however long that takes.
        let work: Work = Box::new(|c: &Control| {
            while !c.is_cancelled() {
                std::thread::sleep(Duration::from_millis(1));
            }
            Err(WorkError::Cancelled)
        });
        let job = jobs.submit("p", None, work).unwrap();
        let done = finished(&jobs, job.id()).await;
        assert_eq!(done.state(), JobState::Failed);
        assert_eq!(done.message(), format!("{:?}", Ending::TimedOut(limit)));
        // A job that ends in time is untouched.
        let quick: Work = Box::new(|_: &Control| Ok(Results::json(Bytes::from_static(b"{}"))));
        let job = jobs.submit("p", None, quick).unwrap();
        assert_eq!(
            finished(&jobs, job.id()).await.state(),
            JobState::Successful
        );
    }

    #[tokio::test]
    async fn submissions_past_the_held_caps_are_refused_and_nothing_is_stored() {
        let jobs = Jobs::in_memory(
            Pool::new(1, 4).unwrap(),
            Arc::new(Named),
            JobLimits {
                max_held: 1,
                ..JobLimits::ttl(Duration::from_secs(60))
            },
        );
        let quick = || -> Work { Box::new(|_: &Control| Ok(Results::json(Bytes::new()))) };
        let first = jobs.submit("p", None, quick()).unwrap();
        finished(&jobs, first.id()).await;
        let refused = jobs.submit("p", None, quick()).unwrap_err();
        assert!(matches!(
            refused,
            SubmitRefused::StoreFull {
                held: 1,
                max_held: 1,
                ..
            }
        ));
        assert_eq!(jobs.counts().total(), 1);
    }

    #[tokio::test]
    async fn dismissed_jobs_leave_no_record() {
        let jobs = Jobs::in_memory(
            Pool::new(1, 4).unwrap(),
            Arc::new(Named),
            JobLimits::ttl(Duration::from_secs(60)),
        );
        // A finished job dismissed is removed at once, with its results' bytes.
        let quick: Work = Box::new(|_: &Control| Ok(Results::json(Bytes::from(vec![b'1'; 4096]))));
        let done = jobs.submit("p", None, quick).unwrap();
        finished(&jobs, done.id()).await;
        assert!(jobs.held_bytes() >= 4096);
        assert!(jobs.dismiss(done.id()).is_some());
        assert!(
            jobs.record(done.id()).is_none(),
            "a dismissed finished job is kept"
        );
        assert!(jobs.dismiss(done.id()).is_none(), "dismissed twice");
        // A running job dismissed keeps a tombstone until its worker stops, then none.
        let (tx, rx) = std::sync::mpsc::channel::<()>();
        let slow: Work = Box::new(move |c: &Control| {
            let _ = tx.send(());
            while !c.is_cancelled() {
                std::thread::sleep(Duration::from_millis(1));
            }
            Err(WorkError::Cancelled)
        });
        let running = jobs.submit("p", None, slow).unwrap();
        rx.recv_timeout(Duration::from_secs(10)).unwrap();
        assert!(jobs.dismiss(running.id()).is_some());
        let tombstone = jobs.record(running.id());
        assert!(
            tombstone.is_none_or(|j| j.state() == JobState::Dismissed && j.cancel_requested()),
            "the running job's record is not a tombstone"
        );
        for _ in 0..500 {
            if jobs.record(running.id()).is_none() {
                break;
            }
            tokio::time::sleep(Duration::from_millis(10)).await;
        }
        assert!(
            jobs.record(running.id()).is_none(),
            "the tombstone outlived its worker"
        );
        assert_eq!(jobs.counts().total(), 0);
        assert_eq!(jobs.held_bytes(), 0);
    }
}

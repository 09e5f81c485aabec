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
use super::{JobCounts, JobFilter, JobStore, StoreDown, Stored};
use crate::engine::Control;

/// How often a watcher copies progress into the record and reads the cancellation flag: often
/// enough that a dismissed job stops within a tenth of a second, rarely enough to cost nothing.
const WATCH_EVERY: Duration = Duration::from_millis(100);

/// While the store is down, a job's ending (its results or failure) is written again after
/// these waits, doubling from the first to the last: the ending is never dropped, and a store
/// back within seconds gets it within a fraction of one.
const RETRY_FIRST: Duration = Duration::from_millis(100);
const RETRY_LAST: Duration = Duration::from_secs(5);

/// How long a compute thread waits for the store to move a job to running before it fails the
/// job instead (as `Ending::StoreDown`, written when the store is back).
const START_PATIENCE: Duration = Duration::from_secs(10);

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
#[derive(Clone, Debug, PartialEq, Eq)]
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
    /// The store could not be reached: nothing was accepted.
    StoreDown(StoreDown),
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
    /// The job store could not be reached when the job was to start, for longer than
    /// `START_PATIENCE`.
    StoreDown,
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

    /// Applies the ending of a job's work to its record, trying again while the store is down
    /// (the ending is never dropped).
    async fn end(
        &self,
        id: &str,
        finished: Result<Finished<Result<Results, WorkError>>, oneshot::error::RecvError>,
        timed_out: Option<Duration>,
    ) {
        let now = SystemTime::now();
        let ttl = self.limits.ttl;
        let ending: Result<Results, Failure> = match finished {
            Ok(Finished::Done(Ok(results))) => Ok(results),
            Ok(Finished::Done(Err(WorkError::Failed(f)))) => Err(f),
            Ok(Finished::Done(Err(WorkError::Cancelled))) | Ok(Finished::Cancelled) => {
                Err(self.failures.failure(match timed_out {
                    Some(limit) => Ending::TimedOut(limit),
                    None => Ending::Cancelled,
                }))
            }
            Ok(Finished::Panicked(_)) | Err(_) => Err(self.failures.failure(Ending::Panicked)),
        };
        let mut wait = RETRY_FIRST;
        loop {
            // Either is refused when the job was dismissed or failed meanwhile: keep that.
            let written = self.store.update(id, &mut |j| match &ending {
                Ok(results) => {
                    let _ = j.succeed(results.clone(), now, ttl);
                }
                Err(failure) => {
                    let _ = j.fail(failure.clone(), now, ttl);
                }
            });
            match written {
                Ok(_) => break,
                Err(e) => {
                    tracing::warn!(job = id, error = %e, retry_ms = wait.as_millis() as u64, "cannot record the job's ending: trying again");
                    tokio::time::sleep(wait).await;
                    wait = (wait * 2).min(RETRY_LAST);
                }
            }
        }
        self.live().remove(id);
        // A job dismissed while it ran leaves a tombstone for its worker: it is no longer needed.
        if matches!(self.store.get(id), Ok(Some(j)) if j.state() == JobState::Dismissed) {
            let _ = self.store.remove(id);
        }
    }

    /// Copies progress in and the cancellation flag out; returns whether the job runs. A store
    /// that cannot be reached changes nothing: the job goes on, and the next tick tries again.
    fn watch(&self, id: &str, control: &Control) -> bool {
        let percent = (control.progress() * 100.0).floor().clamp(0.0, 99.0) as u8;
        let now = SystemTime::now();
        let seen = match self.store.update(id, &mut |j| {
            j.report_progress(percent, now);
        }) {
            Ok(seen) => seen,
            Err(e) => {
                tracing::debug!(job = id, error = %e, "cannot copy the job's progress");
                return false;
            }
        };
        if seen.as_ref().is_none_or(|j| j.cancel_requested()) {
            control.cancel();
        }
        seen.is_some_and(|j| j.state() == JobState::Running)
    }

    /// Moves the job to running from a compute thread; `Ok(false)` when it was dismissed or
    /// is unknown. Waits for a store that is down, up to `START_PATIENCE`.
    fn start(&self, id: &str) -> Result<bool, StoreDown> {
        let deadline = std::time::Instant::now() + START_PATIENCE;
        let mut wait = RETRY_FIRST;
        loop {
            match self.store.update(id, &mut |j| {
                let _ = j.start(SystemTime::now());
            }) {
                Ok(seen) => return Ok(seen.is_some_and(|j| j.state() == JobState::Running)),
                Err(e) if std::time::Instant::now() + wait > deadline => return Err(e),
                Err(_) => {
                    std::thread::sleep(wait);
                    wait = (wait * 2).min(RETRY_LAST);
                }
            }
        }
    }
}

impl Jobs {
    /// A manager over `store`, running work on `pool`, holding jobs to `limits`.
    pub fn new(
        store: super::Store,
        pool: Pool,
        failures: Arc<dyn Failures>,
        limits: JobLimits,
    ) -> Jobs {
        Jobs {
            inner: Arc::new(Inner {
                store: store.0,
                pool,
                failures,
                limits,
                live: Mutex::new(HashMap::new()),
            }),
        }
    }

    /// A manager over a fresh in-memory store (the embedded set-up).
    pub fn in_memory(pool: Pool, failures: Arc<dyn Failures>, limits: JobLimits) -> Jobs {
        Jobs::new(super::Store::memory(), pool, failures, limits)
    }

    /// Bytes the store holds in records and results.
    pub fn held_bytes(&self) -> u64 {
        self.inner.store.held_bytes()
    }

    pub fn pool(&self) -> &Pool {
        &self.inner.pool
    }

    /// Stores a new accepted job for `process` and queues `work`; the record as accepted, or
    /// why not (and nothing stored): every permit taken, the store at its count or byte cap, or
    /// the store unreachable.
    /// Must be called inside the async runtime (the job's watcher is a task).
    pub fn submit(
        &self,
        process: &str,
        owner: Option<String>,
        work: Work,
    ) -> Result<JobRecord, SubmitRefused> {
        let limits = self.inner.limits;
        let (held, bytes) = (
            self.inner
                .store
                .counts()
                .map_err(SubmitRefused::StoreDown)?
                .total(),
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
        self.inner
            .store
            .insert(record.clone())
            .map_err(SubmitRefused::StoreDown)?;
        let control = Arc::new(Control::new());
        self.inner.live().insert(id.clone(), control.clone());
        let (inner, job) = (self.inner.clone(), id.clone());
        let submitted = self
            .inner
            .pool
            .submit(control.clone(), move |c| match inner.start(&job) {
                Ok(true) => work(c),
                Ok(false) => Err(WorkError::Cancelled),
                Err(_) => Err(WorkError::Failed(inner.failures.failure(Ending::StoreDown))),
            });
        let rx = match submitted {
            Ok(rx) => rx,
            Err(full) => {
                self.inner.live().remove(&id);
                if let Err(e) = self.inner.store.remove(&id) {
                    // Left accepted in the store: it expires with nothing run (no TTL is set
                    // before a job finishes, so say so).
                    tracing::warn!(job = %id, error = %e, "cannot forget a job the pool refused");
                }
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
                        inner.end(&id, finished, timed_out).await;
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
    pub fn status(&self, id: &str) -> Stored<Option<JobRecord>> {
        Ok(self
            .record(id)?
            .filter(|j| j.state() != JobState::Dismissed))
    }

    /// The stored record, dismissed tombstones included.
    pub fn record(&self, id: &str) -> Stored<Option<JobRecord>> {
        self.inner.store.get(id)
    }

    /// Dismisses a job: sets the stored flag, cancels its computation if it runs here, and
    /// forgets it for clients. The record stays as a tombstone only while its computation is
    /// queued or running here (so the worker sees the flag), and is removed when that ends;
    /// a job whose work had ended is removed at once, so dismissed jobs hold no memory.
    /// `None` when unknown, expired or already dismissed.
    pub fn dismiss(&self, id: &str) -> Stored<Option<JobRecord>> {
        let now = SystemTime::now();
        let mut applied = false;
        let Some(record) = self.inner.store.update(id, &mut |j| {
            applied = j.dismiss(now, self.inner.limits.ttl).is_ok();
        })?
        else {
            return Ok(None);
        };
        let live = self.inner.live().get(id).cloned();
        match live {
            Some(control) => control.cancel(),
            // `end` removes the job from `live` before it looks for a tombstone, so one of the
            // two always sees the other's change.
            None => {
                self.inner.store.remove(id)?;
            }
        }
        Ok(applied.then_some(record))
    }

    /// Jobs clients can see, newest first: a page and how many matched in all.
    pub fn list(
        &self,
        filter: &JobFilter,
        offset: usize,
        limit: usize,
    ) -> Stored<(Vec<JobRecord>, usize)> {
        let mut visible = filter.clone();
        if visible.states.is_empty() {
            visible.states = JobState::ALL
                .into_iter()
                .filter(|s| *s != JobState::Dismissed)
                .collect();
        } else {
            visible.states.retain(|s| *s != JobState::Dismissed);
            if visible.states.is_empty() {
                return Ok((Vec::new(), 0));
            }
        }
        self.inner.store.list(&visible, offset, limit)
    }

    /// Records held per state.
    pub fn counts(&self) -> Stored<JobCounts> {
        self.inner.store.counts()
    }

    /// Forgets records whose time to live has passed; returns how many.
    pub fn purge_expired(&self) -> Stored<usize> {
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
            let mut ended = false;
            let written = self.inner.store.update(&id, &mut |j| {
                ended = j.fail(failure.clone(), now, self.inner.limits.ttl).is_ok();
            });
            match written {
                Ok(_) => failed += usize::from(ended),
                Err(e) => tracing::warn!(job = %id, error = %e, "cannot fail a job at shutdown"),
            }
        }
        failed
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::jobs::{Outcome, SwitchedStore};
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
            let j = jobs.record(id).unwrap().unwrap();
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
        assert_eq!(jobs.counts().unwrap().total(), 1);
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
        assert!(jobs.dismiss(done.id()).unwrap().is_some());
        assert!(
            jobs.record(done.id()).unwrap().is_none(),
            "a dismissed finished job is kept"
        );
        assert!(
            jobs.dismiss(done.id()).unwrap().is_none(),
            "dismissed twice"
        );
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
        assert!(jobs.dismiss(running.id()).unwrap().is_some());
        let tombstone = jobs.record(running.id()).unwrap();
        assert!(
            tombstone.is_none_or(|j| j.state() == JobState::Dismissed && j.cancel_requested()),
            "the running job's record is not a tombstone"
        );
        for _ in 0..500 {
            if jobs.record(running.id()).unwrap().is_none() {
                break;
            }
            tokio::time::sleep(Duration::from_millis(10)).await;
        }
        assert!(
            jobs.record(running.id()).unwrap().is_none(),
            "the tombstone outlived its worker"
        );
        assert_eq!(jobs.counts().unwrap().total(), 0);
        assert_eq!(jobs.held_bytes(), 0);
    }

    fn unplugged_jobs() -> (Arc<SwitchedStore>, Jobs) {
        let store = Arc::new(SwitchedStore::new());
        let jobs = Jobs::new(
            crate::jobs::Store::of(store.clone()),
            Pool::new(1, 4).unwrap(),
            Arc::new(Named),
            JobLimits::ttl(Duration::from_secs(60)),
        );
        (store, jobs)
    }

    /// The record as the store holds it, read past the switch.
    fn held(store: &SwitchedStore, id: &str) -> JobRecord {
        store.behind().get(id).unwrap().unwrap()
    }

    #[tokio::test]
    async fn a_store_down_refuses_submissions_and_keeps_nothing() {
        let (store, jobs) = unplugged_jobs();
        store.set_off(true);
        let quick: Work = Box::new(|_: &Control| Ok(Results::json(Bytes::from_static(b"{}"))));
        let refused = jobs.submit("p", None, quick).unwrap_err();
        assert_eq!(
            refused,
            SubmitRefused::StoreDown(StoreDown("switched off".into()))
        );
        assert!(jobs.inner.live().is_empty());
        assert_eq!(store.behind().counts().unwrap().total(), 0);
        assert!(jobs.status("any").is_err() && jobs.list(&JobFilter::default(), 0, 10).is_err());
    }

    #[tokio::test]
    async fn an_ending_written_while_the_store_is_down_lands_when_it_is_back() {
        let (store, jobs) = unplugged_jobs();
        let (go_tx, go_rx) = std::sync::mpsc::channel::<()>();
        let (ran_tx, ran_rx) = std::sync::mpsc::channel::<()>();
        let work: Work = Box::new(move |_: &Control| {
            let _ = ran_tx.send(());
            go_rx.recv_timeout(Duration::from_secs(10)).ok();
            Ok(Results::json(Bytes::from_static(b"{\"kept\":true}")))
        });
        let job = jobs.submit("p", None, work).unwrap();
        ran_rx.recv_timeout(Duration::from_secs(10)).unwrap();
        store.set_off(true);
        go_tx.send(()).unwrap();
        // The work has ended, the store refuses the ending: the record still says running.
        tokio::time::sleep(Duration::from_millis(400)).await;
        assert_eq!(held(&store, job.id()).state(), JobState::Running);
        store.set_off(false);
        let done = finished(&jobs, job.id()).await;
        assert_eq!(done.state(), JobState::Successful);
        match done.outcome() {
            Some(Outcome::Results(r)) => assert_eq!(&r.body[..], b"{\"kept\":true}"),
            other => panic!("no results: {other:?}"),
        }
    }

    #[tokio::test]
    async fn a_job_waits_for_the_store_to_start_it() {
        let (store, jobs) = unplugged_jobs();
        // Holds the one compute thread so the next job stays queued.
        let (go_tx, go_rx) = std::sync::mpsc::channel::<()>();
        let hold: Work = Box::new(move |_: &Control| {
            go_rx.recv_timeout(Duration::from_secs(10)).ok();
            Ok(Results::json(Bytes::from_static(b"{}")))
        });
        let first = jobs.submit("p", None, hold).unwrap();
        let quick: Work = Box::new(|_: &Control| Ok(Results::json(Bytes::from_static(b"{}"))));
        let queued = jobs.submit("p", None, quick).unwrap();
        store.set_off(true);
        go_tx.send(()).unwrap();
        tokio::time::sleep(Duration::from_millis(400)).await;
        assert_eq!(held(&store, queued.id()).state(), JobState::Accepted);
        store.set_off(false);
        for id in [first.id(), queued.id()] {
            assert_eq!(finished(&jobs, id).await.state(), JobState::Successful);
        }
    }
}

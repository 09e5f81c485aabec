//! The runner: one rayon pool shared by every request, behind a bounded admission queue.
//!
//! Async handlers never compute: they `submit` a closure and await a oneshot. A submission takes
//! one of `capacity` permits (queued or running); when none is left the caller gets `QueueFull`
//! at once and answers 503. A closure whose `Control` was cancelled before it started is not
//! run at all. A panic inside a closure is caught here, logged with its cause, and reported as
//! `Finished::Panicked`; it never reaches the pool or the runtime.

use std::panic::{catch_unwind, AssertUnwindSafe};
use std::sync::atomic::{AtomicU64, AtomicUsize, Ordering};
use std::sync::Arc;
use std::time::Instant;

use tokio::sync::{oneshot, Semaphore};

use crate::engine::Control;

/// How a submitted closure ended.
#[derive(Debug)]
pub enum Finished<T> {
    Done(T),
    /// Cancelled before it started; the closure never ran.
    Cancelled,
    /// The closure panicked; the message is the panic's payload (already logged).
    Panicked(String),
}

/// The queue is full: every permit is held by a queued or running computation.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub struct QueueFull {
    pub capacity: usize,
}

/// Counters of the pool, for readiness and metrics.
#[derive(Clone, Copy, Debug, Default, PartialEq)]
pub struct PoolStats {
    pub threads: usize,
    pub capacity: usize,
    pub queued: usize,
    pub running: usize,
    pub compute_seconds: f64,
    pub panics: u64,
    pub skipped_cancelled: u64,
    pub rejected: u64,
}

impl PoolStats {
    /// The figures of two pools together.
    pub fn plus(&self, other: &PoolStats) -> PoolStats {
        PoolStats {
            threads: self.threads + other.threads,
            capacity: self.capacity + other.capacity,
            queued: self.queued + other.queued,
            running: self.running + other.running,
            compute_seconds: self.compute_seconds + other.compute_seconds,
            panics: self.panics + other.panics,
            skipped_cancelled: self.skipped_cancelled + other.skipped_cancelled,
            rejected: self.rejected + other.rejected,
        }
    }
}

pub struct Pool {
    pool: rayon::ThreadPool,
    permits: Arc<Semaphore>,
    capacity: usize,
    counters: Arc<Counters>,
}

#[derive(Default)]
struct Counters {
    queued: AtomicUsize,
    running: AtomicUsize,
    compute_nanos: AtomicU64,
    panics: AtomicU64,
    skipped: AtomicU64,
    rejected: AtomicU64,
}

impl Pool {
    /// A pool of `threads` workers (0 = one per core) admitting at most `capacity` computations
    /// at a time, queued or running.
    pub fn new(threads: usize, capacity: usize) -> Result<Pool, String> {
        let pool = rayon::ThreadPoolBuilder::new()
            .num_threads(threads)
            .thread_name(|i| format!("zonetally-compute-{i}"))
            .build()
            .map_err(|e| format!("cannot start the compute pool: {e}"))?;
        let capacity = capacity.max(1);
        Ok(Pool {
            pool,
            permits: Arc::new(Semaphore::new(capacity)),
            capacity,
            counters: Arc::default(),
        })
    }

    /// The underlying rayon pool (tests use it to occupy the workers).
    pub fn rayon(&self) -> &rayon::ThreadPool {
        &self.pool
    }

    pub fn stats(&self) -> PoolStats {
        let c = &self.counters;
        PoolStats {
            threads: self.pool.current_num_threads(),
            capacity: self.capacity,
            queued: c.queued.load(Ordering::Relaxed),
            running: c.running.load(Ordering::Relaxed),
            compute_seconds: c.compute_nanos.load(Ordering::Relaxed) as f64 * 1e-9,
            panics: c.panics.load(Ordering::Relaxed),
            skipped_cancelled: c.skipped.load(Ordering::Relaxed),
            rejected: c.rejected.load(Ordering::Relaxed),
        }
    }

    /// Queues `work` on the pool. The receiver yields how it ended; dropping the receiver does
    /// not stop the work (cancel its `Control` for that).
    pub fn submit<T, F>(
        &self,
        control: Arc<Control>,
        work: F,
    ) -> Result<oneshot::Receiver<Finished<T>>, QueueFull>
    where
        T: Send + 'static,
        F: FnOnce(&Control) -> T + Send + 'static,
    {
        let permit = match self.permits.clone().try_acquire_owned() {
            Ok(p) => p,
            Err(_) => {
                self.counters.rejected.fetch_add(1, Ordering::Relaxed);
                return Err(QueueFull {
                    capacity: self.capacity,
                });
            }
        };
        let (tx, rx) = oneshot::channel();
        let counters = self.counters.clone();
        counters.queued.fetch_add(1, Ordering::Relaxed);
        let span = tracing::Span::current();
        self.pool.spawn(move || {
            let _permit = permit;
            let _entered = span.enter();
            counters.queued.fetch_sub(1, Ordering::Relaxed);
            if control.is_cancelled() {
                counters.skipped.fetch_add(1, Ordering::Relaxed);
                let _ = tx.send(Finished::Cancelled);
                return;
            }
            counters.running.fetch_add(1, Ordering::Relaxed);
            let start = Instant::now();
            let result = catch_unwind(AssertUnwindSafe(|| work(&control)));
            counters
                .compute_nanos
                .fetch_add(start.elapsed().as_nanos() as u64, Ordering::Relaxed);
            counters.running.fetch_sub(1, Ordering::Relaxed);
            let finished = match result {
                Ok(v) => Finished::Done(v),
                Err(payload) => {
                    counters.panics.fetch_add(1, Ordering::Relaxed);
                    let cause = payload
                        .downcast_ref::<&str>()
                        .map(|s| s.to_string())
                        .or_else(|| payload.downcast_ref::<String>().cloned())
                        .unwrap_or_else(|| "a panic without a message".into());
                    tracing::error!(%cause, "a computation panicked");
                    Finished::Panicked(cause)
                }
            };
            let _ = tx.send(finished);
        });
        Ok(rx)
    }
}

/// Cancels a computation when dropped while armed: a sync handler holds one, so a client that
/// disconnects (and so drops the handler's future) stops its computation.
pub struct CancelOnDrop {
    control: Arc<Control>,
    armed: bool,
}

impl CancelOnDrop {
    pub fn new(control: Arc<Control>) -> CancelOnDrop {
        CancelOnDrop {
            control,
            armed: true,
        }
    }
    pub fn disarm(&mut self) {
        self.armed = false;
    }
}

impl Drop for CancelOnDrop {
    fn drop(&mut self) {
        if self.armed {
            self.control.cancel();
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[tokio::test]
    async fn a_panic_is_caught_and_reported() {
        let pool = Pool::new(1, 4).unwrap();
        let rx = pool
            .submit(Arc::new(Control::new()), |_| -> u32 {
                panic!("kernel fault at node 7")
            })
            .unwrap();
        match rx.await.unwrap() {
            Finished::Panicked(cause) => assert!(cause.contains("node 7"), "{cause}"),
            other => panic!("expected a caught panic, got {other:?}"),
        }
        let ok = pool.submit(Arc::new(Control::new()), |_| 41 + 1).unwrap();
        assert!(
            matches!(ok.await.unwrap(), Finished::Done(42)),
            "the pool must survive a panic"
        );
        assert_eq!(pool.stats().panics, 1);
        assert_eq!(pool.stats().running, 0);
    }

    #[tokio::test]
    async fn cancelled_work_is_not_run_and_drop_guards_cancel() {
        let pool = Pool::new(1, 4).unwrap();
        let control = Arc::new(Control::new());
        {
            let _guard = CancelOnDrop::new(control.clone());
        }
        assert!(control.is_cancelled());
        let rx = pool
            .submit(control, |_| unreachable!("cancelled work must not run"))
            .unwrap();
        assert!(matches!(rx.await.unwrap(), Finished::<()>::Cancelled));
        let kept = Arc::new(Control::new());
        let mut guard = CancelOnDrop::new(kept.clone());
        guard.disarm();
        drop(guard);
        assert!(!kept.is_cancelled());
    }

    #[test]
    fn submissions_beyond_capacity_are_refused() {
        let pool = Pool::new(1, 1).unwrap();
        let (tx, rx) = std::sync::mpsc::channel::<()>();
        let first = pool.submit(Arc::new(Control::new()), move |_| {
            let _ = rx.recv();
        });
        assert!(first.is_ok());
        assert_eq!(
            pool.submit(Arc::new(Control::new()), |_| ()).unwrap_err(),
            QueueFull { capacity: 1 }
        );
        assert_eq!(pool.stats().rejected, 1);
        drop(tx);
    }
}

//! Cancellation and progress shared between a running computation and its owner.
//!
//! Plain atomics: the kernels check `is_cancelled` between tree nodes and add the estimated cost
//! of each finished node to `done`, so a caller on another thread can report a fraction.

use std::sync::atomic::{AtomicBool, AtomicU64, Ordering};

use super::error::EngineError;

#[derive(Debug, Default)]
pub struct Control {
    cancelled: AtomicBool,
    planned: AtomicU64,
    done: AtomicU64,
}

impl Control {
    pub fn new() -> Control {
        Control::default()
    }
    /// Asks the computation to stop at its next check.
    pub fn cancel(&self) {
        self.cancelled.store(true, Ordering::Relaxed);
    }
    pub fn is_cancelled(&self) -> bool {
        self.cancelled.load(Ordering::Relaxed)
    }
    /// Fails with `Cancelled` when cancellation was asked for.
    pub fn check(&self) -> Result<(), EngineError> {
        if self.is_cancelled() {
            Err(EngineError::Cancelled)
        } else {
            Ok(())
        }
    }
    /// Adds planned work (arbitrary units, the planner's cost).
    pub fn plan_work(&self, units: u64) {
        self.planned.fetch_add(units.max(1), Ordering::Relaxed);
    }
    /// Records finished work.
    pub fn advance(&self, units: u64) {
        self.done.fetch_add(units, Ordering::Relaxed);
    }
    /// Fraction of the planned work done so far, in [0, 1].
    pub fn progress(&self) -> f64 {
        let planned = self.planned.load(Ordering::Relaxed);
        if planned == 0 {
            return 0.0;
        }
        (self.done.load(Ordering::Relaxed) as f64 / planned as f64).min(1.0)
    }
}

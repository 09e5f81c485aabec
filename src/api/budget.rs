//! The process's memory budget in bytes, and the bound on concurrent decodes.
//!
//! Everything that holds request data for a while charges the budget before holding it: a body
//! while it is read (its `Content-Length`, or the largest body allowed when it has none), and a
//! decoded request while it waits in the queue and runs (`Prepared::held_bytes`). A charge that
//! does not fit is refused with 503 and `Retry-After`, so a flood of large requests is turned
//! away instead of growing the process until the kernel kills it. Decoding itself runs at most
//! `--max-decodes` at a time, each bounded by the cell, zone and vertex limits, so the peak
//! stays below the budget plus `--max-decodes` of the largest decodes. Results kept for polling
//! are bounded apart (`--max-job-bytes`), and so are the caches (their own byte limits).

use std::sync::atomic::{AtomicU64, Ordering};
use std::sync::Arc;

/// Bytes that may be charged at once.
#[derive(Debug)]
pub struct MemoryBudget {
    limit: u64,
    used: AtomicU64,
}

/// A charge against the budget, given back when dropped.
#[derive(Debug)]
pub struct Charge {
    budget: Arc<MemoryBudget>,
    bytes: u64,
}

impl Drop for Charge {
    fn drop(&mut self) {
        self.budget.used.fetch_sub(self.bytes, Ordering::AcqRel);
    }
}

/// A refused charge: what was asked and what was free.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub struct OverBudget {
    pub asked: u64,
    pub used: u64,
    pub limit: u64,
}

impl MemoryBudget {
    pub fn new(limit: u64) -> Arc<MemoryBudget> {
        Arc::new(MemoryBudget {
            limit,
            used: AtomicU64::new(0),
        })
    }

    /// Charges `bytes` if they fit under the limit.
    pub fn charge(self: &Arc<Self>, bytes: u64) -> Result<Charge, OverBudget> {
        let mut used = self.used.load(Ordering::Acquire);
        loop {
            let after = used.saturating_add(bytes);
            if after > self.limit {
                return Err(OverBudget {
                    asked: bytes,
                    used,
                    limit: self.limit,
                });
            }
            match self
                .used
                .compare_exchange_weak(used, after, Ordering::AcqRel, Ordering::Acquire)
            {
                Ok(_) => {
                    return Ok(Charge {
                        budget: self.clone(),
                        bytes,
                    })
                }
                Err(now) => used = now,
            }
        }
    }

    /// Bytes charged now.
    pub fn used(&self) -> u64 {
        self.used.load(Ordering::Acquire)
    }

    pub fn limit(&self) -> u64 {
        self.limit
    }
}

/// The default budget: half the container's memory limit (cgroup v2 `memory.max`, or v1
/// `memory.limit_in_bytes`) when there is one, else half the machine's memory, else 4 GiB.
pub fn default_budget() -> u64 {
    let read = |path: &str| std::fs::read_to_string(path).ok();
    let cgroup = read("/sys/fs/cgroup/memory.max")
        .or_else(|| read("/sys/fs/cgroup/memory/memory.limit_in_bytes"))
        .and_then(|s| s.trim().parse::<u64>().ok())
        // cgroup v1 reports "no limit" as a huge number.
        .filter(|&b| b < (1 << 60));
    let machine = || {
        read("/proc/meminfo").and_then(|s| {
            let line = s.lines().find(|l| l.starts_with("MemTotal:"))?.to_string();
            let kib: u64 = line.split_whitespace().nth(1)?.parse().ok()?;
            Some(kib * 1024)
        })
    };
    cgroup.or_else(machine).map_or(4 << 30, |b| b / 2)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn charges_fit_under_the_limit_and_are_given_back_on_drop() {
        let budget = MemoryBudget::new(100);
        let a = budget.charge(60).unwrap();
        let refused = budget.charge(41).unwrap_err();
        assert_eq!(
            refused,
            OverBudget {
                asked: 41,
                used: 60,
                limit: 100
            }
        );
        let b = budget.charge(40).unwrap();
        assert_eq!(budget.used(), 100);
        drop(a);
        assert_eq!(budget.used(), 40);
        drop(b);
        assert_eq!(budget.used(), 0);
    }

    #[test]
    fn the_default_is_a_positive_share_of_memory() {
        let b = default_budget();
        assert!(b > 0 && b < (1 << 60), "{b}");
    }
}

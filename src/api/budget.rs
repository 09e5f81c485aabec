//! The process's memory budget in bytes, and the bound on concurrent decodes.
//!
//! Everything that holds request data for a while charges the budget before holding it: a body
//! while it is read and decoded (its `Content-Length`, or the largest body allowed when it has
//! none; for JSON also what parsing it may hold, `body::JSON_DECODE_FACTOR` per byte), and a
//! decoded request while it waits in the queue and runs (`Prepared::held_bytes`). A charge that
//! does not fit is refused with 503 and `Retry-After`, so a flood of large requests is turned
//! away instead of growing the process until the kernel kills it. Decoding itself runs at most
//! `--max-decodes` at a time; what a decode expands beyond its body (rectangles into cell lists,
//! GeoTIFF pixels) is charged when it ends, so the peak stays below the budget plus
//! `--max-decodes` of those expansions, each bounded by the cell, zone and vertex limits.
//!
//! The budget is the process's whole allowance for its work, shared out once at start-up
//! (`MemoryPlan`): the raster cache, the normaliser cache and the results kept for polling each
//! get a fixed part, bounded by their own byte limits, and request data may be charged up to
//! what is left. So the parts cannot together outgrow the budget, whatever the traffic.

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

/// The memory budget shared out: each part is a byte limit of its own, and the parts sum to at
/// most `total`.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub struct MemoryPlan {
    pub total: u64,
    pub raster_cache: u64,
    pub normaliser_cache: u64,
    pub job_results: u64,
    /// What request data may be charged: the rest.
    pub requests: u64,
}

impl MemoryPlan {
    /// Shares out `total`: the parts given are taken as they are, the others by default a
    /// quarter (raster cache), a sixteenth (normalisers) and a quarter (results). Request data
    /// must keep at least an eighth, else the plan is refused with the flags to change.
    pub fn new(
        total: u64,
        raster_cache: Option<u64>,
        normaliser_cache: Option<u64>,
        job_results: Option<u64>,
    ) -> Result<MemoryPlan, String> {
        let raster_cache = raster_cache.unwrap_or(total / 4);
        let normaliser_cache = normaliser_cache.unwrap_or(total / 16);
        let job_results = job_results.unwrap_or(total / 4);
        let parts = raster_cache
            .saturating_add(normaliser_cache)
            .saturating_add(job_results);
        let requests = total.saturating_sub(parts);
        if requests < total / 8 {
            return Err(format!(
                "--raster-cache-bytes {raster_cache}, --normaliser-cache-bytes {normaliser_cache} and --max-job-bytes {job_results} take {parts} of the memory budget's {total} bytes, leaving {requests} for requests (at least {} needed): lower them or raise --memory-budget",
                total / 8
            ));
        }
        Ok(MemoryPlan {
            total,
            raster_cache,
            normaliser_cache,
            job_results,
            requests,
        })
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
    fn the_plan_shares_out_the_budget_and_refuses_parts_that_do_not_fit() {
        let plan = MemoryPlan::new(1600, None, None, None).unwrap();
        assert_eq!(
            (
                plan.raster_cache,
                plan.normaliser_cache,
                plan.job_results,
                plan.requests
            ),
            (400, 100, 400, 700)
        );
        let given = MemoryPlan::new(1600, Some(100), Some(0), Some(500)).unwrap();
        assert_eq!(given.requests, 1000);
        let err = MemoryPlan::new(1600, Some(1000), None, Some(500)).unwrap_err();
        assert!(
            err.contains("--raster-cache-bytes 1000") && err.contains("--memory-budget"),
            "{err}"
        );
        // Parts beyond the whole budget do not wrap around.
        assert!(MemoryPlan::new(1600, Some(u64::MAX), None, None).is_err());
    }

    #[test]
    fn the_default_is_a_positive_share_of_memory() {
        let b = default_budget();
        assert!(b > 0 && b < (1 << 60), "{b}");
    }
}

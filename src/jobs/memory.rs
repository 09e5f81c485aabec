//! The in-memory job store: the default, lost on restart.
//!
//! One map under one lock, plus an index of ids newest first, so a listing walks the index in
//! order (no sort, no copy of what it skips) and a page costs what it holds; counts per state
//! and the bytes held are kept up to date on every change, so metrics and admission never walk
//! the map.

use std::cmp::Reverse;
use std::collections::{BTreeSet, HashMap};
use std::sync::Mutex;
use std::time::SystemTime;

use super::lifecycle::JobRecord;
use super::{JobCounts, JobFilter, JobStore, Paging, Stored};

#[derive(Default)]
pub struct MemoryStore {
    inner: Mutex<Inner>,
}

/// Newest first, ties by id.
type Order = (Reverse<SystemTime>, String);

#[derive(Default)]
struct Inner {
    jobs: HashMap<String, JobRecord>,
    order: BTreeSet<Order>,
    counts: JobCounts,
    bytes: u64,
}

impl Inner {
    fn forget(&mut self, id: &str) -> Option<JobRecord> {
        let job = self.jobs.remove(id)?;
        self.counts.remove(job.state());
        self.order.remove(&(Reverse(job.created()), id.to_string()));
        self.bytes = self.bytes.saturating_sub(job.heap_bytes() as u64);
        Some(job)
    }
}

impl MemoryStore {
    pub fn new() -> MemoryStore {
        MemoryStore::default()
    }

    fn lock(&self) -> std::sync::MutexGuard<'_, Inner> {
        // A poisoned lock only means a panic elsewhere while holding it; the map itself is
        // still consistent (every change is a single insert, remove or record update).
        self.inner.lock().unwrap_or_else(|p| p.into_inner())
    }
}

// The in-memory store never fails: every operation is `Ok`.
impl JobStore for MemoryStore {
    fn insert(&self, job: JobRecord) -> Stored<()> {
        let mut inner = self.lock();
        inner.forget(job.id());
        inner.counts.add(job.state());
        inner.bytes += job.heap_bytes() as u64;
        inner
            .order
            .insert((Reverse(job.created()), job.id().to_string()));
        inner.jobs.insert(job.id().to_string(), job);
        Ok(())
    }

    fn get(&self, id: &str) -> Stored<Option<JobRecord>> {
        let mut inner = self.lock();
        if inner
            .jobs
            .get(id)
            .is_some_and(|j| j.is_expired(SystemTime::now()))
        {
            inner.forget(id);
            return Ok(None);
        }
        Ok(inner.jobs.get(id).cloned())
    }

    fn update(
        &self,
        id: &str,
        change: &mut dyn FnMut(&mut JobRecord),
    ) -> Stored<Option<JobRecord>> {
        let mut inner = self.lock();
        let Some(job) = inner.jobs.get_mut(id) else {
            return Ok(None);
        };
        let (before, size) = (job.state(), job.heap_bytes() as u64);
        change(job);
        let (after, grown, copy) = (job.state(), job.heap_bytes() as u64, job.clone());
        inner.counts.remove(before);
        inner.counts.add(after);
        inner.bytes = inner.bytes.saturating_sub(size) + grown;
        Ok(Some(copy))
    }

    fn remove(&self, id: &str) -> Stored<Option<JobRecord>> {
        Ok(self.lock().forget(id))
    }

    fn list(
        &self,
        filter: &JobFilter,
        offset: usize,
        limit: usize,
    ) -> Stored<(Vec<JobRecord>, usize)> {
        let inner = self.lock();
        let mut paging = Paging::new(filter, offset, limit);
        for (_, id) in &inner.order {
            if let Some(job) = inner.jobs.get(id) {
                paging.offer(job);
            }
        }
        Ok(paging.done())
    }

    fn purge_expired(&self, now: SystemTime) -> Stored<usize> {
        let mut inner = self.lock();
        let gone: Vec<String> = inner
            .jobs
            .values()
            .filter(|j| j.is_expired(now))
            .map(|j| j.id().to_string())
            .collect();
        for id in &gone {
            inner.forget(id);
        }
        Ok(gone.len())
    }

    fn counts(&self) -> Stored<JobCounts> {
        Ok(self.lock().counts)
    }

    fn held_bytes(&self) -> u64 {
        self.lock().bytes
    }

    fn ready(&self) -> bool {
        true
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::jobs::JobState;
    use std::time::Duration;

    #[test]
    fn counts_follow_every_change() {
        let store = MemoryStore::new();
        let t = SystemTime::now();
        for i in 0..3 {
            store
                .insert(JobRecord::accept(format!("j{i}"), "p".into(), None, t))
                .unwrap();
        }
        store.update("j0", &mut |j| j.start(t).unwrap()).unwrap();
        store
            .update("j1", &mut |j| j.dismiss(t, Duration::ZERO).unwrap())
            .unwrap();
        let c = store.counts().unwrap();
        assert_eq!((c.of(JobState::Accepted), c.of(JobState::Running)), (1, 1));
        assert_eq!(c.of(JobState::Dismissed), 1);
        assert_eq!(store.purge_expired(t + Duration::from_secs(1)), Ok(1));
        assert_eq!(store.counts().unwrap().of(JobState::Dismissed), 0);
        assert_eq!(store.counts().unwrap().total(), 2);
    }

    #[test]
    fn listing_pages_newest_first_and_bytes_follow_the_records() {
        let store = MemoryStore::new();
        let t = SystemTime::UNIX_EPOCH + Duration::from_secs(1_000);
        for i in 0..5u64 {
            let at = t + Duration::from_secs(i);
            store
                .insert(JobRecord::accept(format!("j{i}"), "p".into(), None, at))
                .unwrap();
        }
        let held = store.held_bytes();
        let each = JobRecord::accept("j0".into(), "p".into(), None, t).heap_bytes() as u64;
        assert_eq!(held, 5 * each);
        let (page, matched) = store.list(&JobFilter::default(), 1, 2).unwrap();
        let ids: Vec<&str> = page.iter().map(|j| j.id()).collect();
        assert_eq!((ids, matched), (vec!["j3", "j2"], 5));
        store.update("j4", &mut |j| j.start(t).unwrap()).unwrap();
        let ran = JobFilter {
            states: vec![JobState::Running],
            ..JobFilter::default()
        };
        let (page, matched) = store.list(&ran, 0, 10).unwrap();
        assert_eq!((page[0].id(), matched), ("j4", 1));
        store.remove("j4").unwrap();
        assert_eq!(store.held_bytes(), 4 * each);
        assert_eq!(store.list(&JobFilter::default(), 0, 10).unwrap().1, 4);
    }
}

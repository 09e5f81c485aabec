//! The in-memory job store: the default, lost on restart.
//!
//! One map under one lock; counts per state are kept up to date on every change, so metrics
//! never walk the map.

use std::collections::HashMap;
use std::sync::Mutex;
use std::time::SystemTime;

use super::lifecycle::JobRecord;
use super::{JobCounts, JobFilter, JobStore};

#[derive(Default)]
pub struct MemoryStore {
    inner: Mutex<Inner>,
}

#[derive(Default)]
struct Inner {
    jobs: HashMap<String, JobRecord>,
    counts: JobCounts,
}

impl Inner {
    fn forget(&mut self, id: &str) -> Option<JobRecord> {
        let job = self.jobs.remove(id)?;
        self.counts.remove(job.state());
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

impl JobStore for MemoryStore {
    fn insert(&self, job: JobRecord) {
        let mut inner = self.lock();
        inner.counts.add(job.state());
        if let Some(old) = inner.jobs.insert(job.id().to_string(), job) {
            inner.counts.remove(old.state());
        }
    }

    fn get(&self, id: &str) -> Option<JobRecord> {
        let mut inner = self.lock();
        if inner
            .jobs
            .get(id)
            .is_some_and(|j| j.is_expired(SystemTime::now()))
        {
            inner.forget(id);
            return None;
        }
        inner.jobs.get(id).cloned()
    }

    fn update(&self, id: &str, change: &mut dyn FnMut(&mut JobRecord)) -> Option<JobRecord> {
        let mut inner = self.lock();
        let job = inner.jobs.get_mut(id)?;
        let before = job.state();
        change(job);
        let (after, copy) = (job.state(), job.clone());
        inner.counts.remove(before);
        inner.counts.add(after);
        Some(copy)
    }

    fn remove(&self, id: &str) -> Option<JobRecord> {
        self.lock().forget(id)
    }

    fn list(&self, filter: &JobFilter, offset: usize, limit: usize) -> (Vec<JobRecord>, usize) {
        let now = SystemTime::now();
        let inner = self.lock();
        let mut matched: Vec<&JobRecord> = inner
            .jobs
            .values()
            .filter(|j| !j.is_expired(now) && filter.admits(j))
            .collect();
        matched.sort_by(|a, b| {
            b.created()
                .cmp(&a.created())
                .then_with(|| a.id().cmp(b.id()))
        });
        let total = matched.len();
        let page = matched
            .into_iter()
            .skip(offset)
            .take(limit)
            .cloned()
            .collect();
        (page, total)
    }

    fn purge_expired(&self, now: SystemTime) -> usize {
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
        gone.len()
    }

    fn counts(&self) -> JobCounts {
        self.lock().counts
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
            store.insert(JobRecord::accept(format!("j{i}"), "p".into(), None, t));
        }
        store.update("j0", &mut |j| j.start(t).unwrap());
        store.update("j1", &mut |j| j.dismiss(t, Duration::ZERO).unwrap());
        let c = store.counts();
        assert_eq!((c.of(JobState::Accepted), c.of(JobState::Running)), (1, 1));
        assert_eq!(c.of(JobState::Dismissed), 1);
        assert_eq!(store.purge_expired(t + Duration::from_secs(1)), 1);
        assert_eq!(store.counts().of(JobState::Dismissed), 0);
        assert_eq!(store.counts().total(), 2);
    }
}

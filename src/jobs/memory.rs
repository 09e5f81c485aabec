//! The in-memory job store: the default, lost on restart.

use std::collections::HashMap;
use std::sync::Mutex;
use std::time::{Instant, SystemTime};

use super::{Job, JobFilter, JobState, JobStore, Outcome};

#[derive(Default)]
pub struct MemoryStore {
    jobs: Mutex<HashMap<String, Job>>,
}

impl MemoryStore {
    pub fn new() -> MemoryStore {
        MemoryStore::default()
    }

    fn lock(&self) -> std::sync::MutexGuard<'_, HashMap<String, Job>> {
        // A poisoned lock only means a panic elsewhere while holding it; the map itself is
        // still consistent (every change is a single insert/remove/field write).
        self.jobs.lock().unwrap_or_else(|p| p.into_inner())
    }
}

fn expired(job: &Job, now: Instant) -> bool {
    job.expires.is_some_and(|e| e <= now)
}

impl JobStore for MemoryStore {
    fn insert(&self, job: Job) {
        self.lock().insert(job.id.clone(), job);
    }

    fn get(&self, id: &str) -> Option<Job> {
        let mut jobs = self.lock();
        if jobs.get(id).is_some_and(|j| expired(j, Instant::now())) {
            jobs.remove(id);
            return None;
        }
        jobs.get(id).cloned()
    }

    fn update(&self, id: &str, change: &mut dyn FnMut(&mut Job)) -> bool {
        match self.lock().get_mut(id) {
            Some(job) => {
                change(job);
                job.updated = SystemTime::now();
                true
            }
            None => false,
        }
    }

    fn remove(&self, id: &str) -> Option<Job> {
        self.lock().remove(id)
    }

    fn list(&self, filter: &JobFilter, offset: usize, limit: usize) -> (Vec<Job>, usize) {
        let now = Instant::now();
        let mut jobs = self.lock();
        jobs.retain(|_, j| !expired(j, now));
        let mut matched: Vec<&Job> = jobs.values().filter(|j| filter.admits(j)).collect();
        matched.sort_by(|a, b| b.created.cmp(&a.created).then_with(|| a.id.cmp(&b.id)));
        let total = matched.len();
        (
            matched
                .into_iter()
                .skip(offset)
                .take(limit)
                .cloned()
                .collect(),
            total,
        )
    }

    fn purge_expired(&self, now: Instant) -> usize {
        let mut jobs = self.lock();
        let before = jobs.len();
        jobs.retain(|_, j| !expired(j, now));
        before - jobs.len()
    }

    fn fail_unfinished(&self, message: &str, failure: &dyn Fn(&Job) -> Outcome) -> usize {
        let mut n = 0;
        let now = SystemTime::now();
        for job in self.lock().values_mut() {
            if job.state.is_finished() {
                continue;
            }
            job.control.cancel();
            job.state = JobState::Failed;
            job.message = message.to_string();
            job.finished = Some(now);
            job.updated = now;
            job.outcome = Some(failure(job));
            n += 1;
        }
        n
    }

    fn len(&self) -> usize {
        self.lock().len()
    }

    fn ready(&self) -> bool {
        true
    }
}

//! A store behind a switch, for testing what the service does when its job store is out of
//! reach: the in-memory store while on, `StoreDown` from every call while off. Only tests use
//! it; the binary never does.

use std::sync::atomic::{AtomicBool, Ordering};
use std::time::SystemTime;

use super::{JobCounts, JobFilter, JobRecord, JobStore, MemoryStore, StoreDown, Stored};

#[derive(Default)]
pub struct SwitchedStore {
    store: MemoryStore,
    off: AtomicBool,
}

impl SwitchedStore {
    pub fn new() -> SwitchedStore {
        SwitchedStore::default()
    }
    /// Switches every call off (`StoreDown`) or back on.
    pub fn set_off(&self, off: bool) {
        self.off.store(off, Ordering::SeqCst);
    }
    /// The store behind the switch, reachable whatever its position.
    pub fn behind(&self) -> &MemoryStore {
        &self.store
    }
    fn on(&self) -> Stored<()> {
        match self.off.load(Ordering::SeqCst) {
            true => Err(StoreDown("switched off".into())),
            false => Ok(()),
        }
    }
}

impl JobStore for SwitchedStore {
    fn insert(&self, job: JobRecord) -> Stored<()> {
        self.on()?;
        self.store.insert(job)
    }
    fn get(&self, id: &str) -> Stored<Option<JobRecord>> {
        self.on()?;
        self.store.get(id)
    }
    fn update(
        &self,
        id: &str,
        change: &mut dyn FnMut(&mut JobRecord),
    ) -> Stored<Option<JobRecord>> {
        self.on()?;
        self.store.update(id, change)
    }
    fn remove(&self, id: &str) -> Stored<Option<JobRecord>> {
        self.on()?;
        self.store.remove(id)
    }
    fn list(
        &self,
        filter: &JobFilter,
        offset: usize,
        limit: usize,
    ) -> Stored<(Vec<JobRecord>, usize)> {
        self.on()?;
        self.store.list(filter, offset, limit)
    }
    fn purge_expired(&self, now: SystemTime) -> Stored<usize> {
        self.on()?;
        self.store.purge_expired(now)
    }
    fn counts(&self) -> Stored<JobCounts> {
        self.on()?;
        self.store.counts()
    }
    fn held_bytes(&self) -> u64 {
        self.store.held_bytes()
    }
    fn ready(&self) -> bool {
        self.on().is_ok()
    }
}

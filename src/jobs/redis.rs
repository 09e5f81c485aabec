//! The Redis job store (`--job-store redis://host:port/db`): records, progress, results and the
//! cancellation flag live in Redis, so every replica sharing it answers for every job.
//!
//! Layout, under a prefix (`zonetally` by default):
//! - `P:job:ID`, a hash: the record's fields (`JobRecord::to_fields`), expiring by itself an
//!   hour after the record's time to live as a backstop for a sweep that never comes;
//! - `P:jobs`, a sorted set of ids by creation time (listing walks it newest first);
//! - `P:state:STATE`, a set of ids per state (counts without a walk);
//! - `P:expiring`, a sorted set of finished ids by expiry time (the sweep reads what is due);
//! - `P:bytes`, the bytes the records hold (the `--max-job-bytes` cap).
//!
//! A change is a read, the closure, and a write of the record and its indexes in one
//! MULTI/EXEC under WATCH: a record changed by another replica meanwhile makes the write fail
//! and the change run again on the fresh record. Every call waits at most `CALL_TIMEOUT` for
//! Redis and answers `StoreDown` past it.
//!
//! Not yet: the work itself runs on the replica that accepted the job; a replica that dies
//! leaves its unfinished jobs as they were.

use std::collections::HashMap;
use std::time::{Duration, SystemTime};

use redis::{Commands, Connection, RedisError};

use super::lifecycle::{micros, JobRecord};
use super::{JobCounts, JobFilter, JobState, JobStore, Paging, StoreDown, Stored};

/// How long a call waits for a connection, a reply or a write before it gives up: short, so
/// a handler never stalls on a store that is gone.
const CALL_TIMEOUT: Duration = Duration::from_millis(500);
/// Connections held open at most, shared by handlers and watchers.
const MAX_CONNECTIONS: u32 = 16;
/// How long past its time to live a record's key outlives it in Redis, should no sweep run.
const BACKSTOP: Duration = Duration::from_secs(3600);
/// Ids fetched per round trip while a listing walks the index.
const LIST_BATCH: isize = 256;

pub struct RedisStore {
    pool: r2d2::Pool<redis::Client>,
    prefix: String,
}

#[derive(Debug)]
struct Timeouts;

impl r2d2::CustomizeConnection<Connection, RedisError> for Timeouts {
    fn on_acquire(&self, conn: &mut Connection) -> Result<(), RedisError> {
        conn.set_read_timeout(Some(CALL_TIMEOUT))?;
        conn.set_write_timeout(Some(CALL_TIMEOUT))
    }
}

fn down(e: impl std::fmt::Display) -> StoreDown {
    StoreDown(e.to_string())
}

/// Runs a blocking call; on the multi-threaded runtime the worker's other tasks move to
/// another thread meanwhile, so a slow store does not stall them.
fn blocking<T>(call: impl FnOnce() -> T) -> T {
    match tokio::runtime::Handle::try_current() {
        Ok(h) if h.runtime_flavor() == tokio::runtime::RuntimeFlavor::MultiThread => {
            tokio::task::block_in_place(call)
        }
        _ => call(),
    }
}

impl RedisStore {
    /// A store on the Redis at `url` (`redis://host:port/db`), keys under `prefix`. Does not
    /// connect yet: the service starts while Redis is down and is not ready until it is up.
    pub fn open(url: &str, prefix: &str) -> Result<RedisStore, String> {
        let client = redis::Client::open(url)
            .map_err(|e| format!("--job-store `{url}` is not a Redis address: {e}"))?;
        let pool = r2d2::Pool::builder()
            .max_size(MAX_CONNECTIONS)
            .min_idle(Some(0))
            .connection_timeout(CALL_TIMEOUT)
            .connection_customizer(Box::new(Timeouts))
            .build_unchecked(client);
        Ok(RedisStore {
            pool,
            prefix: prefix.to_string(),
        })
    }

    fn job_key(&self, id: &str) -> String {
        format!("{}:job:{id}", self.prefix)
    }
    fn key(&self, name: &str) -> String {
        format!("{}:{name}", self.prefix)
    }
    fn state_key(&self, state: JobState) -> String {
        format!("{}:state:{}", self.prefix, state.as_str())
    }

    fn with<T>(&self, call: impl FnOnce(&mut Connection) -> redis::RedisResult<T>) -> Stored<T> {
        blocking(|| {
            let mut conn = self.pool.get().map_err(down)?;
            call(&mut conn).map_err(down)
        })
    }

    fn read(&self, conn: &mut Connection, id: &str) -> redis::RedisResult<Option<JobRecord>> {
        let fields: HashMap<String, Vec<u8>> = conn.hgetall(self.job_key(id))?;
        if fields.is_empty() {
            return Ok(None);
        }
        Ok(JobRecord::from_fields(id, &fields))
    }

    /// Adds to `pipe` the writes that replace `before` (absent for a new record) by `after`.
    fn write(&self, pipe: &mut redis::Pipeline, before: Option<&JobRecord>, after: &JobRecord) {
        let key = self.job_key(after.id());
        pipe.del(&key).ignore();
        pipe.hset_multiple(&key, &after.to_fields()).ignore();
        if let Some(b) = before {
            pipe.srem(self.state_key(b.state()), after.id()).ignore();
        }
        pipe.sadd(self.state_key(after.state()), after.id())
            .ignore();
        pipe.zadd(self.key("jobs"), after.id(), micros(after.created()))
            .ignore();
        if let Some(at) = after.expires() {
            pipe.zadd(self.key("expiring"), after.id(), micros(at))
                .ignore();
            let backstop = micros(at + BACKSTOP) / 1000;
            pipe.cmd("PEXPIREAT").arg(&key).arg(backstop).ignore();
        }
        let grown = after.heap_bytes() as i64 - before.map_or(0, |b| b.heap_bytes() as i64);
        pipe.incr(self.key("bytes"), grown).ignore();
    }

    /// Adds to `pipe` the writes that forget `job`.
    fn forget(&self, pipe: &mut redis::Pipeline, job: &JobRecord) {
        pipe.del(self.job_key(job.id())).ignore();
        pipe.srem(self.state_key(job.state()), job.id()).ignore();
        pipe.zrem(self.key("jobs"), job.id()).ignore();
        pipe.zrem(self.key("expiring"), job.id()).ignore();
        pipe.incr(self.key("bytes"), -(job.heap_bytes() as i64))
            .ignore();
    }

    /// Forgets the job `id` if it still exists; returns what it was.
    fn forget_id(&self, conn: &mut Connection, id: &str) -> redis::RedisResult<Option<JobRecord>> {
        let key = self.job_key(id);
        redis::transaction(conn, &[&key], |conn, pipe| {
            let Some(job) = self.read(conn, id)? else {
                // Gone already (expired by Redis, its state unknown): drop what still points
                // at it.
                let mut indexes = redis::pipe();
                indexes.zrem(self.key("jobs"), id).ignore();
                indexes.zrem(self.key("expiring"), id).ignore();
                for state in JobState::ALL {
                    indexes.srem(self.state_key(state), id).ignore();
                }
                let _: () = indexes.query(conn)?;
                return Ok(Some(None));
            };
            self.forget(pipe, &job);
            let done: Option<()> = pipe.query(conn)?;
            Ok(done.map(|_| Some(job)))
        })
    }
}

impl JobStore for RedisStore {
    fn insert(&self, job: JobRecord) -> Stored<()> {
        self.with(|conn| {
            let mut pipe = redis::pipe();
            pipe.atomic();
            self.write(&mut pipe, None, &job);
            pipe.query(conn)
        })
    }

    fn get(&self, id: &str) -> Stored<Option<JobRecord>> {
        let now = SystemTime::now();
        self.with(|conn| Ok(self.read(conn, id)?.filter(|j| !j.is_expired(now))))
    }

    fn update(
        &self,
        id: &str,
        change: &mut dyn FnMut(&mut JobRecord),
    ) -> Stored<Option<JobRecord>> {
        let key = self.job_key(id);
        self.with(|conn| {
            redis::transaction(conn, &[&key], |conn, pipe| {
                let Some(before) = self.read(conn, id)? else {
                    return Ok(Some(None));
                };
                let mut after = before.clone();
                change(&mut after);
                self.write(pipe, Some(&before), &after);
                let done: Option<()> = pipe.query(conn)?;
                Ok(done.map(|_| Some(after)))
            })
        })
    }

    fn remove(&self, id: &str) -> Stored<Option<JobRecord>> {
        self.with(|conn| self.forget_id(conn, id))
    }

    fn list(
        &self,
        filter: &JobFilter,
        offset: usize,
        limit: usize,
    ) -> Stored<(Vec<JobRecord>, usize)> {
        self.with(|conn| {
            let mut paging = Paging::new(filter, offset, limit);
            let mut start = 0isize;
            loop {
                let ids: Vec<String> =
                    conn.zrevrange(self.key("jobs"), start, start + LIST_BATCH - 1)?;
                if ids.is_empty() {
                    break;
                }
                start += ids.len() as isize;
                let mut pipe = redis::pipe();
                for id in &ids {
                    pipe.hgetall(self.job_key(id));
                }
                let all: Vec<HashMap<String, Vec<u8>>> = pipe.query(conn)?;
                for (id, fields) in ids.iter().zip(all) {
                    if let Some(job) = JobRecord::from_fields(id, &fields) {
                        paging.offer(&job);
                    }
                }
            }
            Ok(paging.done())
        })
    }

    fn purge_expired(&self, now: SystemTime) -> Stored<usize> {
        self.with(|conn| {
            let due: Vec<String> = conn.zrangebyscore(self.key("expiring"), "-inf", micros(now))?;
            let mut gone = 0;
            for id in &due {
                gone += usize::from(self.forget_id(conn, id)?.is_some());
            }
            Ok(gone)
        })
    }

    fn counts(&self) -> Stored<JobCounts> {
        self.with(|conn| {
            let mut pipe = redis::pipe();
            for state in JobState::ALL {
                pipe.scard(self.state_key(state));
            }
            let sizes: Vec<usize> = pipe.query(conn)?;
            let mut counts = JobCounts::default();
            for (state, n) in JobState::ALL.into_iter().zip(sizes) {
                counts.set(state, n);
            }
            Ok(counts)
        })
    }

    fn held_bytes(&self) -> u64 {
        // Unreachable, it holds nothing new: submissions are refused by `counts` first.
        self.with(|conn| conn.get::<_, Option<i64>>(self.key("bytes")))
            .ok()
            .flatten()
            .map_or(0, |b| b.max(0) as u64)
    }

    fn ready(&self) -> bool {
        self.with(|conn| redis::cmd("PING").query::<String>(conn))
            .is_ok()
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::jobs::{Failure, Results};
    use bytes::Bytes;

    fn through_fields(job: &JobRecord) -> Option<JobRecord> {
        let fields: HashMap<String, Vec<u8>> = job
            .to_fields()
            .into_iter()
            .map(|(k, v)| (k.to_string(), v))
            .collect();
        JobRecord::from_fields(job.id(), &fields)
    }

    #[test]
    fn records_come_back_from_their_fields_in_every_state() {
        // Whole microseconds, as the fields keep them.
        let t = SystemTime::UNIX_EPOCH + Duration::from_micros(1_764_000_000_123_456);
        let ttl = Duration::from_secs(60);
        let accepted = JobRecord::accept("a".into(), "zone-counts".into(), Some("k1".into()), t);
        let mut running = accepted.clone();
        running.start(t + Duration::from_millis(3)).unwrap();
        running.report_progress(41, t + Duration::from_millis(5));
        let mut done = running.clone();
        let body = Bytes::from_static(b"{\"zones\":[]}\x00\xff");
        done.succeed(
            Results {
                body,
                media_type: "text/csv".into(),
            },
            t,
            ttl,
        )
        .unwrap();
        let mut failed = JobRecord::accept("f".into(), "scenarios".into(), None, t);
        let failure = Failure {
            message: "no".into(),
            status: 422,
            body: Bytes::from_static(b"{}"),
        };
        failed.fail(failure, t, ttl).unwrap();
        let mut dismissed = running.clone();
        dismissed.dismiss(t, ttl).unwrap();
        for job in [accepted, running, done, failed, dismissed] {
            assert_eq!(through_fields(&job).as_ref(), Some(&job), "{job:?}");
        }
    }

    #[test]
    fn a_record_with_a_field_missing_or_malformed_is_refused() {
        let job = JobRecord::accept("a".into(), "p".into(), None, SystemTime::UNIX_EPOCH);
        let fields: HashMap<String, Vec<u8>> = job
            .to_fields()
            .into_iter()
            .map(|(k, v)| (k.to_string(), v))
            .collect();
        for name in ["process", "state", "created", "progress"] {
            let mut missing = fields.clone();
            missing.remove(name);
            assert!(JobRecord::from_fields("a", &missing).is_none(), "{name}");
        }
        let mut bad = fields.clone();
        bad.insert("state".into(), b"sleeping".to_vec());
        assert!(JobRecord::from_fields("a", &bad).is_none());
    }
}

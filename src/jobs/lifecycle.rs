//! The life of a job, as a storable record and the transitions that are the only way to change
//! it:
//!
//! ```text
//! accepted --start--> running --succeed--> successful
//!     |                  |  \--fail------> failed
//!     \--fail------------+---dismiss-----> dismissed (a tombstone: forgotten by clients)
//! ```
//!
//! Any state but dismissed can be dismissed. The manager keeps a dismissed record only while
//! the job's work is queued or running, so the worker sees the flag, and removes it after.
//!
//! A record holds plain data only (no live handles, no monotonic instants), so a store outside
//! the process can keep it: wall-clock timestamps, an owner, the cancellation flag, and the
//! outcome as opaque bytes that `api` encoded. Transitions are visible inside `jobs` only; the
//! runner and the stores call them, handlers cannot.

use std::time::{Duration, SystemTime};

use bytes::Bytes;

/// Where a job is in its life. Names follow OGC API - Processes 1.0 `statusCode`.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash)]
pub enum JobState {
    Accepted,
    Running,
    Successful,
    Failed,
    Dismissed,
}

impl JobState {
    pub const ALL: [JobState; 5] = [
        JobState::Accepted,
        JobState::Running,
        JobState::Successful,
        JobState::Failed,
        JobState::Dismissed,
    ];
    pub fn as_str(self) -> &'static str {
        match self {
            JobState::Accepted => "accepted",
            JobState::Running => "running",
            JobState::Successful => "successful",
            JobState::Failed => "failed",
            JobState::Dismissed => "dismissed",
        }
    }
    pub fn parse(s: &str) -> Option<JobState> {
        JobState::ALL.into_iter().find(|k| k.as_str() == s)
    }
    pub fn is_finished(self) -> bool {
        matches!(
            self,
            JobState::Successful | JobState::Failed | JobState::Dismissed
        )
    }
}

/// A results body and its media type, as served by `/jobs/{id}/results`.
#[derive(Clone, Debug, PartialEq)]
pub struct Results {
    pub body: Bytes,
    pub media_type: String,
}

impl Results {
    /// A JSON results body.
    pub fn json(body: Bytes) -> Results {
        Results {
            body,
            media_type: "application/json".into(),
        }
    }
}

/// What a finished job left behind, already encoded by the caller.
#[derive(Clone, Debug, PartialEq)]
pub enum Outcome {
    /// The results, as served by `/jobs/{id}/results`.
    Results(Results),
    /// An HTTP status and the exception (problem) document explaining the failure.
    Failure { status: u16, body: Bytes },
}

/// A failure as the job keeps it: the status message for pollers and the encoded document.
#[derive(Clone, Debug, PartialEq)]
pub struct Failure {
    pub message: String,
    pub status: u16,
    pub body: Bytes,
}

/// A transition that does not apply to the job's current state (it was left unchanged).
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub struct Refused {
    pub from: JobState,
}

/// One asynchronous execution, as stored.
#[derive(Clone, Debug, PartialEq)]
pub struct JobRecord {
    id: String,
    process: String,
    owner: Option<String>,
    state: JobState,
    message: String,
    /// Percent done, 0 to 100.
    progress: u8,
    created: SystemTime,
    started: Option<SystemTime>,
    finished: Option<SystemTime>,
    updated: SystemTime,
    /// When the record is forgotten (set when the job finishes).
    expires: Option<SystemTime>,
    /// Asked to stop: whoever runs the job cancels its computation when it sees this.
    cancel_requested: bool,
    outcome: Option<Outcome>,
}

impl JobRecord {
    pub fn id(&self) -> &str {
        &self.id
    }
    pub fn process(&self) -> &str {
        &self.process
    }
    /// The key that created the job, when the service authenticates.
    pub fn owner(&self) -> Option<&str> {
        self.owner.as_deref()
    }
    pub fn state(&self) -> JobState {
        self.state
    }
    pub fn message(&self) -> &str {
        &self.message
    }
    /// Percent done: 0 while accepted, the computation's share while running (at most 99),
    /// 100 once finished.
    pub fn progress(&self) -> u8 {
        self.progress
    }
    pub fn created(&self) -> SystemTime {
        self.created
    }
    pub fn started(&self) -> Option<SystemTime> {
        self.started
    }
    pub fn finished(&self) -> Option<SystemTime> {
        self.finished
    }
    pub fn updated(&self) -> SystemTime {
        self.updated
    }
    pub fn expires(&self) -> Option<SystemTime> {
        self.expires
    }
    pub fn cancel_requested(&self) -> bool {
        self.cancel_requested
    }
    pub fn outcome(&self) -> Option<&Outcome> {
        self.outcome.as_ref()
    }
    pub fn is_expired(&self, now: SystemTime) -> bool {
        self.expires.is_some_and(|e| e <= now)
    }

    /// A new job, waiting for the compute pool.
    pub(super) fn accept(
        id: String,
        process: String,
        owner: Option<String>,
        now: SystemTime,
    ) -> JobRecord {
        JobRecord {
            id,
            process,
            owner,
            state: JobState::Accepted,
            message: "queued for the compute pool".into(),
            progress: 0,
            created: now,
            started: None,
            finished: None,
            updated: now,
            expires: None,
            cancel_requested: false,
            outcome: None,
        }
    }

    /// accepted -> running; refused once cancellation was asked for.
    pub(super) fn start(&mut self, now: SystemTime) -> Result<(), Refused> {
        if self.state != JobState::Accepted || self.cancel_requested {
            return Err(self.refused());
        }
        self.state = JobState::Running;
        self.message = "computing".into();
        self.started = Some(now);
        self.updated = now;
        Ok(())
    }

    /// Records progress while running (at most 99 percent: 100 means finished). Returns whether
    /// the record changed.
    pub(super) fn report_progress(&mut self, percent: u8, now: SystemTime) -> bool {
        let percent = percent.min(99);
        if self.state != JobState::Running || percent == self.progress {
            return false;
        }
        self.progress = percent;
        self.updated = now;
        true
    }

    /// running -> successful, keeping the results until `now + ttl`.
    pub(super) fn succeed(
        &mut self,
        results: Results,
        now: SystemTime,
        ttl: Duration,
    ) -> Result<(), Refused> {
        if self.state != JobState::Running {
            return Err(self.refused());
        }
        self.state = JobState::Successful;
        self.message = "done".into();
        self.end(Outcome::Results(results), now, ttl);
        Ok(())
    }

    /// accepted or running -> failed, keeping the failure until `now + ttl`.
    pub(super) fn fail(
        &mut self,
        failure: Failure,
        now: SystemTime,
        ttl: Duration,
    ) -> Result<(), Refused> {
        if self.state.is_finished() {
            return Err(self.refused());
        }
        self.state = JobState::Failed;
        self.message = failure.message;
        self.cancel_requested = true;
        self.end(
            Outcome::Failure {
                status: failure.status,
                body: failure.body,
            },
            now,
            ttl,
        );
        Ok(())
    }

    /// Any state but dismissed -> dismissed: asks the computation to stop, drops the outcome,
    /// and leaves a tombstone until `now + ttl` so a runner elsewhere still sees the flag.
    pub(super) fn dismiss(&mut self, now: SystemTime, ttl: Duration) -> Result<(), Refused> {
        if self.state == JobState::Dismissed {
            return Err(self.refused());
        }
        self.state = JobState::Dismissed;
        self.message = "dismissed".into();
        self.cancel_requested = true;
        self.progress = 100;
        self.finished.get_or_insert(now);
        self.updated = now;
        self.outcome = None;
        self.expires = Some(now + ttl);
        Ok(())
    }

    fn end(&mut self, outcome: Outcome, now: SystemTime, ttl: Duration) {
        self.progress = 100;
        self.finished = Some(now);
        self.updated = now;
        self.outcome = Some(outcome);
        self.expires = Some(now + ttl);
    }

    fn refused(&self) -> Refused {
        Refused { from: self.state }
    }

    /// Bytes the record holds (for store accounting).
    pub fn heap_bytes(&self) -> usize {
        let outcome = match &self.outcome {
            Some(Outcome::Results(r)) => r.body.len() + r.media_type.len(),
            Some(Outcome::Failure { body: b, .. }) => b.len(),
            None => 0,
        };
        std::mem::size_of::<JobRecord>()
            + self.id.len()
            + self.process.len()
            + self.message.len()
            + self.owner.as_ref().map_or(0, String::len)
            + outcome
    }

    /// The record as named fields of bytes, for a store outside the process (a Redis hash):
    /// times in microseconds since the Unix epoch, absent values left out. The id is the key's.
    pub(super) fn to_fields(&self) -> Vec<(&'static str, Vec<u8>)> {
        let mut f: Vec<(&'static str, Vec<u8>)> = vec![
            ("process", self.process.clone().into_bytes()),
            ("state", self.state.as_str().into()),
            ("message", self.message.clone().into_bytes()),
            ("progress", self.progress.to_string().into_bytes()),
            ("created", micros(self.created).to_string().into_bytes()),
            ("updated", micros(self.updated).to_string().into_bytes()),
            (
                "cancel",
                if self.cancel_requested { "1" } else { "0" }.into(),
            ),
        ];
        if let Some(o) = &self.owner {
            f.push(("owner", o.clone().into_bytes()));
        }
        for (name, at) in [
            ("started", self.started),
            ("finished", self.finished),
            ("expires", self.expires),
        ] {
            if let Some(at) = at {
                f.push((name, micros(at).to_string().into_bytes()));
            }
        }
        match &self.outcome {
            Some(Outcome::Results(r)) => {
                f.push(("outcome", "results".into()));
                f.push(("media_type", r.media_type.clone().into_bytes()));
                f.push(("body", r.body.to_vec()));
            }
            Some(Outcome::Failure { status, body }) => {
                f.push(("outcome", "failure".into()));
                f.push(("status", status.to_string().into_bytes()));
                f.push(("body", body.to_vec()));
            }
            None => {}
        }
        f
    }

    /// The record back from `to_fields`; `None` when a field is missing or malformed.
    pub(super) fn from_fields(
        id: &str,
        fields: &std::collections::HashMap<String, Vec<u8>>,
    ) -> Option<JobRecord> {
        let text = |name: &str| -> Option<String> {
            fields
                .get(name)
                .and_then(|b| String::from_utf8(b.clone()).ok())
        };
        let time = |name: &str| -> Option<Option<SystemTime>> {
            match text(name) {
                None => Some(None),
                Some(t) => Some(Some(
                    SystemTime::UNIX_EPOCH + Duration::from_micros(t.parse().ok()?),
                )),
            }
        };
        let required = |name: &str| time(name).flatten();
        let outcome = match text("outcome").as_deref() {
            None => None,
            Some("results") => Some(Outcome::Results(Results {
                body: Bytes::from(fields.get("body")?.clone()),
                media_type: text("media_type")?,
            })),
            Some("failure") => Some(Outcome::Failure {
                status: text("status")?.parse().ok()?,
                body: Bytes::from(fields.get("body")?.clone()),
            }),
            Some(_) => return None,
        };
        Some(JobRecord {
            id: id.to_string(),
            process: text("process")?,
            owner: text("owner"),
            state: JobState::parse(&text("state")?)?,
            message: text("message")?,
            progress: text("progress")?.parse().ok()?,
            created: required("created")?,
            started: time("started")?,
            finished: time("finished")?,
            updated: required("updated")?,
            expires: time("expires")?,
            cancel_requested: text("cancel")? == "1",
            outcome,
        })
    }
}

/// Microseconds since the Unix epoch (0 for a time before it).
pub(super) fn micros(at: SystemTime) -> u64 {
    at.duration_since(SystemTime::UNIX_EPOCH)
        .map_or(0, |d| d.as_micros() as u64)
}

#[cfg(test)]
mod tests {
    use super::*;

    fn job() -> JobRecord {
        JobRecord::accept(
            "j".into(),
            "zone-counts".into(),
            None,
            SystemTime::UNIX_EPOCH,
        )
    }

    fn failure() -> Failure {
        Failure {
            message: "bad".into(),
            status: 400,
            body: Bytes::from_static(b"{}"),
        }
    }

    #[test]
    fn the_happy_path_runs_accepted_running_successful() {
        let t = SystemTime::UNIX_EPOCH + Duration::from_secs(10);
        let mut j = job();
        assert_eq!((j.state(), j.progress()), (JobState::Accepted, 0));
        assert!(!j.report_progress(50, t), "no progress before running");
        j.start(t).unwrap();
        assert!(j.report_progress(50, t));
        assert!(
            !j.report_progress(50, t),
            "an unchanged figure is no change"
        );
        assert!(j.report_progress(100, t) && j.progress() == 99);
        j.succeed(
            Results::json(Bytes::from_static(b"[]")),
            t,
            Duration::from_secs(5),
        )
        .unwrap();
        assert_eq!((j.state(), j.progress()), (JobState::Successful, 100));
        assert_eq!(j.expires(), Some(t + Duration::from_secs(5)));
        assert!(j.is_expired(t + Duration::from_secs(5)));
        assert_eq!(
            j.fail(failure(), t, Duration::ZERO),
            Err(Refused {
                from: JobState::Successful
            })
        );
    }

    #[test]
    fn finished_jobs_keep_their_ending() {
        let t = SystemTime::UNIX_EPOCH;
        let mut j = job();
        j.fail(failure(), t, Duration::ZERO).unwrap();
        assert!(j.start(t).is_err(), "a failed job never starts");
        assert!(j
            .succeed(Results::json(Bytes::new()), t, Duration::ZERO)
            .is_err_and(|r| r.from == JobState::Failed));
        assert_eq!(j.message(), "bad");
        let mut k = job();
        k.dismiss(t, Duration::from_secs(1)).unwrap();
        assert!(k.cancel_requested());
        assert!(k.start(t).is_err(), "a dismissed job never starts");
        assert!(k.dismiss(t, Duration::ZERO).is_err());
        assert!(k.fail(failure(), t, Duration::ZERO).is_err());
    }
}

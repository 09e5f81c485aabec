//! The one error type of the HTTP layer and its wire shape: RFC 9457 problem documents.
//!
//! Every failure a handler, an extractor or the router can produce becomes an `ApiError`, and
//! every `ApiError` becomes `application/problem+json` with `type`, `title`, `status`, `detail`
//! and, where a field is to blame, `pointer` (a JSON pointer into the request body). OGC API -
//! Processes exception types are used where that standard names one. 5xx bodies stay generic;
//! their cause goes to the log inside the request span.

use axum::http::{header, HeaderValue, StatusCode};
use axum::response::{IntoResponse, Response};
use serde::{Deserialize, Serialize};
use utoipa::ToSchema;

use super::decode::{DecodeError, DecodeKind};
use crate::jobs::{Ending, Failure, Failures};

const OGC_EXCEPTIONS: &str = "http://www.opengis.net/def/exceptions/ogcapi-processes-1/1.0";

/// An RFC 9457 problem document.
#[derive(Clone, Debug, Serialize, Deserialize, PartialEq, ToSchema)]
pub struct Problem {
    #[serde(rename = "type")]
    pub kind: String,
    pub title: String,
    pub status: u16,
    pub detail: String,
    /// JSON pointer to the offending field of the request body.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub pointer: Option<String>,
}

/// Every way a request can fail.
#[derive(Clone, Debug, PartialEq)]
pub enum ApiError {
    /// A file or geometry was read but cannot be used as given (422).
    Unusable {
        pointer: String,
        detail: String,
    },
    /// A field's value is wrong (a probability above 1, a cell outside the raster, ...).
    InvalidInput {
        pointer: String,
        detail: String,
    },
    /// The body is not JSON, or not the JSON this endpoint takes.
    MalformedJson {
        pointer: String,
        detail: String,
    },
    /// The JSON nests deeper than the configured limit.
    NestingTooDeep {
        limit: usize,
        offset: usize,
    },
    /// A size limit (body bytes, cells, zones, zone cells, planned cost) was exceeded.
    TooLarge {
        pointer: String,
        detail: String,
    },
    /// A sync request whose planned cost exceeds the sync budget.
    SyncTooCostly {
        cost: f64,
        budget: f64,
    },
    UnsupportedMediaType {
        got: String,
        /// What to send instead, e.g. "JSON with `Content-Type: application/json`".
        accepted: &'static str,
    },
    NoSuchProcess {
        id: String,
    },
    NoSuchJob {
        id: String,
    },
    ResultNotReady {
        id: String,
        state: &'static str,
    },
    UnknownRaster {
        pointer: String,
        reference: String,
    },
    NotFound {
        path: String,
    },
    MethodNotAllowed,
    /// `Accept` names no format the output is offered in.
    NotAcceptable {
        got: String,
        supported: String,
    },
    BadQuery {
        parameter: String,
        detail: String,
    },
    /// The compute queue is full.
    Busy {
        retry_after: u64,
    },
    /// The request ran past the configured time limit.
    Timeout {
        seconds: f64,
    },
    ShuttingDown,
    /// An async job ran past `--job-timeout`.
    JobTimeout {
        seconds: f64,
    },
    /// No key, or a key that is not one of the service's.
    Unauthorized {
        presented: bool,
    },
    /// The key sent more requests than its rate allows.
    RateLimited {
        retry_after: u64,
    },
    /// Holding the request would exceed the memory budget.
    OverBudget {
        asked: u64,
        used: u64,
        limit: u64,
        retry_after: u64,
    },
    /// The job store holds as many jobs or bytes as it may.
    JobsFull {
        detail: String,
        retry_after: u64,
    },
    /// The job store could not be reached (the cause is logged, not sent).
    StoreDown {
        retry_after: u64,
    },
    /// The computation was cancelled (dismissed, client gone, timed out, shutdown).
    Cancelled,
    /// Anything else: the detail stays generic, the cause is logged.
    Internal {
        cause: String,
    },
}

impl ApiError {
    pub fn status(&self) -> StatusCode {
        use ApiError::*;
        match self {
            InvalidInput { .. }
            | MalformedJson { .. }
            | NestingTooDeep { .. }
            | UnknownRaster { .. }
            | BadQuery { .. } => StatusCode::BAD_REQUEST,
            TooLarge { .. } | SyncTooCostly { .. } => StatusCode::PAYLOAD_TOO_LARGE,
            Unusable { .. } => StatusCode::UNPROCESSABLE_ENTITY,
            UnsupportedMediaType { .. } => StatusCode::UNSUPPORTED_MEDIA_TYPE,
            NoSuchProcess { .. } | NoSuchJob { .. } | ResultNotReady { .. } | NotFound { .. } => {
                StatusCode::NOT_FOUND
            }
            MethodNotAllowed => StatusCode::METHOD_NOT_ALLOWED,
            NotAcceptable { .. } => StatusCode::NOT_ACCEPTABLE,
            Busy { .. } | ShuttingDown | Cancelled => StatusCode::SERVICE_UNAVAILABLE,
            Timeout { .. } | JobTimeout { .. } => StatusCode::GATEWAY_TIMEOUT,
            JobsFull { .. } | OverBudget { .. } | StoreDown { .. } => {
                StatusCode::SERVICE_UNAVAILABLE
            }
            Unauthorized { .. } => StatusCode::UNAUTHORIZED,
            RateLimited { .. } => StatusCode::TOO_MANY_REQUESTS,
            Internal { .. } => StatusCode::INTERNAL_SERVER_ERROR,
        }
    }

    /// The problem document.
    pub fn problem(&self) -> Problem {
        use ApiError::*;
        let ogc = |name: &str| format!("{OGC_EXCEPTIONS}/{name}");
        let own = |name: &str| format!("/problems/{name}");
        let (kind, title, detail, pointer) = match self {
            InvalidInput { pointer, detail } => (own("invalid-input"), "invalid input", detail.clone(), Some(pointer.clone())),
            Unusable { pointer, detail } => (own("unusable-content"), "unusable input", detail.clone(), Some(pointer.clone())),
            MalformedJson { pointer, detail } => (own("malformed-json"), "malformed JSON", detail.clone(), Some(pointer.clone())),
            NestingTooDeep { limit, offset } => (
                own("nesting-too-deep"),
                "JSON nested too deeply",
                format!("the body nests arrays and objects deeper than {limit} levels (at byte {offset}): no request document needs that"),
                Some(String::new()),
            ),
            TooLarge { pointer, detail } => (own("too-large"), "request too large", detail.clone(), Some(pointer.clone())),
            SyncTooCostly { cost, budget } => (
                own("sync-too-costly"),
                "too costly for a synchronous request",
                format!(
                    "the planned cost {cost:.3e} exceeds this service's synchronous budget of {budget:.3e}: retry with the header `Prefer: respond-async` and poll the job"
                ),
                Some("/inputs/zones".to_string()),
            ),
            UnsupportedMediaType { got, accepted } => (
                own("unsupported-media-type"),
                "unsupported media type",
                format!("the body was sent as `{got}`: send {accepted}"),
                None,
            ),
            NoSuchProcess { id } => (
                ogc("no-such-process"),
                "no such process",
                format!("there is no process `{id}`: GET /processes lists them"),
                None,
            ),
            NoSuchJob { id } => (
                ogc("no-such-job"),
                "no such job",
                format!("there is no job `{id}`: it never existed, was dismissed, or expired (GET /jobs lists the jobs held)"),
                None,
            ),
            ResultNotReady { id, state } => (
                ogc("result-not-ready"),
                "result not ready",
                format!("job `{id}` is {state}: poll GET /jobs/{id} until its status is `successful`"),
                None,
            ),
            UnknownRaster { pointer, reference } => (
                own("unknown-raster"),
                "unknown raster reference",
                format!(
                    "raster `{reference}` is not held by this service (never posted, or evicted from the cache): POST it to /rasters again or send it inline"
                ),
                Some(pointer.clone()),
            ),
            NotFound { path } => (own("not-found"), "not found", format!("nothing is served at `{path}`: GET / lists the endpoints"), None),
            MethodNotAllowed => (
                own("method-not-allowed"),
                "method not allowed",
                "this endpoint does not take that method: see /openapi.json for the methods of each path".to_string(),
                None,
            ),
            NotAcceptable { got, supported } => (
                own("not-acceptable"),
                "no acceptable format",
                format!("`Accept: {got}` names no format this output is offered in: accept one of {supported}, or ask in the body with `outputs.<id>.format.mediaType`"),
                None,
            ),
            BadQuery { parameter, detail } => (own("bad-query"), "bad query parameter", format!("parameter `{parameter}`: {detail}"), None),
            JobTimeout { seconds } => (
                own("job-timeout"),
                "job timed out",
                format!("the job ran past this service's limit of {seconds} s for one job and was stopped: split the area or send fewer zones per job"),
                None,
            ),
            RateLimited { retry_after } => (
                own("rate-limited"),
                "too many requests",
                format!("this key sent more requests than this service allows it (--rate-limit): retry in {retry_after} s"),
                None,
            ),
            Unauthorized { presented } => (
                own("unauthorized"),
                "API key needed",
                if *presented {
                    "the key sent is not one of this service's: check it with the operator".to_string()
                } else {
                    "this service needs an API key: send `Authorization: Bearer <key>`".to_string()
                },
                None,
            ),
            OverBudget { asked, used, limit, retry_after } => (
                own("memory-budget"),
                "memory budget full",
                format!("this request needs {asked} bytes while {used} of this service's {limit} bytes for requests are held (--memory-budget): retry in {retry_after} s, or send a smaller request"),
                None,
            ),
            JobsFull { detail, .. } => (
                own("jobs-full"),
                "job store full",
                detail.clone(),
                None,
            ),
            Busy { retry_after } => (
                own("busy"),
                "compute queue full",
                format!("every compute slot is taken: retry in {retry_after} s"),
                None,
            ),
            Timeout { seconds } => (
                own("timeout"),
                "request timed out",
                format!("the request ran past this service's limit of {seconds} s: send it with `Prefer: respond-async` and poll the job"),
                None,
            ),
            StoreDown { retry_after } => (
                own("job-store"),
                "job store unavailable",
                format!("the job store cannot be reached: retry in {retry_after} s"),
                None,
            ),
            Cancelled => (own("cancelled"), "cancelled", "the computation was cancelled before it finished".to_string(), None),
            ShuttingDown => (own("shutting-down"), "shutting down", "the service is shutting down: retry shortly".to_string(), None),
            Internal { .. } => (
                own("internal"),
                "internal error",
                "the service failed while handling this request; the cause is in its log under this request's id".to_string(),
                None,
            ),
        };
        Problem {
            kind,
            title: title.to_string(),
            status: self.status().as_u16(),
            detail,
            pointer,
        }
    }

    /// The problem document as bytes, for storing in a failed job.
    pub fn to_body(&self) -> bytes::Bytes {
        bytes::Bytes::from(serde_json::to_vec(&self.problem()).unwrap_or_default())
    }

    /// A decoding error of the request document, whose pointers are relative to `base`.
    pub fn from_decode(err: DecodeError, base: &str) -> ApiError {
        let pointer = format!("{base}{}", err.pointer);
        match err.kind {
            DecodeKind::Invalid => ApiError::InvalidInput {
                pointer,
                detail: err.detail,
            },
            DecodeKind::Unusable => ApiError::Unusable {
                pointer,
                detail: err.detail,
            },
            DecodeKind::TooLarge => ApiError::TooLarge {
                pointer,
                detail: err.detail,
            },
            DecodeKind::UnknownRaster { reference } => {
                ApiError::UnknownRaster { pointer, reference }
            }
        }
    }

    /// The failure a job keeps for this error: its message, status and problem document. The one
    /// place a failure is encoded for the job store.
    pub fn to_failure(&self) -> Failure {
        if let ApiError::Internal { cause } = self {
            tracing::error!(%cause, "job failed");
        }
        let message = match self {
            ApiError::ShuttingDown => {
                "the service shut down before this job finished: submit it again".to_string()
            }
            ApiError::Cancelled => "cancelled".to_string(),
            other => other.problem().detail,
        };
        Failure {
            message,
            status: self.status().as_u16(),
            body: self.to_body(),
        }
    }
}

/// The problem documents of the endings the job manager decides itself.
pub struct JobFailures;

impl Failures for JobFailures {
    fn failure(&self, ending: Ending) -> Failure {
        match ending {
            Ending::Cancelled => ApiError::Cancelled,
            Ending::Panicked => ApiError::Internal {
                cause: "the computation panicked".into(),
            },
            Ending::ShutDown => ApiError::ShuttingDown,
            Ending::StoreDown => ApiError::StoreDown { retry_after: 5 },
            Ending::TimedOut(limit) => ApiError::JobTimeout {
                seconds: limit.as_secs_f64(),
            },
        }
        .to_failure()
    }
}

impl std::fmt::Display for ApiError {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        match self {
            ApiError::Internal { cause } => write!(f, "internal error: {cause}"),
            other => write!(f, "{}", other.problem().detail),
        }
    }
}

pub const PROBLEM_JSON: &str = "application/problem+json";

impl IntoResponse for ApiError {
    fn into_response(self) -> Response {
        if let ApiError::Internal { cause } = &self {
            tracing::error!(%cause, "request failed");
        }
        let status = self.status();
        let body = self.to_body();
        let mut resp = (
            status,
            [(header::CONTENT_TYPE, HeaderValue::from_static(PROBLEM_JSON))],
            body,
        )
            .into_response();
        match &self {
            ApiError::Busy { retry_after }
            | ApiError::JobsFull { retry_after, .. }
            | ApiError::OverBudget { retry_after, .. }
            | ApiError::StoreDown { retry_after }
            | ApiError::RateLimited { retry_after } => {
                resp.headers_mut()
                    .insert(header::RETRY_AFTER, HeaderValue::from(*retry_after));
            }
            ApiError::Unauthorized { .. } => {
                resp.headers_mut().insert(
                    header::WWW_AUTHENTICATE,
                    HeaderValue::from_static("Bearer realm=\"zonetally\""),
                );
            }
            ApiError::ShuttingDown => {
                resp.headers_mut()
                    .insert(header::RETRY_AFTER, HeaderValue::from(5u64));
            }
            _ => {}
        }
        resp
    }
}

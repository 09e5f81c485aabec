//! The job endpoints of OGC API - Processes 1.0: the job list, a job's status, its results,
//! and dismissal. Handlers read jobs and ask for dismissal through `jobs::Jobs`; they never
//! change a job themselves.

use std::time::SystemTime;

use axum::body::Body;
use axum::extract::{Path, RawQuery, State};
use axum::http::{header, HeaderMap, HeaderValue, StatusCode};
use axum::response::{IntoResponse, Response};
use axum::{Extension, Json};
use serde::Serialize;
use sha2::{Digest, Sha256};
use utoipa::ToSchema;

use super::auth::Caller;
use super::links::{link, Link, JSON, OGC_REL};
use super::problem::{ApiError, Problem};
use super::state::AppState;
use crate::jobs::{JobFilter, JobRecord, JobState, Outcome};

/// Largest page of a job listing.
const MAX_PAGE: usize = 1000;
const DEFAULT_PAGE: usize = 10;

/// A job's status as OGC API - Processes 1.0 `statusInfo`.
#[derive(Clone, Debug, Serialize, ToSchema)]
pub struct StatusInfo {
    #[serde(rename = "jobID")]
    pub job_id: String,
    #[serde(rename = "processID")]
    pub process_id: String,
    #[serde(rename = "type")]
    pub kind: String,
    /// accepted, running, successful, failed or dismissed.
    pub status: String,
    pub message: String,
    /// 0 to 100.
    pub progress: u8,
    pub created: String,
    #[serde(skip_serializing_if = "Option::is_none")]
    pub started: Option<String>,
    #[serde(skip_serializing_if = "Option::is_none")]
    pub finished: Option<String>,
    pub updated: String,
    pub links: Vec<Link>,
}

fn rfc3339(t: SystemTime) -> String {
    humantime::format_rfc3339_millis(t).to_string()
}

pub fn status_info(job: &JobRecord) -> StatusInfo {
    let mut links = vec![link(
        format!("/jobs/{}", job.id()),
        "self",
        JSON,
        "this status",
    )];
    if job.state() == JobState::Successful {
        links.push(link(
            format!("/jobs/{}/results", job.id()),
            format!("{OGC_REL}/results"),
            JSON,
            "results",
        ));
    }
    StatusInfo {
        job_id: job.id().to_string(),
        process_id: job.process().to_string(),
        kind: "process".into(),
        status: job.state().as_str().into(),
        message: job.message().to_string(),
        progress: job.progress(),
        created: rfc3339(job.created()),
        started: job.started().map(rfc3339),
        finished: job.finished().map(rfc3339),
        updated: rfc3339(job.updated()),
        links,
    }
}

#[derive(Serialize, ToSchema)]
pub struct JobList {
    pub jobs: Vec<StatusInfo>,
    /// Jobs matching the filters, over all pages.
    #[serde(rename = "numberMatched")]
    pub number_matched: usize,
    pub links: Vec<Link>,
}

fn values<'a>(pairs: &'a [(String, String)], name: &str) -> Vec<&'a str> {
    pairs
        .iter()
        .filter(|(k, _)| k == name)
        .flat_map(|(_, v)| v.split(','))
        .map(str::trim)
        .filter(|v| !v.is_empty())
        .collect()
}

fn number(
    pairs: &[(String, String)],
    name: &str,
    default: usize,
    (min, max): (usize, usize),
) -> Result<usize, ApiError> {
    // An empty `limit=` is refused, not read as the default: the client meant something.
    match pairs
        .iter()
        .rev()
        .find(|(k, _)| k == name)
        .map(|(_, v)| v.trim())
    {
        None => Ok(default),
        Some(v) => match v.parse::<usize>() {
            Ok(n) if (min..=max).contains(&n) => Ok(n),
            _ => Err(ApiError::BadQuery {
                parameter: name.into(),
                detail: format!("`{v}` is not a whole number from {min} to {max}"),
            }),
        },
    }
}

/// The job as `caller` may see it: another key's job is as unknown as one that never was.
fn visible(
    state: &AppState,
    caller: &Caller,
    id: &str,
) -> Result<crate::jobs::JobRecord, ApiError> {
    state
        .jobs()
        .status(id)
        .map_err(|e| state.store_down(e))?
        .filter(|j| caller.may_see(j.owner()))
        .ok_or_else(|| ApiError::NoSuchJob { id: id.to_string() })
}

#[utoipa::path(get, path = "/jobs", tag = "ogc",
    params(("processID" = Option<String>, Query, description = "only jobs of these processes (comma-separated)"),
           ("status" = Option<String>, Query, description = "only jobs with these statuses (comma-separated)"),
           ("limit" = Option<usize>, Query, minimum = 1, maximum = 1000, description = "page size, 1 to 1000 (default 10)"),
           ("offset" = Option<usize>, Query, description = "jobs to skip (paging links carry it)")),
    responses((status = 200, description = "the jobs held, newest first", body = JobList),
              (status = 400, description = "bad query parameter", body = Problem, content_type = "application/problem+json"),
              (status = 503, description = "the job store cannot be reached: retry after `Retry-After` seconds", body = Problem, content_type = "application/problem+json")))]
pub async fn jobs(
    State(state): State<AppState>,
    Extension(caller): Extension<Caller>,
    RawQuery(query): RawQuery,
) -> Result<Json<JobList>, ApiError> {
    let pairs: Vec<(String, String)> = serde_urlencoded::from_str(query.as_deref().unwrap_or(""))
        .map_err(|e| ApiError::BadQuery {
        parameter: "query".into(),
        detail: e.to_string(),
    })?;
    let mut filter = JobFilter {
        owner: caller.0.clone(),
        processes: values(&pairs, "processID")
            .into_iter()
            .map(String::from)
            .collect(),
        states: Vec::new(),
    };
    for s in values(&pairs, "status") {
        filter
            .states
            .push(JobState::parse(s).ok_or_else(|| ApiError::BadQuery {
                parameter: "status".into(),
                detail: format!(
                    "`{s}` is not a status: use accepted, running, successful, failed or dismissed"
                ),
            })?);
    }
    for t in values(&pairs, "type") {
        if t != "process" {
            return Err(ApiError::BadQuery {
                parameter: "type".into(),
                detail: format!("`{t}` is not a job type here: the only one is `process`"),
            });
        }
    }
    let limit = number(&pairs, "limit", DEFAULT_PAGE, (1, MAX_PAGE))?;
    let offset = number(&pairs, "offset", 0, (0, usize::MAX))?;
    let (page, matched) = state
        .jobs()
        .list(&filter, offset, limit)
        .map_err(|e| state.store_down(e))?;
    let keep: Vec<String> = pairs
        .iter()
        .filter(|(k, _)| k == "processID" || k == "status" || k == "type")
        .map(|(k, v)| format!("{k}={}", urlencode(v)))
        .collect();
    let href = |off: usize| {
        let mut q = keep.clone();
        q.push(format!("limit={limit}"));
        q.push(format!("offset={off}"));
        format!("/jobs?{}", q.join("&"))
    };
    let mut links = vec![link(href(offset), "self", JSON, "this page")];
    if offset + page.len() < matched {
        links.push(link(href(offset + limit), "next", JSON, "next page"));
    }
    if offset > 0 {
        links.push(link(
            href(offset.saturating_sub(limit)),
            "prev",
            JSON,
            "previous page",
        ));
    }
    Ok(Json(JobList {
        jobs: page.iter().map(status_info).collect(),
        number_matched: matched,
        links,
    }))
}

fn urlencode(v: &str) -> String {
    serde_urlencoded::to_string([("", v)])
        .map(|s| s[1..].to_string())
        .unwrap_or_default()
}

/// A strong validator of a status body.
fn etag_of(body: &[u8]) -> String {
    let d = Sha256::digest(body);
    let hex: String = d.iter().take(12).map(|b| format!("{b:02x}")).collect();
    format!("\"{hex}\"")
}

fn matches_etag(headers: &HeaderMap, etag: &str) -> bool {
    headers
        .get_all(header::IF_NONE_MATCH)
        .iter()
        .filter_map(|v| v.to_str().ok())
        .flat_map(|v| v.split(','))
        .map(|t| t.trim().trim_start_matches("W/"))
        .any(|t| t == "*" || t == etag)
}

#[utoipa::path(get, path = "/jobs/{jobId}", tag = "ogc",
    params(("jobId" = String, Path, description = "job id"),
           ("If-None-Match" = Option<String>, Header, description = "an ETag from an earlier poll")),
    responses((status = 200, description = "job status; `Retry-After` while unfinished", body = StatusInfo,
                   headers(("ETag" = String, description = "changes whenever the status does"))),
              (status = 304, description = "unchanged since the given ETag"),
              (status = 404, description = "no such job", body = Problem, content_type = "application/problem+json"),
              (status = 503, description = "the job store cannot be reached: retry after `Retry-After` seconds", body = Problem, content_type = "application/problem+json")))]
pub async fn job(
    State(state): State<AppState>,
    Extension(caller): Extension<Caller>,
    Path(id): Path<String>,
    headers: HeaderMap,
) -> Result<Response, ApiError> {
    let job = visible(&state, &caller, &id)?;
    let body = serde_json::to_vec(&status_info(&job)).map_err(|e| ApiError::Internal {
        cause: e.to_string(),
    })?;
    let etag = etag_of(&body);
    let etag_value = HeaderValue::from_str(&etag).map_err(|e| ApiError::Internal {
        cause: e.to_string(),
    })?;
    let mut resp = if matches_etag(&headers, &etag) {
        StatusCode::NOT_MODIFIED.into_response()
    } else {
        (
            StatusCode::OK,
            [(header::CONTENT_TYPE, HeaderValue::from_static(JSON))],
            body,
        )
            .into_response()
    };
    resp.headers_mut().insert(header::ETAG, etag_value);
    resp.headers_mut()
        .insert(header::CACHE_CONTROL, HeaderValue::from_static("no-cache"));
    if !job.state().is_finished() {
        resp.headers_mut().insert(
            header::RETRY_AFTER,
            HeaderValue::from(state.config().retry_after),
        );
    }
    Ok(resp)
}

#[utoipa::path(get, path = "/jobs/{jobId}/results", tag = "ogc",
    params(("jobId" = String, Path, description = "job id")),
    responses((status = 200, description = "the results, shaped and encoded as the execute request asked (JSON, GeoJSON, CSV or GeoTIFF)",
                  content((Object = "application/json"), (Object = "application/geo+json"), (String = "text/csv"), (Vec<u8> = "image/tiff; application=geotiff"))),
              (status = 404, description = "no such job, or result not ready", body = Problem, content_type = "application/problem+json"),
              (status = 500, description = "the job failed: its exception document", body = Problem, content_type = "application/problem+json"),
              (status = 503, description = "the job store cannot be reached: retry after `Retry-After` seconds", body = Problem, content_type = "application/problem+json")))]
pub async fn results(
    State(state): State<AppState>,
    Extension(caller): Extension<Caller>,
    Path(id): Path<String>,
) -> Result<Response, ApiError> {
    let job = visible(&state, &caller, &id)?;
    match job.outcome().cloned() {
        Some(Outcome::Results(results)) => {
            let media_type =
                HeaderValue::from_str(&results.media_type).map_err(|e| ApiError::Internal {
                    cause: format!("a stored media type is not a header value: {e}"),
                })?;
            Ok((
                StatusCode::OK,
                [(header::CONTENT_TYPE, media_type)],
                results.body,
            )
                .into_response())
        }
        Some(Outcome::Failure { status, body }) => {
            let status = StatusCode::from_u16(status).unwrap_or(StatusCode::INTERNAL_SERVER_ERROR);
            Ok((
                status,
                [(
                    header::CONTENT_TYPE,
                    HeaderValue::from_static(super::problem::PROBLEM_JSON),
                )],
                Body::from(body),
            )
                .into_response())
        }
        None => Err(ApiError::ResultNotReady {
            id,
            state: job.state().as_str(),
        }),
    }
}

#[utoipa::path(delete, path = "/jobs/{jobId}", tag = "ogc",
    params(("jobId" = String, Path, description = "job id")),
    responses((status = 200, description = "dismissed: the computation is cancelled and the job forgotten", body = StatusInfo),
              (status = 404, description = "no such job", body = Problem, content_type = "application/problem+json"),
              (status = 503, description = "the job store cannot be reached: retry after `Retry-After` seconds", body = Problem, content_type = "application/problem+json")))]
pub async fn dismiss(
    State(state): State<AppState>,
    Extension(caller): Extension<Caller>,
    Path(id): Path<String>,
) -> Result<Json<StatusInfo>, ApiError> {
    visible(&state, &caller, &id)?;
    let job = state
        .jobs()
        .dismiss(&id)
        .map_err(|e| state.store_down(e))?
        .ok_or(ApiError::NoSuchJob { id })?;
    Ok(Json(status_info(&job)))
}

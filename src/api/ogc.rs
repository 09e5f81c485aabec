//! OGC API - Processes - Part 1: Core 1.0 (OGC 18-062r2): landing page, conformance, process
//! list and descriptions, execution (sync and async), and the job endpoints.
//!
//! Handlers parse headers and paths, then hand the body to a blocking thread for parsing and
//! validation and the validated work to the compute pool; they never compute on the runtime. Sync is the default; `Prefer: respond-async` creates a job. GET handlers ignore `Prefer`.

use std::sync::Arc;
use std::time::{Instant, SystemTime};

use axum::body::Body;
use axum::extract::rejection::BytesRejection;
use axum::extract::{Path, RawQuery, State};
use axum::http::{header, HeaderMap, HeaderValue, StatusCode};
use axum::response::{IntoResponse, Response};
use axum::Json;
use bytes::Bytes;
use serde::Serialize;
use serde_json::Value;
use sha2::{Digest, Sha256};
use utoipa::ToSchema;

use super::body;
use super::problem::{ApiError, Problem};
use super::processes::{Prepared, Process, ResponseMode};
use super::state::AppState;
use crate::engine::Control;
use crate::jobs::{CancelOnDrop, Finished, Job, JobFilter, JobState, Outcome};

const CONF: &str = "http://www.opengis.net/spec/ogcapi-processes-1/1.0/conf";
const OGC_REL: &str = "http://www.opengis.net/def/rel/ogc/1.0";
/// Media type of the service description link, as OGC API and OpenAPI 3.1 name it.
pub const OPENAPI_MEDIA_TYPE: &str = "application/vnd.oai.openapi+json;version=3.1";
const JSON: &str = "application/json";
/// Largest page of a job listing.
const MAX_PAGE: usize = 1000;
const DEFAULT_PAGE: usize = 10;

#[derive(Clone, Debug, Serialize, ToSchema)]
pub struct Link {
    pub href: String,
    pub rel: String,
    #[serde(rename = "type", skip_serializing_if = "Option::is_none")]
    pub media_type: Option<String>,
    #[serde(skip_serializing_if = "Option::is_none")]
    pub title: Option<String>,
}

fn link(href: impl Into<String>, rel: impl Into<String>, media_type: &str, title: &str) -> Link {
    Link {
        href: href.into(),
        rel: rel.into(),
        media_type: Some(media_type.into()),
        title: Some(title.into()),
    }
}

#[derive(Serialize, ToSchema)]
pub struct LandingPage {
    pub title: String,
    pub description: String,
    pub links: Vec<Link>,
}

#[utoipa::path(get, path = "/", tag = "ogc", responses((status = 200, description = "landing page", body = LandingPage)))]
pub async fn landing() -> Json<LandingPage> {
    Json(LandingPage {
        title: "zonetally".into(),
        description: "Conditional zone-count distributions from a probability raster and an observed total (OGC API - Processes 1.0)".into(),
        links: vec![
            link("/", "self", JSON, "this document"),
            link("/openapi.json", "service-desc", OPENAPI_MEDIA_TYPE, "the API definition"),
            link("/conformance", format!("{OGC_REL}/conformance"), JSON, "conformance classes implemented"),
            link("/processes", format!("{OGC_REL}/processes"), JSON, "the processes offered"),
            link("/jobs", format!("{OGC_REL}/job-list"), JSON, "the jobs held"),
            link("/demo", "service-doc", "text/html", "demo page: an invented valley after a storm"),
        ],
    })
}

#[derive(Serialize, ToSchema)]
pub struct Conformance {
    #[serde(rename = "conformsTo")]
    pub conforms_to: Vec<String>,
}

/// The conformance classes claimed: only those the tests exercise.
pub fn conformance_classes() -> Vec<String> {
    [
        "core",
        "ogc-process-description",
        "json",
        "job-list",
        "dismiss",
    ]
    .iter()
    .map(|c| format!("{CONF}/{c}"))
    .collect()
}

#[utoipa::path(get, path = "/conformance", tag = "ogc", responses((status = 200, description = "conformance classes", body = Conformance)))]
pub async fn conformance() -> Json<Conformance> {
    Json(Conformance {
        conforms_to: conformance_classes(),
    })
}

#[derive(Serialize, ToSchema)]
pub struct ProcessSummary {
    pub id: String,
    pub title: String,
    pub description: String,
    pub version: String,
    #[serde(rename = "jobControlOptions")]
    pub job_control_options: Vec<String>,
    #[serde(rename = "outputTransmission")]
    pub output_transmission: Vec<String>,
    pub links: Vec<Link>,
}

#[derive(Serialize, ToSchema)]
pub struct ProcessList {
    pub processes: Vec<ProcessSummary>,
    pub links: Vec<Link>,
}

#[derive(Serialize, ToSchema)]
pub struct ProcessDescription {
    #[serde(flatten)]
    pub summary: ProcessSummary,
    /// Input id -> {title, description, schema, minOccurs, maxOccurs}.
    #[schema(value_type = Object)]
    pub inputs: Value,
    /// Output id -> {title, description, schema}.
    #[schema(value_type = Object)]
    pub outputs: Value,
}

fn summary(p: &dyn Process) -> ProcessSummary {
    let id = p.id();
    ProcessSummary {
        id: id.into(),
        title: p.title().into(),
        description: p.description().into(),
        version: env!("CARGO_PKG_VERSION").into(),
        job_control_options: vec![
            "sync-execute".into(),
            "async-execute".into(),
            "dismiss".into(),
        ],
        output_transmission: vec!["value".into()],
        links: vec![
            link(
                format!("/processes/{id}"),
                "self",
                JSON,
                "process description",
            ),
            link(
                format!("/processes/{id}/execution"),
                format!("{OGC_REL}/execute"),
                JSON,
                "execute",
            ),
        ],
    }
}

#[utoipa::path(get, path = "/processes", tag = "ogc", responses((status = 200, description = "the processes offered", body = ProcessList)))]
pub async fn processes(State(state): State<AppState>) -> Json<ProcessList> {
    Json(ProcessList {
        processes: state
            .processes()
            .iter()
            .map(|p| summary(p.as_ref()))
            .collect(),
        links: vec![link("/processes", "self", JSON, "this document")],
    })
}

#[utoipa::path(get, path = "/processes/{processId}", tag = "ogc",
    params(("processId" = String, Path, description = "process id")),
    responses((status = 200, description = "process description", body = ProcessDescription),
              (status = 404, description = "no such process", body = Problem, content_type = "application/problem+json")))]
pub async fn process(
    State(state): State<AppState>,
    Path(id): Path<String>,
) -> Result<Json<ProcessDescription>, ApiError> {
    let p = state.process(&id).ok_or(ApiError::NoSuchProcess { id })?;
    Ok(Json(ProcessDescription {
        summary: summary(p.as_ref()),
        inputs: p.inputs(),
        outputs: p.outputs(),
    }))
}

/// Whether `Prefer` asks for async execution (`respond-async`); also whether it named
/// `respond-sync`, which is then echoed in `Preference-Applied`. Unknown preferences are ignored.
fn preference(headers: &HeaderMap) -> (bool, bool) {
    let mut tokens = headers
        .get_all("prefer")
        .iter()
        .filter_map(|v| v.to_str().ok())
        .flat_map(|v| v.split(','))
        .map(|t| {
            t.split(';')
                .next()
                .unwrap_or("")
                .trim()
                .to_ascii_lowercase()
        });
    let (mut wants_async, mut named_sync) = (false, false);
    for t in tokens.by_ref() {
        match t.as_str() {
            "respond-async" => wants_async = true,
            "respond-sync" => named_sync = true,
            _ => {}
        }
    }
    (wants_async, named_sync)
}

/// The results body in the requested shape: the output alone, or `{"<output>": ...}`.
fn shape(mode: ResponseMode, output: &str, raw: Bytes) -> Bytes {
    match mode {
        ResponseMode::Raw => raw,
        ResponseMode::Document => {
            let mut out = Vec::with_capacity(raw.len() + output.len() + 8);
            out.extend_from_slice(b"{\"");
            out.extend_from_slice(output.as_bytes());
            out.extend_from_slice(b"\":");
            out.extend_from_slice(&raw);
            out.push(b'}');
            Bytes::from(out)
        }
    }
}

#[utoipa::path(post, path = "/processes/{processId}/execution", tag = "ogc",
    params(("processId" = String, Path, description = "process id"),
           ("Prefer" = Option<String>, Header, description = "`respond-async` to run as a job; sync otherwise")),
    request_body(content = Object, description = "`{\"inputs\": {...}, \"outputs\": {...}, \"response\": \"raw\"|\"document\"}`; for zone-counts the inputs are the request document of `zonetally eval`", content_type = "application/json"),
    responses((status = 200, description = "sync results: the output (raw) or {output id: output} (document)", body = Object),
              (status = 201, description = "async: job created", body = StatusInfo,
                  headers(("Location" = String, description = "the job's status URL"))),
              (status = 400, description = "invalid inputs", body = Problem, content_type = "application/problem+json"),
              (status = 404, description = "no such process", body = Problem, content_type = "application/problem+json"),
              (status = 413, description = "body, raster, zones or cost too large, or too costly for sync", body = Problem, content_type = "application/problem+json"),
              (status = 415, description = "not JSON", body = Problem, content_type = "application/problem+json"),
              (status = 503, description = "compute queue full", body = Problem, content_type = "application/problem+json")))]
pub async fn execute(
    State(state): State<AppState>,
    Path(id): Path<String>,
    headers: HeaderMap,
    body: Result<Bytes, BytesRejection>,
) -> Result<Response, ApiError> {
    let process = state.process(&id).ok_or(ApiError::NoSuchProcess { id })?;
    body::require_json(&headers)?;
    let body = body.map_err(|r| body::rejection(r, state.config().max_body_bytes))?;
    if state.is_shutting_down() {
        return Err(ApiError::ShuttingDown);
    }
    let (wants_async, named_sync) = preference(&headers);
    let control = Arc::new(Control::new());
    // Dropped with this future when the client goes away or the request times out.
    let mut guard = CancelOnDrop::new(control.clone());
    let (depth, st, p) = (
        state.config().max_json_depth,
        state.clone(),
        process.clone(),
    );
    let (mode, prepared) = state
        .decode(move || {
            body::check_depth(&body, depth)?;
            p.prepare(&body, &st)
        })
        .await?;
    if wants_async {
        let resp = start_job(&state, process, mode, prepared, control)?;
        guard.disarm();
        return Ok(resp);
    }
    let budget = state.config().sync_budget;
    if prepared.estimated_cost() > budget {
        return Err(ApiError::SyncTooCostly {
            cost: prepared.estimated_cost(),
            budget,
        });
    }
    let cells = prepared.cells();
    let st = state.clone();
    let raw = state
        .compute(control, move |c| counted(prepared.run(&st, c), &st))
        .await?;
    guard.disarm();
    state.metrics().add_cells(cells);
    let mut resp = (
        StatusCode::OK,
        [(header::CONTENT_TYPE, HeaderValue::from_static(JSON))],
        shape(mode, process.output(), raw),
    )
        .into_response();
    if named_sync {
        resp.headers_mut().insert(
            "preference-applied",
            HeaderValue::from_static("respond-sync"),
        );
    }
    Ok(resp)
}

/// Counts a computation that stopped on its cancelled `Control` while running.
fn counted<T>(result: Result<T, ApiError>, state: &AppState) -> Result<T, ApiError> {
    if matches!(result, Err(ApiError::Cancelled)) {
        state.metrics().add_cancelled();
    }
    result
}

fn start_job(
    state: &AppState,
    process: Arc<dyn Process>,
    mode: ResponseMode,
    prepared: Box<dyn Prepared>,
    control: Arc<Control>,
) -> Result<Response, ApiError> {
    let id = uuid::Uuid::new_v4().to_string();
    let job = Job::new(id.clone(), process.id().to_string(), control.clone());
    let info = status_info(&job);
    state.store().insert(job);
    let cells = prepared.cells();
    let (st, job_id) = (state.clone(), id.clone());
    let submitted = state.pool().submit(control, move |c| {
        st.store().update(&job_id, &mut |j| {
            j.state = JobState::Running;
            j.message = "computing".into();
            j.started = Some(SystemTime::now());
        });
        counted(prepared.run(&st, c), &st)
    });
    let rx = match submitted {
        Ok(rx) => rx,
        Err(_) => {
            state.store().remove(&id);
            return Err(ApiError::Busy {
                retry_after: state.config().retry_after,
            });
        }
    };
    let (st, job_id, output) = (state.clone(), id.clone(), process.output());
    tokio::spawn(async move {
        let finished = rx.await;
        let ttl = st.config().job_ttl();
        let (state, message, outcome) = match finished {
            Ok(Finished::Done(Ok(raw))) => {
                st.metrics().add_cells(cells);
                (
                    JobState::Successful,
                    "done".to_string(),
                    Outcome::Results(shape(mode, output, raw)),
                )
            }
            Ok(Finished::Done(Err(ApiError::Cancelled))) | Ok(Finished::Cancelled) => {
                let e = ApiError::Cancelled;
                (
                    JobState::Dismissed,
                    "cancelled".to_string(),
                    Outcome::Failure {
                        status: e.status().as_u16(),
                        body: e.to_body(),
                    },
                )
            }
            Ok(Finished::Done(Err(e))) => {
                if let ApiError::Internal { cause } = &e {
                    tracing::error!(job = %job_id, %cause, "job failed");
                }
                (
                    JobState::Failed,
                    e.problem().detail,
                    Outcome::Failure {
                        status: e.status().as_u16(),
                        body: e.to_body(),
                    },
                )
            }
            Ok(Finished::Panicked(_)) | Err(_) => {
                let e = ApiError::Internal {
                    cause: "the computation panicked".into(),
                };
                (
                    JobState::Failed,
                    e.problem().detail,
                    Outcome::Failure {
                        status: e.status().as_u16(),
                        body: e.to_body(),
                    },
                )
            }
        };
        st.store().update(&job_id, &mut |j| {
            if j.state.is_finished() {
                return; // failed at shutdown meanwhile: keep that
            }
            j.state = state;
            j.message = message.clone();
            j.finished = Some(SystemTime::now());
            j.outcome = Some(outcome.clone());
            j.expires = Some(Instant::now() + ttl);
        });
    });
    let mut resp = (StatusCode::CREATED, Json(info)).into_response();
    let h = resp.headers_mut();
    h.insert(
        header::LOCATION,
        HeaderValue::from_str(&format!("/jobs/{id}")).map_err(|e| ApiError::Internal {
            cause: e.to_string(),
        })?,
    );
    h.insert(
        "preference-applied",
        HeaderValue::from_static("respond-async"),
    );
    Ok(resp)
}

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

pub fn status_info(job: &Job) -> StatusInfo {
    let mut links = vec![link(
        format!("/jobs/{}", job.id),
        "self",
        JSON,
        "this status",
    )];
    if job.state == JobState::Successful {
        links.push(link(
            format!("/jobs/{}/results", job.id),
            format!("{OGC_REL}/results"),
            JSON,
            "results",
        ));
    }
    StatusInfo {
        job_id: job.id.clone(),
        process_id: job.process.clone(),
        kind: "process".into(),
        status: job.state.as_str().into(),
        message: job.message.clone(),
        progress: job.progress(),
        created: rfc3339(job.created),
        started: job.started.map(rfc3339),
        finished: job.finished.map(rfc3339),
        updated: rfc3339(job.updated),
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
    max: usize,
) -> Result<usize, ApiError> {
    match values(pairs, name).last() {
        None => Ok(default),
        Some(v) => match v.parse::<usize>() {
            Ok(n) if n <= max => Ok(n),
            _ => Err(ApiError::BadQuery {
                parameter: name.into(),
                detail: format!("`{v}` is not a whole number from 0 to {max}"),
            }),
        },
    }
}

#[utoipa::path(get, path = "/jobs", tag = "ogc",
    params(("processID" = Option<String>, Query, description = "only jobs of these processes (comma-separated)"),
           ("status" = Option<String>, Query, description = "only jobs with these statuses (comma-separated)"),
           ("limit" = Option<usize>, Query, description = "page size, 1 to 1000 (default 10)"),
           ("offset" = Option<usize>, Query, description = "jobs to skip (paging links carry it)")),
    responses((status = 200, description = "the jobs held, newest first", body = JobList),
              (status = 400, description = "bad query parameter", body = Problem, content_type = "application/problem+json")))]
pub async fn jobs(
    State(state): State<AppState>,
    RawQuery(query): RawQuery,
) -> Result<Json<JobList>, ApiError> {
    let pairs: Vec<(String, String)> = serde_urlencoded::from_str(query.as_deref().unwrap_or(""))
        .map_err(|e| ApiError::BadQuery {
        parameter: "query".into(),
        detail: e.to_string(),
    })?;
    let mut filter = JobFilter {
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
    let limit = number(&pairs, "limit", DEFAULT_PAGE, MAX_PAGE)?.max(1);
    let offset = number(&pairs, "offset", 0, usize::MAX)?;
    let (page, matched) = state.store().list(&filter, offset, limit);
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
              (status = 404, description = "no such job", body = Problem, content_type = "application/problem+json")))]
pub async fn job(
    State(state): State<AppState>,
    Path(id): Path<String>,
    headers: HeaderMap,
) -> Result<Response, ApiError> {
    let job = state.store().get(&id).ok_or(ApiError::NoSuchJob { id })?;
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
    if !job.state.is_finished() {
        resp.headers_mut().insert(
            header::RETRY_AFTER,
            HeaderValue::from(state.config().retry_after),
        );
    }
    Ok(resp)
}

#[utoipa::path(get, path = "/jobs/{jobId}/results", tag = "ogc",
    params(("jobId" = String, Path, description = "job id")),
    responses((status = 200, description = "the results, shaped as the execute request asked", body = Object),
              (status = 404, description = "no such job, or result not ready", body = Problem, content_type = "application/problem+json"),
              (status = 500, description = "the job failed: its exception document", body = Problem, content_type = "application/problem+json")))]
pub async fn results(
    State(state): State<AppState>,
    Path(id): Path<String>,
) -> Result<Response, ApiError> {
    let job = state
        .store()
        .get(&id)
        .ok_or_else(|| ApiError::NoSuchJob { id: id.clone() })?;
    match job.outcome {
        Some(Outcome::Results(body)) => Ok((
            StatusCode::OK,
            [(header::CONTENT_TYPE, HeaderValue::from_static(JSON))],
            body,
        )
            .into_response()),
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
            state: job.state.as_str(),
        }),
    }
}

#[utoipa::path(delete, path = "/jobs/{jobId}", tag = "ogc",
    params(("jobId" = String, Path, description = "job id")),
    responses((status = 200, description = "dismissed: the computation is cancelled and the job forgotten", body = StatusInfo),
              (status = 404, description = "no such job", body = Problem, content_type = "application/problem+json")))]
pub async fn dismiss(
    State(state): State<AppState>,
    Path(id): Path<String>,
) -> Result<Json<StatusInfo>, ApiError> {
    let mut job = state
        .store()
        .remove(&id)
        .ok_or(ApiError::NoSuchJob { id })?;
    job.control.cancel();
    job.state = JobState::Dismissed;
    job.message = "dismissed".into();
    job.updated = SystemTime::now();
    Ok(Json(status_info(&job)))
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::api::config::Config;

    struct Faulty;

    impl Prepared for Faulty {
        fn estimated_cost(&self) -> f64 {
            1.0
        }
        fn cells(&self) -> u64 {
            1
        }
        fn run(self: Box<Self>, _: &AppState, _: &Control) -> Result<Bytes, ApiError> {
            panic!("index out of bounds in a kernel")
        }
    }

    #[tokio::test]
    async fn a_panicking_kernel_fails_its_job_with_a_generic_500() {
        let state = AppState::new(Config {
            threads: 1,
            ..Config::default()
        })
        .unwrap();
        let process = state.process("zone-counts").unwrap();
        let resp = start_job(
            &state,
            process,
            ResponseMode::Raw,
            Box::new(Faulty),
            Arc::new(Control::new()),
        )
        .unwrap();
        assert_eq!(resp.status(), StatusCode::CREATED);
        let id = resp.headers()[header::LOCATION]
            .to_str()
            .unwrap()
            .trim_start_matches("/jobs/")
            .to_string();
        let mut job = state.store().get(&id).unwrap();
        for _ in 0..1000 {
            if job.state.is_finished() {
                break;
            }
            tokio::time::sleep(std::time::Duration::from_millis(5)).await;
            job = state.store().get(&id).unwrap();
        }
        assert_eq!(job.state, JobState::Failed);
        match job.outcome {
            Some(Outcome::Failure { status, body }) => {
                assert_eq!(status, 500);
                let text = String::from_utf8(body.to_vec()).unwrap();
                assert!(
                    !text.contains("index out of bounds"),
                    "5xx bodies stay generic: {text}"
                );
                assert!(text.contains("/problems/internal"));
            }
            other => panic!("expected a failure, got {other:?}"),
        }
        assert_eq!(state.pool().stats().panics, 1);
    }
}

//! OGC API - Processes - Part 1: Core 1.0 (OGC 18-062r2): landing page, conformance, process
//! list and descriptions, and execution (sync and async). The job endpoints are in `jobs`.
//!
//! Handlers parse headers and paths, then hand the body to a blocking thread for parsing and
//! validation and the validated work to the compute pool; they never compute on the runtime.
//! Sync is the default; `Prefer: respond-async` submits a job to `jobs::Jobs`. GET handlers
//! ignore `Prefer`.

use std::sync::Arc;

use axum::extract::rejection::BytesRejection;
use axum::extract::{Path, State};
use axum::http::{header, HeaderMap, HeaderValue, StatusCode};
use axum::response::{IntoResponse, Response};
use axum::Extension;
use axum::Json;
use bytes::Bytes;
use serde::Serialize;
use serde_json::Value;
use utoipa::ToSchema;

use super::auth::Caller;
use super::body;
use super::budget::Charge;
use super::jobs::{status_info, StatusInfo};
use super::links::{link, Link, JSON, OGC_REL};
use super::problem::{ApiError, Problem};
use super::processes::{Context, Output, Prepared, Process, ResponseMode};
use super::state::AppState;
use crate::engine::Control;
use crate::jobs::{CancelOnDrop, Results, SubmitRefused, WorkError};

const CONF: &str = "http://www.opengis.net/spec/ogcapi-processes-1/1.0/conf";

/// Media type of the service description link, as OGC API and OpenAPI 3.1 name it.
pub const OPENAPI_MEDIA_TYPE: &str = "application/vnd.oai.openapi+json;version=3.1";

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
    responses((status = 200, description = "sync results: the output (raw) or {output id: output} (document), in the format chosen by `outputs.<id>.format.mediaType` or `Accept`: JSON (default); GeoJSON or CSV for zone-counts; a GeoTIFF (posterior, prior) for cell-posterior",
                  content((Object = "application/json"), (Object = "application/geo+json"), (String = "text/csv"), (Vec<u8> = "image/tiff; application=geotiff"))),
              (status = 201, description = "async: job created", body = StatusInfo,
                  headers(("Location" = String, description = "the job's status URL"))),
              (status = 400, description = "invalid inputs", body = Problem, content_type = "application/problem+json"),
              (status = 404, description = "no such process", body = Problem, content_type = "application/problem+json"),
              (status = 406, description = "`Accept` names no format the output is offered in", body = Problem, content_type = "application/problem+json"),
              (status = 413, description = "body, raster, zones or cost too large, or too costly for sync", body = Problem, content_type = "application/problem+json"),
              (status = 415, description = "not JSON", body = Problem, content_type = "application/problem+json"),
              (status = 422, description = "a GeoTIFF or GeoJSON input that was read but cannot be used (rotated grid, point zone, unclosed ring, value outside [0, 1])", body = Problem, content_type = "application/problem+json"),
              (status = 503, description = "compute queue full, jobs or memory at their limits, or the job store out of reach (with `Retry-After`)", body = Problem, content_type = "application/problem+json")))]
pub async fn execute(
    State(state): State<AppState>,
    Extension(caller): Extension<Caller>,
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
    let (depth, st, p) = (
        state.config().max_json_depth,
        state.clone(),
        process.clone(),
    );
    let accept = headers
        .get(header::ACCEPT)
        .and_then(|v| v.to_str().ok())
        .map(str::to_string);
    let owner = caller.0.clone();
    let (mode, prepared) = state
        .decode(move || {
            body::check_depth(&body, depth)?;
            // References resolve among the caller's own rasters.
            let rasters = st.caches().scoped(owner.as_deref());
            let ctx = Context {
                rasters: &rasters,
                ..st.context()
            };
            p.prepare(&body, accept.as_deref(), &ctx)
        })
        .await?;
    let charge = state.charge(prepared.held_bytes())?;
    if wants_async {
        return start_job(&state, process, mode, prepared, charge, caller.0);
    }
    let budget = state.config().sync_budget;
    if prepared.estimated_cost() > budget {
        return Err(ApiError::SyncTooCostly {
            cost: prepared.estimated_cost(),
            budget,
        });
    }
    let control = Arc::new(Control::new());
    // Dropped with this future when the client goes away or the request times out.
    let mut guard = CancelOnDrop::new(control.clone());
    let st = state.clone();
    let output = state
        .compute(control, move |c| run_counted(prepared, &st, c))
        .await?;
    guard.disarm();
    drop(charge);
    let media_type = HeaderValue::from_static(output.format.media_type());
    let mut resp = (
        StatusCode::OK,
        [(header::CONTENT_TYPE, media_type)],
        shape(mode, process.output(), output.body),
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

/// Runs a prepared computation, counting its cells when it finishes and its cancellation when
/// it stops on one.
fn run_counted(
    prepared: Box<dyn Prepared>,
    state: &AppState,
    control: &Control,
) -> Result<Output, ApiError> {
    let cells = prepared.cells();
    let result = prepared.run(&state.context(), control);
    match &result {
        Ok(_) => state.metrics().add_cells(cells),
        Err(ApiError::Cancelled) => state.metrics().add_cancelled(),
        Err(_) => {}
    }
    result
}

/// Submits a prepared computation as a job and answers 201 with its status.
fn start_job(
    state: &AppState,
    process: Arc<dyn Process>,
    mode: ResponseMode,
    prepared: Box<dyn Prepared>,
    charge: Charge,
    owner: Option<String>,
) -> Result<Response, ApiError> {
    let (st, output) = (state.clone(), process.output());
    // The charge is given back when the work has run (or is dropped unrun).
    let work = Box::new(move |c: &Control| {
        let result = run_counted(prepared, &st, c);
        // From here the store holds the results, bounded by --max-job-bytes.
        drop(charge);
        match result {
            Ok(out) => Ok(Results {
                body: shape(mode, output, out.body),
                media_type: out.format.media_type().to_string(),
            }),
            Err(ApiError::Cancelled) => Err(WorkError::Cancelled),
            Err(e) => Err(WorkError::Failed(e.to_failure())),
        }
    });
    let job = state
        .jobs()
        .submit(process.id(), owner, work)
        .map_err(|refused| {
            let retry_after = state.config().retry_after;
            match refused {
                SubmitRefused::QueueFull => ApiError::Busy { retry_after },
                SubmitRefused::StoreFull {
                    held,
                    bytes,
                    max_held,
                    max_bytes,
                } => ApiError::JobsFull {
                    detail: format!(
                        "this service holds {held} jobs in {bytes} bytes, at its limit of {max_held} jobs or {max_bytes} bytes (--max-jobs, --max-job-bytes): fetch or dismiss finished jobs, or retry when they expire"
                    ),
                    retry_after,
                },
                SubmitRefused::StoreDown(e) => state.store_down(e),
            }
        })?;
    let mut resp = (StatusCode::CREATED, Json(status_info(&job))).into_response();
    let h = resp.headers_mut();
    h.insert(
        header::LOCATION,
        HeaderValue::from_str(&format!("/jobs/{}", job.id())).map_err(|e| ApiError::Internal {
            cause: e.to_string(),
        })?,
    );
    h.insert(
        "preference-applied",
        HeaderValue::from_static("respond-async"),
    );
    Ok(resp)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::api::config::Config;
    use crate::api::processes::Context;
    use crate::jobs::{JobState, Outcome};

    struct Faulty;

    impl Prepared for Faulty {
        fn estimated_cost(&self) -> f64 {
            1.0
        }
        fn cells(&self) -> u64 {
            1
        }
        fn held_bytes(&self) -> u64 {
            0
        }
        fn run(self: Box<Self>, _: &Context, _: &Control) -> Result<Output, ApiError> {
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
        let charge = state.charge(0).unwrap();
        let resp = start_job(
            &state,
            process,
            ResponseMode::Raw,
            Box::new(Faulty),
            charge,
            None,
        )
        .unwrap();
        assert_eq!(resp.status(), StatusCode::CREATED);
        let id = resp.headers()[header::LOCATION]
            .to_str()
            .unwrap()
            .trim_start_matches("/jobs/")
            .to_string();
        let mut job = state.jobs().status(&id).unwrap().unwrap();
        for _ in 0..1000 {
            if job.state().is_finished() {
                break;
            }
            tokio::time::sleep(std::time::Duration::from_millis(5)).await;
            job = state.jobs().status(&id).unwrap().unwrap();
        }
        assert_eq!(job.state(), JobState::Failed);
        match job.outcome() {
            Some(Outcome::Failure { status, body }) => {
                assert_eq!(*status, 500);
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

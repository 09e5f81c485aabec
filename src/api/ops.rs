//! Operations endpoints: liveness, readiness, metrics, the OpenAPI document, the demo page.

use axum::extract::State;
use axum::http::{header, HeaderValue, StatusCode};
use axum::response::{IntoResponse, Response};
use axum::Json;
use serde::Serialize;
use utoipa::ToSchema;

use super::ogc::OPENAPI_MEDIA_TYPE;
use super::problem::{ApiError, Problem};
use super::state::AppState;

const DEMO_PAGE: &str = include_str!("../../demo/page/index.html");
const DEMO_SCENARIO: &str = include_str!("../../demo/valley.json");

#[derive(Serialize, ToSchema)]
pub struct Health {
    pub status: String,
}

#[utoipa::path(get, path = "/healthz", tag = "operations", responses((status = 200, description = "the process is alive", body = Health)))]
pub async fn healthz() -> Json<Health> {
    Json(Health {
        status: "alive".into(),
    })
}

#[derive(Serialize, ToSchema)]
pub struct Readiness {
    pub status: String,
    /// Threads of the pool async jobs run on.
    pub compute_threads: usize,
    /// Threads of the synchronous requests' own pool (0 when they share the jobs' pool).
    pub sync_threads: usize,
    /// Free admission slots of the jobs' pool.
    pub queue_free: usize,
    pub jobs: usize,
    /// The process's memory budget (`--memory-budget`), in bytes.
    pub memory_budget: u64,
    /// The budget's part for request data, and how much of it is charged now.
    pub request_bytes: u64,
    pub request_bytes_used: u64,
}

#[utoipa::path(get, path = "/readyz", tag = "operations",
    responses((status = 200, description = "ready: the compute pool and the job store can take work", body = Readiness),
              (status = 503, description = "not ready (shutting down, store unavailable)", body = Problem, content_type = "application/problem+json")))]
pub async fn readyz(State(state): State<AppState>) -> Result<Json<Readiness>, ApiError> {
    let pool = state.pool().stats();
    if state.is_shutting_down() || pool.threads == 0 {
        return Err(ApiError::ShuttingDown);
    }
    if !state.jobs().store_ready() {
        return Err(ApiError::StoreDown {
            retry_after: state.config().retry_after,
        });
    }
    // A full queue refuses every execution: not ready until a slot frees (it does by itself).
    if pool.queued + pool.running >= pool.capacity {
        return Err(ApiError::Busy {
            retry_after: state.config().retry_after,
        });
    }
    Ok(Json(Readiness {
        status: "ready".into(),
        compute_threads: pool.threads,
        sync_threads: match state.config().shared_pool {
            true => 0,
            false => state.sync_pool().stats().threads,
        },
        queue_free: pool.capacity.saturating_sub(pool.queued + pool.running),
        jobs: state
            .jobs()
            .counts()
            .map_err(|e| state.store_down(e))?
            .total(),
        memory_budget: state.memory_plan().total,
        request_bytes: state.budget().limit(),
        request_bytes_used: state.budget().used(),
    }))
}

#[utoipa::path(get, path = "/metrics", tag = "operations", responses((status = 200, description = "Prometheus text exposition", body = String, content_type = "text/plain")))]
pub async fn metrics(State(state): State<AppState>) -> Response {
    let text = state.metrics().render(&state.snapshot());
    (
        [(
            header::CONTENT_TYPE,
            HeaderValue::from_static("text/plain; version=0.0.4; charset=utf-8"),
        )],
        text,
    )
        .into_response()
}

#[utoipa::path(get, path = "/openapi.json", tag = "operations", responses((status = 200, description = "this API's OpenAPI 3.1 document", body = Object, content_type = "application/vnd.oai.openapi+json;version=3.1")))]
pub async fn openapi() -> Response {
    (
        [(
            header::CONTENT_TYPE,
            HeaderValue::from_static(OPENAPI_MEDIA_TYPE),
        )],
        super::openapi_json(),
    )
        .into_response()
}

#[utoipa::path(get, path = "/demo", tag = "demo", responses((status = 200, description = "the demo page", body = String, content_type = "text/html")))]
pub async fn demo_page() -> Response {
    (
        [(
            header::CONTENT_TYPE,
            HeaderValue::from_static("text/html; charset=utf-8"),
        )],
        DEMO_PAGE,
    )
        .into_response()
}

#[utoipa::path(get, path = "/demo/valley.json", tag = "demo", responses((status = 200, description = "the demo scenario: a request document", body = Object)))]
pub async fn demo_scenario() -> Response {
    (
        StatusCode::OK,
        [(
            header::CONTENT_TYPE,
            HeaderValue::from_static("application/json"),
        )],
        DEMO_SCENARIO,
    )
        .into_response()
}

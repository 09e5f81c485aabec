//! HTTP and the wire format: request and results documents, problem documents, routes, the
//! OpenAPI document. The only layer that knows JSON and HTTP.
//!
//! Routes and spec come from one source: every handler carries its `#[utoipa::path]` and is
//! registered through `utoipa_axum::routes!`, so the served `/openapi.json` lists exactly the
//! routes the router has. The committed copy lives in `openapi/openapi.json`
//! (`zonetally openapi > openapi/openapi.json` regenerates it; a test fails when they differ).

pub mod allocator;
pub mod auth;
pub mod body;
pub mod budget;
pub mod cache;
pub mod config;
pub mod decode;
pub mod formats;
pub mod jobs;
pub mod links;
pub mod metrics;
pub mod ogc;
pub mod ops;
pub mod problem;
pub mod processes;
pub mod rasters;
pub mod server;
pub mod state;
pub mod wire;

use std::sync::OnceLock;
use std::time::Duration;

use axum::extract::{DefaultBodyLimit, MatchedPath, Request, State};
use axum::http::{HeaderName, HeaderValue, Method, Uri};
use axum::middleware::{self, Next};
use axum::response::{IntoResponse, Response};
use axum::Router;
use tower_http::compression::CompressionLayer;
use tower_http::cors::{AllowOrigin, CorsLayer};
use tower_http::request_id::{MakeRequestUuid, PropagateRequestIdLayer, SetRequestIdLayer};
use tower_http::trace::{DefaultOnResponse, TraceLayer};
use tower_http::LatencyUnit;
use tracing::Level;
use utoipa::OpenApi;
use utoipa_axum::router::OpenApiRouter;
use utoipa_axum::routes;

use problem::ApiError;
use state::AppState;

#[derive(OpenApi)]
#[openapi(
    info(
        title = "zonetally",
        description = "Conditional zone-count distributions from a probability raster and an observed total, as OGC API - Processes - Part 1: Core 1.0. Every error is an RFC 9457 problem document.",
        license(name = "MIT OR Apache-2.0")
    ),
    components(schemas(
        problem::Problem,
        wire::EvalRequest,
        wire::ResultsDocument,
        wire::PosteriorDocument,
        wire::PosteriorInputs,
        wire::ScenarioInputs,
        wire::ScenariosDocument
    ))
)]
struct ApiDoc;

fn routes() -> OpenApiRouter<AppState> {
    OpenApiRouter::with_openapi(ApiDoc::openapi())
        .routes(routes!(ogc::landing))
        .routes(routes!(ogc::conformance))
        .routes(routes!(ogc::processes))
        .routes(routes!(ogc::process))
        .routes(routes!(ogc::execute))
        .routes(routes!(jobs::jobs))
        .routes(routes!(jobs::job, jobs::dismiss))
        .routes(routes!(jobs::results))
        .routes(routes!(rasters::post_raster))
        .routes(routes!(rasters::get_raster))
        .routes(routes!(ops::healthz))
        .routes(routes!(ops::readyz))
        .routes(routes!(ops::metrics))
        .routes(routes!(ops::openapi))
        .routes(routes!(ops::demo_page))
        .routes(routes!(ops::demo_scenario))
}

/// The OpenAPI document, pretty-printed, as served and as committed.
pub fn openapi_json() -> &'static str {
    static DOC: OnceLock<String> = OnceLock::new();
    DOC.get_or_init(|| {
        let (_, mut api) = routes().split_for_parts();
        guarded_responses(&mut api);
        let mut s = serde_json::to_value(&api)
            .map(|mut doc| {
                unsigned_ranges(&mut doc);
                doc
            })
            .and_then(|doc| serde_json::to_string_pretty(&doc))
            .unwrap_or_else(|e| format!("{{\"error\": \"{e}\"}}"));
        s.push('\n');
        s
    })
}

/// Unsigned integers as the wire reads them: utoipa names them `u-int32` and so on, with no upper
/// end, and clients would otherwise take them for signed 32-bit values; here each gets the usual
/// name (`uint32`) and its maximum.
fn unsigned_ranges(value: &mut serde_json::Value) {
    match value {
        serde_json::Value::Object(map) => {
            let bounds = match map.get("format").and_then(|f| f.as_str()) {
                Some("u-int8") => Some(("uint8", u64::from(u8::MAX))),
                Some("u-int16") => Some(("uint16", u64::from(u16::MAX))),
                Some("u-int32") => Some(("uint32", u64::from(u32::MAX))),
                Some("u-int64") => Some(("uint64", u64::MAX)),
                _ => None,
            };
            if let Some((name, max)) = bounds {
                map.insert("format".into(), name.into());
                map.entry("maximum").or_insert(max.into());
            }
            map.values_mut().for_each(unsigned_ranges);
        }
        serde_json::Value::Array(items) => items.iter_mut().for_each(unsigned_ranges),
        _ => {}
    }
}

/// Documents what the middleware stack answers on every route, so that no handler has to list
/// it: the optional bearer key (401, 429 past the key's rate), the request time limit (504), and
/// for the routes that take a body its deadline (408), the body limit (413), content codings
/// (415) and the memory budget (503). The health checks are never guarded by a key.
fn guarded_responses(api: &mut utoipa::openapi::OpenApi) {
    use utoipa::openapi::security::{
        HttpAuthScheme, HttpBuilder, SecurityRequirement, SecurityScheme,
    };
    use utoipa::openapi::{ContentBuilder, Ref, RefOr, ResponseBuilder};

    const KEY: &str = "api_key";
    api.components
        .get_or_insert_with(Default::default)
        .add_security_scheme(
            KEY,
            SecurityScheme::Http(
                HttpBuilder::new()
                    .scheme(HttpAuthScheme::Bearer)
                    .description(Some(
                        "an API key, required only when the service runs with `--api-keys`",
                    ))
                    .build(),
            ),
        );
    // Each answer is described once under `components/responses` and referenced from the routes.
    let answers = [
        ("401", "Unauthorized", "an API key is required (`--api-keys`) and none or an unknown one was sent"),
        ("429", "RateLimited", "the key sent more requests than its rate (`--rate-limit`); `Retry-After` says when to retry"),
        ("504", "RequestTimeout", "the request ran past `--request-timeout`"),
        ("408", "BodyTimeout", "the body did not arrive within `--body-timeout`"),
        ("413", "BodyTooLarge", "the body is larger than its limit"),
        ("415", "NotAccepted", "the body's media type or content coding is not accepted"),
        ("503", "OverBudget", "the memory budget (`--memory-budget`) cannot hold the body now; `Retry-After` says when to retry"),
    ];
    let components = api.components.get_or_insert_with(Default::default);
    for (_, name, description) in answers {
        components.responses.insert(
            name.to_string(),
            RefOr::T(
                ResponseBuilder::new()
                    .description(description)
                    .content(
                        "application/problem+json",
                        ContentBuilder::new()
                            .schema(Some(Ref::from_schema_name("Problem")))
                            .build(),
                    )
                    .build(),
            ),
        );
    }
    let reference = |status: &str| {
        let (_, name, _) = answers.iter().find(|(s, _, _)| *s == status)?;
        Some(RefOr::Ref(Ref::new(format!(
            "#/components/responses/{name}"
        ))))
    };
    for (path, item) in api.paths.paths.iter_mut() {
        let open = matches!(path.as_str(), "/healthz" | "/readyz");
        for (with_body, op) in [
            (false, item.get.as_mut()),
            (true, item.post.as_mut()),
            (false, item.delete.as_mut()),
        ] {
            let Some(op) = op else { continue };
            let mut wanted: Vec<&str> = Vec::new();
            if !open {
                wanted.extend(["401", "429", "504"]);
            }
            if with_body {
                wanted.extend(["408", "413", "415", "503"]);
            }
            for status in wanted {
                if let (false, Some(answer)) = (
                    op.responses.responses.contains_key(status),
                    reference(status),
                ) {
                    op.responses.responses.insert(status.to_string(), answer);
                }
            }
            if !open {
                op.security = Some(vec![
                    SecurityRequirement::default(),
                    SecurityRequirement::new(KEY, Vec::<String>::new()),
                ]);
            }
        }
    }
}

async fn not_found(uri: Uri) -> ApiError {
    ApiError::NotFound {
        path: uri.path().to_string(),
    }
}

async fn method_not_allowed() -> ApiError {
    ApiError::MethodNotAllowed
}

/// Answers 504 when a request runs past the limit; dropping the handler's future cancels its
/// computation (see `jobs::CancelOnDrop`).
async fn time_limit(State(state): State<AppState>, req: Request, next: Next) -> Response {
    let limit = state.config().request_timeout();
    match tokio::time::timeout(limit, next.run(req)).await {
        Ok(resp) => resp,
        Err(_) => ApiError::Timeout {
            seconds: limit.as_secs_f64(),
        }
        .into_response(),
    }
}

/// The whole service as a router: routes, problem-shaped fallbacks, and the middleware stack
/// (request ids, tracing, CORS, gzip, metrics, time limit, content coding, body deadline, body
/// limit).
pub fn router(state: AppState) -> Router {
    let (router, _) = routes().split_for_parts();
    let config = state.config().clone();
    let request_id = HeaderName::from_static("x-request-id");
    let mut app = router
        .fallback(not_found)
        .method_not_allowed_fallback(method_not_allowed)
        .route_layer(middleware::from_fn_with_state(
            state.clone(),
            body::body_deadline,
        ))
        .route_layer(middleware::from_fn(body::refuse_encoded))
        .route_layer(middleware::from_fn_with_state(
            state.clone(),
            body::charge_body,
        ))
        // Outermost of the route layers: no body is charged or read before the key is checked.
        .route_layer(middleware::from_fn_with_state(
            state.clone(),
            auth::require_key,
        ))
        .route_layer(middleware::from_fn_with_state(state.clone(), time_limit))
        // Hands the route template to `metrics::record`, which runs outside the routing.
        .route_layer(middleware::from_fn(|req: Request, next: Next| async move {
            let matched = req.extensions().get::<MatchedPath>().cloned();
            let mut resp = next.run(req).await;
            if let Some(m) = matched {
                resp.extensions_mut().insert(m);
            }
            resp
        }))
        .layer(middleware::from_fn_with_state(
            state.metrics().clone(),
            metrics::record,
        ))
        .layer(DefaultBodyLimit::max(config.max_body_bytes))
        .layer(CompressionLayer::new().gzip(true))
        .with_state(state);
    if !config.cors_origins.is_empty() {
        let origins: Vec<HeaderValue> = config
            .cors_origins
            .iter()
            .filter_map(|o| HeaderValue::from_str(o.trim()).ok())
            .collect();
        app = app.layer(
            CorsLayer::new()
                .allow_origin(AllowOrigin::list(origins))
                .allow_methods([Method::GET, Method::POST, Method::DELETE])
                .allow_headers([
                    axum::http::header::CONTENT_TYPE,
                    HeaderName::from_static("prefer"),
                    axum::http::header::IF_NONE_MATCH,
                ])
                .expose_headers([
                    axum::http::header::LOCATION,
                    axum::http::header::ETAG,
                    axum::http::header::RETRY_AFTER,
                    HeaderName::from_static("preference-applied"),
                    request_id.clone(),
                ])
                .max_age(Duration::from_secs(600)),
        );
    }
    app.layer(PropagateRequestIdLayer::new(request_id.clone()))
        .layer(
            TraceLayer::new_for_http()
                .make_span_with(|req: &Request| {
                    let id = req.headers().get("x-request-id").and_then(|v| v.to_str().ok()).unwrap_or("");
                    tracing::info_span!("request", method = %req.method(), path = %req.uri().path(), request_id = %id)
                })
                .on_response(DefaultOnResponse::new().level(Level::INFO).latency_unit(LatencyUnit::Micros)),
        )
        .layer(SetRequestIdLayer::new(request_id, MakeRequestUuid))
}

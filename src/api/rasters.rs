//! Rasters by reference: `POST /rasters` keeps a raster under its content hash so execute
//! requests can send `{"ref": "sha256:..."}` instead of the values.

use axum::extract::rejection::BytesRejection;
use axum::extract::{Path, State};
use axum::http::{header, HeaderMap, HeaderValue, StatusCode};
use axum::response::{IntoResponse, Response};
use axum::Json;
use bytes::Bytes;
use serde::Serialize;
use utoipa::ToSchema;

use super::body;
use super::cache::is_hash;
use super::decode;
use super::problem::{ApiError, Problem};
use super::state::AppState;
use super::wire::RasterSpec;
use crate::engine::Raster;

/// What the service holds for a raster.
#[derive(Serialize, ToSchema)]
pub struct RasterInfo {
    /// The content hash, to send as `{"ref": ...}`.
    #[serde(rename = "ref")]
    pub reference: String,
    pub width: u32,
    pub height: u32,
    /// Cells with a probability (not nodata).
    pub valid_cells: u64,
    /// Sum of p over valid cells: the prior mean of the total.
    pub sum_p: f64,
}

fn info(reference: String, r: &Raster) -> RasterInfo {
    RasterInfo {
        reference,
        width: r.width(),
        height: r.height(),
        valid_cells: r.stats().valid,
        sum_p: r.stats().sum_p,
    }
}

#[utoipa::path(post, path = "/rasters", tag = "rasters",
    request_body(content = RasterSpec, description = "the raster, as in `inputs.raster`", content_type = "application/json"),
    responses((status = 201, description = "held under its hash", body = RasterInfo, headers(("Location" = String, description = "the raster's URL"))),
              (status = 400, description = "invalid raster", body = Problem, content_type = "application/problem+json"),
              (status = 413, description = "too large", body = Problem, content_type = "application/problem+json"),
              (status = 415, description = "not JSON", body = Problem, content_type = "application/problem+json")))]
pub async fn post_raster(
    State(state): State<AppState>,
    headers: HeaderMap,
    body: Result<Bytes, BytesRejection>,
) -> Result<Response, ApiError> {
    body::require_json(&headers)?;
    let body = body.map_err(|r| body::rejection(r, state.config().max_body_bytes))?;
    let st = state.clone();
    let (hash, raster) = state
        .decode(move || {
            body::check_depth(&body, st.config().max_json_depth)?;
            let spec: RasterSpec = body::parse(&body)?;
            let raster = decode::raster(spec, &st.config().limits()).map_err(|mut e| {
                // The body is the raster itself: drop the request document's `/raster`.
                e.pointer = e
                    .pointer
                    .strip_prefix("/raster")
                    .unwrap_or(&e.pointer)
                    .to_string();
                ApiError::from_decode(e, "")
            })?;
            Ok(st.caches().keep_raster(raster))
        })
        .await?;
    let location =
        HeaderValue::from_str(&format!("/rasters/{hash}")).map_err(|e| ApiError::Internal {
            cause: e.to_string(),
        })?;
    Ok((
        StatusCode::CREATED,
        [(header::LOCATION, location)],
        Json(info(hash, &raster)),
    )
        .into_response())
}

#[utoipa::path(get, path = "/rasters/{ref}", tag = "rasters",
    params(("ref" = String, Path, description = "`sha256:...` as returned by POST /rasters")),
    responses((status = 200, description = "held", body = RasterInfo),
              (status = 404, description = "not held", body = Problem, content_type = "application/problem+json")))]
pub async fn get_raster(
    State(state): State<AppState>,
    Path(reference): Path<String>,
) -> Result<Json<RasterInfo>, ApiError> {
    if !is_hash(&reference) {
        return Err(ApiError::NotFound {
            path: format!("/rasters/{reference}"),
        });
    }
    let raster = state
        .caches()
        .raster(&reference)
        .ok_or_else(|| ApiError::NotFound {
            path: format!("/rasters/{reference}"),
        })?;
    Ok(Json(info(reference, &raster)))
}

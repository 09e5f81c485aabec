//! Rasters by reference: `POST /rasters` keeps a raster (JSON or a GeoTIFF body) under its
//! content hash so execute requests can send `{"ref": "sha256:..."}` instead of the values.
//! A GeoTIFF body may be as large as the cell limit allows, whatever the JSON body limit.

use axum::body::Body;
use axum::extract::rejection::QueryRejection;
use axum::extract::{Path, Query, State};
use axum::http::{header, HeaderMap, HeaderValue, StatusCode};
use axum::response::{IntoResponse, Response};
use axum::{Extension, Json};
use bytes::Bytes;
use http_body_util::{BodyExt, LengthLimitError, Limited};
use serde::{Deserialize, Serialize};
use utoipa::{IntoParams, ToSchema};

use super::auth::Caller;
use super::body;
use super::cache::is_hash;
use super::decode::{self, HeldRaster};
use super::problem::{ApiError, Problem};
use super::state::AppState;
use super::wire::RasterSpec;

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
    /// Nodata cells.
    pub nodata_cells: u64,
    /// Sum of p over valid cells: the prior mean of the total.
    pub sum_p: f64,
    /// Origin and cell size, GDAL order, when the raster is georeferenced.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub geotransform: Option<[f64; 6]>,
    /// EPSG code of the raster's coordinate reference system, when known.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub crs: Option<u32>,
    /// The value that marked nodata in the input, when one was given.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub nodata: Option<f64>,
}

fn info(reference: String, held: &HeldRaster) -> RasterInfo {
    let r = &held.raster;
    let cells = u64::from(r.width()) * u64::from(r.height());
    RasterInfo {
        reference,
        width: r.width(),
        height: r.height(),
        valid_cells: r.stats().valid,
        nodata_cells: cells - r.stats().valid,
        sum_p: r.stats().sum_p,
        geotransform: held.frame.grid.transform.map(|t| t.to_gdal()),
        crs: held.frame.grid.crs,
        nodata: held.frame.nodata.filter(|v| v.is_finite()),
    }
}

/// Query parameters of `POST /rasters`.
#[derive(Deserialize, IntoParams)]
#[into_params(parameter_in = Query)]
pub struct RasterQuery {
    /// Factor applied to the stored values of a GeoTIFF body (0.01 for percent, 1/255 for bytes).
    pub scale: Option<f64>,
}

/// How a `POST /rasters` body is written.
enum BodyKind {
    Json,
    Tiff,
}

fn body_kind(headers: &HeaderMap) -> Result<BodyKind, ApiError> {
    let got = headers
        .get(header::CONTENT_TYPE)
        .and_then(|v| v.to_str().ok())
        .unwrap_or("");
    if decode::is_tiff(got) {
        return Ok(BodyKind::Tiff);
    }
    body::require_json(headers).map_err(|_| ApiError::UnsupportedMediaType {
        got: if got.is_empty() {
            "no Content-Type".into()
        } else {
            got.into()
        },
        accepted: "a JSON raster with `Content-Type: application/json`, or a GeoTIFF with `Content-Type: image/tiff; application=geotiff`",
    })?;
    Ok(BodyKind::Json)
}

/// Reads the body up to `limit` bytes; more is refused without being read.
async fn read_body(body: Body, limit: u64) -> Result<Bytes, ApiError> {
    let limit = usize::try_from(limit).unwrap_or(usize::MAX);
    match Limited::new(body, limit).collect().await {
        Ok(collected) => Ok(collected.to_bytes()),
        Err(e) if e.downcast_ref::<LengthLimitError>().is_some() => Err(ApiError::TooLarge {
            pointer: String::new(),
            detail: format!("the body is larger than this service's limit of {limit} bytes for a raster of this kind: coarsen or split the raster (a GeoTIFF may be as large as the cell limit allows)"),
        }),
        // Not a JSON problem: the bytes themselves did not arrive (a GeoTIFF body too).
        Err(e) => Err(ApiError::InvalidInput {
            pointer: String::new(),
            detail: format!("the body could not be read: {e}: send it again, whole"),
        }),
    }
}

#[utoipa::path(post, path = "/rasters", tag = "rasters",
    params(RasterQuery),
    request_body(description = "the raster: JSON as in `inputs.raster`, or a GeoTIFF (float32, float64, or u8/u16 with `scale`)",
        content((RasterSpec = "application/json"), (Vec<u8> = "image/tiff"))),
    responses((status = 201, description = "held under its hash", body = RasterInfo, headers(("Location" = String, description = "the raster's URL"))),
              (status = 400, description = "invalid raster", body = Problem, content_type = "application/problem+json"),
              (status = 413, description = "too large", body = Problem, content_type = "application/problem+json"),
              (status = 415, description = "neither JSON nor GeoTIFF", body = Problem, content_type = "application/problem+json"),
              (status = 422, description = "values outside [0, 1] or an unsupported georeferencing", body = Problem, content_type = "application/problem+json")))]
pub async fn post_raster(
    State(state): State<AppState>,
    Extension(caller): Extension<Caller>,
    headers: HeaderMap,
    query: Result<Query<RasterQuery>, QueryRejection>,
    body: Body,
) -> Result<Response, ApiError> {
    let kind = body_kind(&headers)?;
    let Query(query) = query.map_err(|e| ApiError::BadQuery {
        parameter: "scale".into(),
        detail: format!(
            "{}: give `scale` as a positive number, e.g. ?scale=0.01",
            e.body_text()
        ),
    })?;
    let limits = state.config().limits();
    let bytes = match kind {
        BodyKind::Json => read_body(body, state.config().max_body_bytes as u64).await?,
        BodyKind::Tiff => read_body(body, limits.max_raster_file_bytes()).await?,
    };
    let st = state.clone();
    let (hash, raster) = state
        .decode(move || {
            let decoded = match kind {
                BodyKind::Json => {
                    if query.scale.is_some() {
                        return Err(ApiError::BadQuery {
                            parameter: "scale".into(),
                            detail: "`scale` applies to a GeoTIFF body: give it as the raster's `scale` member in JSON".into(),
                        });
                    }
                    body::check_depth(&bytes, st.config().max_json_depth)?;
                    let spec: RasterSpec = body::parse(&bytes)?;
                    decode::raster(spec, &limits)
                }
                BodyKind::Tiff => decode::raster_tiff(&bytes, query.scale, &limits),
            };
            let (raster, frame) = decoded.map_err(|mut e| {
                // The body is the raster itself: drop the request document's `/raster`.
                e.pointer = e
                    .pointer
                    .strip_prefix("/raster")
                    .unwrap_or(&e.pointer)
                    .to_string();
                ApiError::from_decode(e, "")
            })?;
            let (hash, _, held) = st
                .caches()
                .keep_raster_for(raster, frame, caller.0.as_deref());
            Ok((hash, held))
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
    Extension(caller): Extension<Caller>,
    Path(reference): Path<String>,
) -> Result<Json<RasterInfo>, ApiError> {
    if !is_hash(&reference) {
        return Err(ApiError::NotFound {
            path: format!("/rasters/{reference}"),
        });
    }
    let raster = state
        .caches()
        .raster_for(&reference, caller.0.as_deref())
        .ok_or_else(|| ApiError::NotFound {
            path: format!("/rasters/{reference}"),
        })?;
    Ok(Json(info(reference, &raster)))
}

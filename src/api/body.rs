//! Reading JSON request bodies: content coding, the time the body may take, media type, size,
//! nesting depth, then serde with the path of the first error turned into a JSON pointer.
//! Extractor rejections land here too, so every malformed body gets a problem document of the
//! same shape. Numbers are read correctly rounded (serde_json's `float_roundtrip`).

use std::future::Future;
use std::pin::Pin;
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::Arc;
use std::task::{Context, Poll};
use std::time::Duration;

use axum::body::Body;
use axum::extract::rejection::BytesRejection;
use axum::extract::{Request, State};
use axum::http::{header, HeaderMap, HeaderValue, StatusCode};
use axum::middleware::Next;
use axum::response::{IntoResponse, Response};
use bytes::Bytes;
use http_body::{Body as HttpBody, Frame, SizeHint};
use serde::de::DeserializeOwned;

use super::problem::{ApiError, Problem, PROBLEM_JSON};
use super::state::AppState;

/// A problem document of one of our own types (`/problems/{kind}`) for failures that
/// `ApiError` does not name: those found by the socket and body layers.
pub fn problem_response(status: StatusCode, kind: &str, title: &str, detail: String) -> Response {
    let problem = Problem {
        kind: format!("/problems/{kind}"),
        title: title.to_string(),
        status: status.as_u16(),
        detail,
        pointer: None,
    };
    (
        status,
        [(header::CONTENT_TYPE, HeaderValue::from_static(PROBLEM_JSON))],
        serde_json::to_vec(&problem).unwrap_or_default(),
    )
        .into_response()
}

/// Whether a request carries a body (or may: chunked bodies have no length up front).
fn has_body(req: &Request) -> bool {
    req.body().size_hint().exact() != Some(0)
}

/// Middleware refusing with 415 any request body sent with a `Content-Encoding` other than
/// `identity`: this service reads bodies as sent, and decompressing would let a small body
/// grow past every size limit before it is checked.
pub async fn refuse_encoded(req: Request, next: Next) -> Response {
    let codings: Vec<String> = req
        .headers()
        .get_all(header::CONTENT_ENCODING)
        .iter()
        .flat_map(|v| {
            String::from_utf8_lossy(v.as_bytes())
                .split(',')
                .map(|c| c.trim().to_ascii_lowercase())
                .filter(|c| !c.is_empty())
                .collect::<Vec<_>>()
        })
        .collect();
    let foreign: Vec<&String> = codings.iter().filter(|c| *c != "identity").collect();
    if foreign.is_empty() || !has_body(&req) {
        return next.run(req).await;
    }
    let named = foreign
        .iter()
        .map(|c| c.as_str())
        .collect::<Vec<_>>()
        .join(", ");
    let mut resp = problem_response(
        StatusCode::UNSUPPORTED_MEDIA_TYPE,
        "unsupported-content-encoding",
        "unsupported content encoding",
        format!("the body is labelled `Content-Encoding: {named}`, which this service does not decode: send the body uncompressed, without a Content-Encoding header (or with `identity`)"),
    );
    // RFC 9110, 15.5.16: a 415 caused by a content coding says which codings would do.
    resp.headers_mut().insert(
        header::ACCEPT_ENCODING,
        HeaderValue::from_static("identity"),
    );
    resp
}

/// What decoding a JSON body may hold, per body byte: its numbers parsed into the wire types,
/// 16 bytes each (`Option<f64>`) for as little as 2 bytes of text ("0,"). The body's own bytes
/// come on top.
pub const JSON_DECODE_FACTOR: u64 = 8;

/// Middleware charging a request's body to the memory budget while the request is served: its
/// `Content-Length` (capped at the largest body the route reads, which refuses more), or that
/// largest body when no length is declared, and for JSON what decoding it may hold
/// (`JSON_DECODE_FACTOR` per byte). A charge that does not fit gets 503, or 413 when it could
/// never fit the budget's part for request data.
pub async fn charge_body(State(state): State<AppState>, req: Request, next: Next) -> Response {
    if !has_body(&req) {
        return next.run(req).await;
    }
    let config = state.config();
    let mut largest = config.max_body_bytes as u64;
    if req.uri().path() == "/rasters" {
        largest = largest.max(config.limits().max_raster_file_bytes());
    }
    // The body's own size when known (a declared Content-Length sets it), else the header.
    let declared = req.body().size_hint().exact().or_else(|| {
        req.headers()
            .get(header::CONTENT_LENGTH)
            .and_then(|v| v.to_str().ok())
            .and_then(|v| v.trim().parse::<u64>().ok())
    });
    let body = declared.map_or(largest, |n| n.min(largest));
    let json = req
        .headers()
        .get(header::CONTENT_TYPE)
        .and_then(|v| v.to_str().ok())
        .is_some_and(|v| {
            v.trim_start()
                .to_ascii_lowercase()
                .starts_with("application/json")
        });
    let bytes = match json {
        true => body.saturating_mul(1 + JSON_DECODE_FACTOR),
        false => body,
    };
    if bytes > state.budget().limit() {
        return ApiError::TooLarge {
            pointer: String::new(),
            detail: format!(
                "a JSON body of {body} bytes may hold {bytes} bytes while it is decoded, more than this service's {} bytes for request data (--memory-budget): send the raster as a GeoTIFF (POST /rasters, then refer to it) or split the request",
                state.budget().limit()
            ),
        }
        .into_response();
    }
    match state.charge(bytes) {
        Ok(charge) => {
            let resp = next.run(req).await;
            drop(charge);
            resp
        }
        Err(e) => e.into_response(),
    }
}

/// Middleware giving a request body `--body-timeout` to arrive, counted from when its headers
/// were read. Past it, reading the body fails and the request is answered 408 (whatever the
/// handler made of the failed read), and the connection is closed.
pub async fn body_deadline(State(state): State<AppState>, req: Request, next: Next) -> Response {
    let limit = state.config().body_timeout();
    if limit.is_zero() || !has_body(&req) {
        return next.run(req).await;
    }
    let expired = Arc::new(AtomicBool::new(false));
    let req = req.map(|body| {
        Body::new(Deadline {
            inner: body,
            sleep: Box::pin(tokio::time::sleep(limit)),
            expired: expired.clone(),
        })
    });
    let resp = next.run(req).await;
    if !expired.load(Ordering::Acquire) {
        return resp;
    }
    body_timeout(limit)
}

fn body_timeout(limit: Duration) -> Response {
    let mut resp = problem_response(
        StatusCode::REQUEST_TIMEOUT,
        "body-timeout",
        "request body too slow",
        format!(
            "the request body did not arrive within this service's limit of {} s after its headers: send the whole body at once, or post a large raster to /rasters once and refer to it",
            limit.as_secs_f64()
        ),
    );
    // RFC 9110, 15.5.9: the server closes the connection after a 408.
    resp.headers_mut()
        .insert(header::CONNECTION, HeaderValue::from_static("close"));
    resp
}

/// The request body passed through until its deadline, then an error.
struct Deadline {
    inner: Body,
    sleep: Pin<Box<tokio::time::Sleep>>,
    expired: Arc<AtomicBool>,
}

#[derive(Debug, thiserror::Error)]
#[error("the request body did not arrive in time")]
struct BodyTimedOut;

impl HttpBody for Deadline {
    type Data = Bytes;
    type Error = axum::Error;

    fn poll_frame(
        mut self: Pin<&mut Self>,
        cx: &mut Context<'_>,
    ) -> Poll<Option<Result<Frame<Bytes>, axum::Error>>> {
        if let Poll::Ready(frame) = Pin::new(&mut self.inner).poll_frame(cx) {
            return Poll::Ready(frame);
        }
        if self.sleep.as_mut().poll(cx).is_ready() {
            self.expired.store(true, Ordering::Release);
            return Poll::Ready(Some(Err(axum::Error::new(BodyTimedOut))));
        }
        Poll::Pending
    }

    fn is_end_stream(&self) -> bool {
        self.inner.is_end_stream()
    }

    fn size_hint(&self) -> SizeHint {
        self.inner.size_hint()
    }
}

/// What a JSON-only endpoint asks for in its 415.
pub const JSON_ONLY: &str = "JSON with `Content-Type: application/json`";

/// Checks that the body is declared as JSON (`application/json` or any `+json` type).
pub fn require_json(headers: &HeaderMap) -> Result<(), ApiError> {
    let got = headers
        .get(header::CONTENT_TYPE)
        .and_then(|v| v.to_str().ok())
        .unwrap_or("");
    let essence = got
        .split(';')
        .next()
        .unwrap_or("")
        .trim()
        .to_ascii_lowercase();
    if essence == "application/json"
        || (essence.starts_with("application/") && essence.ends_with("+json"))
    {
        Ok(())
    } else {
        Err(ApiError::UnsupportedMediaType {
            got: if got.is_empty() {
                "no Content-Type".into()
            } else {
                got.into()
            },
            accepted: JSON_ONLY,
        })
    }
}

/// Turns the body extractor's rejection into our problem shape.
pub fn rejection(r: BytesRejection, limit: usize) -> ApiError {
    if r.status() == StatusCode::PAYLOAD_TOO_LARGE {
        ApiError::TooLarge {
            pointer: String::new(),
            detail: format!("the body is larger than this service's limit of {limit} bytes: send a smaller request, or post the raster to /rasters once and refer to it"),
        }
    } else {
        ApiError::MalformedJson {
            pointer: String::new(),
            detail: format!("the body could not be read: {}", r.body_text()),
        }
    }
}

/// Fails when arrays and objects nest deeper than `limit`, scanning bytes only (no allocation),
/// so a hostile body cannot make the parser recurse.
pub fn check_depth(bytes: &[u8], limit: usize) -> Result<(), ApiError> {
    let (mut depth, mut in_string, mut escaped) = (0usize, false, false);
    for (i, &b) in bytes.iter().enumerate() {
        if in_string {
            match (escaped, b) {
                (true, _) => escaped = false,
                (false, b'\\') => escaped = true,
                (false, b'"') => in_string = false,
                _ => {}
            }
            continue;
        }
        match b {
            b'"' => in_string = true,
            b'[' | b'{' => {
                depth += 1;
                if depth > limit {
                    return Err(ApiError::NestingTooDeep { limit, offset: i });
                }
            }
            b']' | b'}' => depth = depth.saturating_sub(1),
            _ => {}
        }
    }
    Ok(())
}

/// Parses `bytes` as `T`; the error names the failing field as a JSON pointer.
pub fn parse<T: DeserializeOwned>(bytes: &[u8]) -> Result<T, ApiError> {
    let mut de = serde_json::Deserializer::from_slice(bytes);
    let value: T = serde_path_to_error::deserialize(&mut de).map_err(|e| {
        let pointer = pointer_of(e.path());
        let inner = e.into_inner();
        ApiError::MalformedJson {
            pointer,
            detail: describe(&inner),
        }
    })?;
    de.end().map_err(|e| ApiError::MalformedJson {
        pointer: String::new(),
        detail: describe(&e),
    })?;
    Ok(value)
}

fn describe(e: &serde_json::Error) -> String {
    use serde_json::error::Category;
    let hint = match e.classify() {
        Category::Syntax => {
            ": the body is not valid JSON (note JSON has no NaN or Infinity: use null for nodata)"
        }
        Category::Eof => ": the body ends early",
        Category::Data => "",
        Category::Io => "",
    };
    format!("{e}{hint}")
}

/// `inputs.raster.values[3]` as `/inputs/raster/values/3`.
pub(crate) fn pointer_of(path: &serde_path_to_error::Path) -> String {
    use serde_path_to_error::Segment;
    let mut out = String::new();
    for seg in path.iter() {
        match seg {
            Segment::Seq { index } => out.push_str(&format!("/{index}")),
            Segment::Map { key } => {
                out.push_str(&format!("/{}", key.replace('~', "~0").replace('/', "~1")))
            }
            Segment::Enum { variant } => out.push_str(&format!("/{variant}")),
            Segment::Unknown => {}
        }
    }
    out
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn depth_ignores_brackets_in_strings() {
        assert!(check_depth(br#"{"a": "[[[[[[[[[[", "b": [[1]]}"#, 3).is_ok());
        assert!(check_depth(br#"{"a": [[[1]]]}"#, 3).is_err());
        assert!(check_depth(br#"{"a": "\"[[[[", "b": 1}"#, 1).is_ok());
    }

    #[test]
    fn pointers_name_the_failing_element() {
        #[derive(serde::Deserialize, Debug)]
        #[allow(dead_code)]
        struct Doc {
            values: Vec<Option<f64>>,
        }
        let err = parse::<Doc>(br#"{"values": [0.1, null, "x"]}"#).unwrap_err();
        match err {
            ApiError::MalformedJson { pointer, .. } => assert_eq!(pointer, "/values/2"),
            other => panic!("unexpected {other:?}"),
        }
    }
}

//! Reading JSON request bodies: media type, size, nesting depth, then serde with the path of the
//! first error turned into a JSON pointer. Extractor rejections land here too, so every
//! malformed body gets a problem document of the same shape.

use axum::extract::rejection::BytesRejection;
use axum::http::{header, HeaderMap, StatusCode};
use serde::de::DeserializeOwned;

use super::problem::ApiError;

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
fn pointer_of(path: &serde_path_to_error::Path) -> String {
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

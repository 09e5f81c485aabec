//! The process registry: every OGC process the service offers, behind one trait, so a new
//! process is one file and one line in `registry`.
//!
//! A process parses and validates its execute body (`prepare`, on a blocking thread), which
//! yields a `Prepared` computation with its planned cost; running it (also on the pool) yields
//! the JSON of its one output. Processes know the wire format and the engine, never HTTP.

mod cell_posterior;
mod zone_counts;

use std::collections::BTreeMap;
use std::sync::Arc;

use bytes::Bytes;
use serde::Deserialize;
use serde_json::Value;

use super::problem::ApiError;
use super::state::AppState;
use super::wire::{DecodeError, RasterInput};
use crate::engine::{Control, EngineError, Raster};

/// Every process offered, in listing order.
pub fn registry() -> Vec<Arc<dyn Process>> {
    vec![
        Arc::new(zone_counts::ZoneCounts),
        Arc::new(cell_posterior::CellPosteriorProcess),
    ]
}

pub trait Process: Send + Sync + 'static {
    fn id(&self) -> &'static str;
    fn title(&self) -> &'static str;
    fn description(&self) -> &'static str;
    /// The id of the one output.
    fn output(&self) -> &'static str;
    /// The OGC `inputs` map: id -> {title, description, schema, minOccurs, maxOccurs}.
    fn inputs(&self) -> Value;
    /// The OGC `outputs` map.
    fn outputs(&self) -> Value;
    /// Parses and validates an execute body. Runs on a blocking thread, never the async workers.
    fn prepare(
        &self,
        body: &[u8],
        state: &AppState,
    ) -> Result<(ResponseMode, Box<dyn Prepared>), ApiError>;
}

/// A validated execution, ready to run.
pub trait Prepared: Send {
    /// The planner's estimated multiply-adds.
    fn estimated_cost(&self) -> f64;
    /// Cells the computation goes through, for the cells-processed counter.
    fn cells(&self) -> u64;
    /// Computes the output and returns its JSON. Runs on the compute pool.
    fn run(self: Box<Self>, state: &AppState, control: &Control) -> Result<Bytes, ApiError>;
}

/// `response` of the execute body: the output alone (`raw`, the default) or `{output: ...}`.
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq, Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum ResponseMode {
    #[default]
    Raw,
    Document,
}

/// What the client asks of one output.
#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
struct OutputRequest {
    #[serde(default)]
    #[allow(dead_code)] // accepted and ignored: the only format is JSON
    format: Option<Value>,
    #[serde(default, rename = "transmissionMode")]
    transmission_mode: Option<String>,
}

/// The execute body of OGC API - Processes 1.0, generic over the process's inputs.
#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
struct ExecuteBody<I> {
    inputs: I,
    #[serde(default)]
    outputs: Option<BTreeMap<String, OutputRequest>>,
    #[serde(default)]
    response: Option<ResponseMode>,
}

/// Parses an execute body whose inputs are `I`, checking the requested outputs.
pub(crate) fn parse_execute<I: serde::de::DeserializeOwned>(
    body: &[u8],
    output: &str,
) -> Result<(I, ResponseMode), ApiError> {
    let parsed: ExecuteBody<I> = super::body::parse(body)?;
    for (id, req) in parsed.outputs.iter().flatten() {
        if id != output {
            return Err(ApiError::InvalidInput {
                pointer: format!("/outputs/{id}"),
                detail: format!("this process has no output `{id}`: its one output is `{output}`"),
            });
        }
        if let Some(mode) = &req.transmission_mode {
            if mode != "value" {
                return Err(ApiError::InvalidInput {
                    pointer: format!("/outputs/{id}/transmissionMode"),
                    detail: format!(
                        "transmission mode `{mode}` is not offered: outputs are sent by `value`"
                    ),
                });
            }
        }
    }
    Ok((parsed.inputs, parsed.response.unwrap_or_default()))
}

/// The raster of a request, from the cache when referenced, hashed and kept when inline.
pub(crate) fn resolve_raster(
    input: RasterInput,
    state: &AppState,
) -> Result<(String, Arc<Raster>), ApiError> {
    match input {
        RasterInput::Ref(r) => {
            if !super::cache::is_hash(&r.reference) {
                return Err(ApiError::InvalidInput {
                    pointer: "/inputs/raster/ref".into(),
                    detail: format!("`{}` is not a raster reference: it must be `sha256:` and 64 lowercase hex digits, as returned by POST /rasters", r.reference),
                });
            }
            let held =
                state
                    .caches()
                    .raster(&r.reference)
                    .ok_or_else(|| ApiError::UnknownRaster {
                        pointer: "/inputs/raster/ref".into(),
                        reference: r.reference.clone(),
                    })?;
            Ok((r.reference, held))
        }
        RasterInput::Inline(spec) => {
            let raster = super::wire::decode_raster(spec, &state.config().limits())
                .map_err(|e| ApiError::from_decode(e, "/inputs"))?;
            Ok(state.caches().keep_raster(raster))
        }
    }
}

/// Refuses a total the raster cannot produce before any work is queued for it.
pub(crate) fn check_total(raster: &Raster, total: u64) -> Result<(), ApiError> {
    let s = raster.stats();
    let most = s.certain + s.free;
    let detail = if total < s.certain {
        format!("observed total {total} is impossible: {} cells have p = 1, so at least {} events happened", s.certain, s.certain)
    } else if total > most {
        format!("observed total {total} is impossible: only {most} cells have p > 0, so at most {most} events can happen")
    } else {
        return Ok(());
    };
    Err(ApiError::InvalidInput {
        pointer: "/inputs/evidence/total".into(),
        detail,
    })
}

/// Maps an engine error to the request field to blame (inputs were validated, so these are rare).
pub(crate) fn engine_error(e: EngineError) -> ApiError {
    match e {
        EngineError::Cancelled => ApiError::Cancelled,
        EngineError::TooLarge(detail) => ApiError::TooLarge {
            pointer: "/inputs".into(),
            detail,
        },
        other => {
            let pointer = format!("/inputs{}", super::wire::engine_pointer(&other));
            ApiError::InvalidInput {
                pointer,
                detail: other.to_string(),
            }
        }
    }
}

pub(crate) fn check_cost(cost: f64, state: &AppState) -> Result<(), ApiError> {
    let max = state.config().max_cost;
    if cost > max {
        return Err(ApiError::from_decode(
            DecodeError::limit(
                "/zones",
                format!("the planned cost {cost:.3e} exceeds this service's limit of {max:.3e}: send fewer or smaller zones, or split the area"),
            ),
            "/inputs",
        ));
    }
    Ok(())
}

/// The JSON schema of a wire type, with its `$ref`s pointing into the served OpenAPI document
/// so a process description stands on its own.
pub(crate) fn schema_of<T: utoipa::PartialSchema>() -> Value {
    let mut v = serde_json::to_value(T::schema()).unwrap_or(Value::Null);
    retarget_refs(&mut v);
    v
}

fn retarget_refs(v: &mut Value) {
    match v {
        Value::Object(map) => {
            for (k, child) in map.iter_mut() {
                if k == "$ref" {
                    if let Value::String(s) = child {
                        if s.starts_with("#/components/") {
                            *s = format!("/openapi.json{s}");
                        }
                    }
                } else {
                    retarget_refs(child);
                }
            }
        }
        Value::Array(items) => items.iter_mut().for_each(retarget_refs),
        _ => {}
    }
}

/// One entry of an OGC `inputs` map.
pub(crate) fn input(title: &str, description: &str, schema: Value, min: u32) -> Value {
    serde_json::json!({"title": title, "description": description, "schema": schema, "minOccurs": min, "maxOccurs": 1})
}

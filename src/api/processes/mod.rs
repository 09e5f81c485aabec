//! The process registry: every OGC process the service offers, behind one trait, so a new
//! process is one file and one line in `registry`.
//!
//! A process parses its execute body and decodes it through `decode` (on a blocking thread),
//! which yields a `Prepared` computation with its planned cost; running it (on the compute pool)
//! yields the JSON of its one output. Processes see a narrow `Context` (limits, where rasters
//! and normalisers come from), never the service's state or HTTP; `zonetally eval` builds its
//! own context and runs the same code.

pub mod cell_posterior;
pub mod scenarios;
pub mod total_check;
pub mod zone_counts;

use std::collections::BTreeMap;
use std::sync::Arc;

use bytes::Bytes;
use serde::Deserialize;
use serde_json::Value;

use super::decode::{DecodeError, Limits, RasterSource};
use super::formats::{self, Format};
use super::problem::ApiError;
use crate::engine::{Control, EngineError, Evidence, Normaliser, Raster};

/// Every process offered, in listing order.
pub fn registry() -> Vec<Arc<dyn Process>> {
    vec![
        Arc::new(zone_counts::ZoneCounts),
        Arc::new(cell_posterior::CellPosteriorProcess),
        Arc::new(total_check::TotalCheckProcess),
        Arc::new(scenarios::ScenariosProcess),
    ]
}

/// Where normalisers come from: the service's cache, or computed on the spot.
pub trait NormaliserSource: Sync {
    /// The normaliser of (raster, evidence); `raster_key` names the raster in its source.
    fn normaliser(
        &self,
        raster_key: Option<&str>,
        raster: &Raster,
        evidence: &Evidence,
        control: &Control,
    ) -> Result<Arc<Normaliser>, EngineError>;
}

/// Computes every normaliser afresh (the command line's source).
pub struct Uncached;

impl NormaliserSource for Uncached {
    fn normaliser(
        &self,
        _: Option<&str>,
        raster: &Raster,
        evidence: &Evidence,
        control: &Control,
    ) -> Result<Arc<Normaliser>, EngineError> {
        Normaliser::of(raster, evidence, control).map(Arc::new)
    }
}

/// What a process may use: its limits, and where rasters and normalisers come from.
#[derive(Clone, Copy)]
pub struct Context<'a> {
    pub limits: Limits,
    pub rasters: &'a dyn RasterSource,
    pub normalisers: &'a dyn NormaliserSource,
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
    /// The formats its output is offered in, JSON first.
    fn formats(&self) -> &'static [Format];
    /// Parses and validates an execute body; `accept` is the request's `Accept` header, which
    /// chooses the output format when the body does not. Runs on a blocking thread, never the
    /// async workers.
    fn prepare(
        &self,
        body: &[u8],
        accept: Option<&str>,
        ctx: &Context,
    ) -> Result<(ResponseMode, Box<dyn Prepared>), ApiError>;
}

/// A validated execution, ready to run.
pub trait Prepared: Send {
    /// The planner's estimated multiply-adds.
    fn estimated_cost(&self) -> f64;
    /// Cells the computation goes through, for the cells-processed counter.
    fn cells(&self) -> u64;
    /// Bytes the request holds while it waits and runs, and its results will take: charged to
    /// the memory budget. Rasters are not counted: the raster cache holds and bounds them.
    fn held_bytes(&self) -> u64;
    /// Computes the output in the format chosen at `prepare`. Runs on the compute pool.
    fn run(self: Box<Self>, ctx: &Context, control: &Control) -> Result<Output, ApiError>;
}

/// An encoded output and its format.
#[derive(Clone, Debug, PartialEq)]
pub struct Output {
    pub body: Bytes,
    pub format: Format,
}

/// `response` of the execute body: the output alone (`raw`, the default) or `{output: ...}`.
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq, Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum ResponseMode {
    #[default]
    Raw,
    Document,
}

/// The format asked of one output (OGC API - Processes `format`).
#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
struct FormatRequest {
    #[serde(default, rename = "mediaType")]
    media_type: Option<String>,
    /// Accepted and unused: outputs are sent in their media type's own encoding.
    #[serde(default)]
    #[allow(dead_code)]
    encoding: Option<String>,
    /// Accepted and unused: each output has one schema.
    #[serde(default)]
    #[allow(dead_code)]
    schema: Option<Value>,
}

/// What the client asks of one output.
#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
struct OutputRequest {
    #[serde(default)]
    format: Option<FormatRequest>,
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

/// Parses an execute body whose inputs are `I`, checking the requested outputs and choosing
/// the output format among `supported` (the body's `mediaType`, else `accept`, else JSON).
pub(crate) fn parse_execute<I: serde::de::DeserializeOwned>(
    body: &[u8],
    output: &str,
    accept: Option<&str>,
    supported: &[Format],
) -> Result<(I, ResponseMode, Format), ApiError> {
    let parsed: ExecuteBody<I> = super::body::parse(body)?;
    let mut requested: Option<(String, String)> = None;
    for (id, req) in parsed.outputs.iter().flatten() {
        if let Some(media_type) = req.format.as_ref().and_then(|f| f.media_type.clone()) {
            requested = Some((format!("/outputs/{id}/format/mediaType"), media_type));
        }
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
    let format = formats::choose(
        requested.as_ref().map(|(p, m)| (p.as_str(), m.as_str())),
        accept,
        supported,
    )?;
    let mode = parsed.response.unwrap_or_default();
    if mode == ResponseMode::Document && format != Format::Json {
        return Err(ApiError::InvalidInput {
            pointer: "/response".into(),
            detail: format!(
                "a `document` response wraps JSON, but the output is asked as `{}`: drop `response` (or use `raw`) to get the file itself",
                format.media_type()
            ),
        });
    }
    Ok((parsed.inputs, mode, format))
}

/// Refuses a planned cost above the limit; `pointer` names what to send less of.
pub(crate) fn check_cost(cost: f64, limits: &Limits, pointer: &str) -> Result<(), DecodeError> {
    let max = limits.max_cost;
    if cost > max {
        return Err(DecodeError::limit(
            pointer,
            format!("the planned cost {cost:.3e} exceeds this service's limit of {max:.3e}: send fewer or smaller zones, or split the area"),
        ));
    }
    Ok(())
}

/// An engine error raised while running a decoded request. Inputs were validated, so anything
/// but cancellation, or evidence whose totals have no prior mass f64 can hold (found only when
/// the normaliser runs), is a fault of ours.
pub(crate) fn run_error(e: EngineError) -> ApiError {
    match e {
        EngineError::Cancelled => ApiError::Cancelled,
        EngineError::ImpossibleEvidence(detail) => ApiError::Unusable {
            pointer: "/evidence/total".into(),
            detail,
        },
        other => ApiError::Internal {
            cause: format!("a decoded request failed in the engine: {other}"),
        },
    }
}

/// Encodes an output document as compact JSON.
pub(crate) fn to_json<T: serde::Serialize>(doc: &T) -> Result<Output, ApiError> {
    serde_json::to_vec(doc)
        .map(|body| Output {
            body: Bytes::from(body),
            format: Format::Json,
        })
        .map_err(|e| ApiError::Internal {
            cause: format!("cannot encode results: {e}"),
        })
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

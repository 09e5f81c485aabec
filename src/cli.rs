//! Command-line entry points other than the service: `eval` reads a request document (or a
//! raster file, a zones file and a total) and prints the results. It decodes and computes
//! through the same code as the `zone-counts` process, with a context of its own: rasters
//! inline or read from local files, references refused, normalisers computed afresh.

use std::io::Read;

use serde_json::value::RawValue;

use crate::api::decode::{Limits, LocalFiles};
use crate::api::formats::Format;
use crate::api::processes::{registry, zone_counts, Context, Process, Uncached};
use crate::api::wire::{
    EvalRequest, EvidenceSpec, RasterHref, RasterInput, RasterSpec, SummariesSpec, ZoneOptions,
};
use crate::engine::Control;

/// A command-line failure: the message to print and the exit code (2 for bad input).
#[derive(Debug)]
pub struct CliError {
    pub message: String,
    pub code: i32,
}

impl CliError {
    fn input(message: String) -> CliError {
        CliError { message, code: 2 }
    }
}

/// What `zonetally eval` was asked: a request document, or the raster, zones and total as
/// files and flags (which build the same document).
#[derive(Debug, Default, clap::Args)]
pub struct EvalArgs {
    /// Path of the request document (the process's inputs), or - for standard input. Not with
    /// --raster.
    pub request: Option<String>,
    /// The process to run on the request document: zone-counts, cell-posterior, total-check
    /// or scenarios.
    #[arg(long, default_value = "zone-counts")]
    pub process: String,
    /// The probability raster: a GeoTIFF (.tif, .tiff) or a JSON raster (as `inputs.raster`).
    #[arg(long, requires_all = ["zones", "total"], conflicts_with = "request")]
    pub raster: Option<String>,
    /// Factor applied to the raster's stored values (0.01 for percent, 1/255 for bytes).
    #[arg(long, requires = "raster")]
    pub scale: Option<f64>,
    /// The zones: a GeoJSON Feature or FeatureCollection of polygons, or a JSON list of zones.
    #[arg(long, requires = "raster")]
    pub zones: Option<String>,
    /// The observed total number of events over the raster.
    #[arg(long, requires = "raster")]
    pub total: Option<u64>,
    /// Take each GeoJSON zone's id from this property instead of the feature `id`.
    #[arg(long, requires = "raster")]
    pub id_property: Option<String>,
    /// Count every cell a polygon touches (default: cells whose centre lies inside).
    #[arg(long, requires = "raster")]
    pub all_touched: bool,
    /// Credible level of the interval (default 0.9).
    #[arg(long, requires = "raster")]
    pub interval: Option<f64>,
    /// Exceedance thresholds k for P(N >= k), comma-separated.
    #[arg(long, requires = "raster", value_delimiter = ',')]
    pub exceedance: Vec<u64>,
    /// Output format: json (default), geojson or csv.
    #[arg(long, default_value = "json")]
    pub format: String,
    /// Write the results to this file instead of standard output.
    #[arg(long)]
    pub out: Option<std::path::PathBuf>,
}

fn read_text(path: &str, what: &str) -> Result<String, CliError> {
    if path == "-" {
        let mut s = String::new();
        std::io::stdin()
            .read_to_string(&mut s)
            .map_err(|e| CliError::input(format!("cannot read standard input: {e}")))?;
        return Ok(s);
    }
    std::fs::read_to_string(path)
        .map_err(|e| CliError::input(format!("cannot read {what} `{path}`: {e}")))
}

fn is_tiff_path(path: &str) -> bool {
    let lower = path.to_ascii_lowercase();
    lower.ends_with(".tif") || lower.ends_with(".tiff")
}

/// The request document `args` describe.
fn request_of(args: &EvalArgs) -> Result<EvalRequest, CliError> {
    let Some(raster_path) = &args.raster else {
        let path = args.request.as_deref().ok_or_else(|| {
            CliError::input(
                "give a request document (a file, or - for standard input), or --raster, --zones and --total".into(),
            )
        })?;
        let text = read_text(path, "the request document")?;
        return serde_json::from_str(&text).map_err(|e| {
            CliError::input(format!(
                "`{path}` is not a valid request document: {e} (see README.md for the fields)"
            ))
        });
    };
    let raster = if is_tiff_path(raster_path) {
        RasterInput::Href(RasterHref {
            href: raster_path.clone(),
            scale: args.scale,
        })
    } else {
        let text = read_text(raster_path, "the raster")?;
        let mut spec: RasterSpec = serde_json::from_str(&text)
            .map_err(|e| CliError::input(format!("`{raster_path}` is not a JSON raster: {e}")))?;
        if args.scale.is_some() {
            spec.scale = args.scale;
        }
        RasterInput::Inline(spec)
    };
    let zones_path = args.zones.as_deref().unwrap_or("-");
    let text = read_text(zones_path, "the zones")?;
    let zones = RawValue::from_string(text)
        .map_err(|e| CliError::input(format!("`{zones_path}` is not JSON: {e}")))?;
    let zone_options = (args.id_property.is_some() || args.all_touched).then(|| ZoneOptions {
        id_property: args.id_property.clone(),
        all_touched: args.all_touched.then_some(true),
    });
    Ok(EvalRequest {
        raster,
        zones,
        zone_options,
        evidence: EvidenceSpec::exact(args.total.unwrap_or_default()),
        summaries: SummariesSpec {
            interval: args.interval,
            exceedance: (!args.exceedance.is_empty()).then(|| args.exceedance.clone()),
            ..SummariesSpec::default()
        },
    })
}

/// Runs `zonetally eval`: builds or reads the request, decodes and computes it exactly as the
/// `zone-counts` process does, and returns the results in the chosen format (JSON pretty).
pub fn eval(args: &EvalArgs) -> Result<Vec<u8>, CliError> {
    if args.process != zone_counts::ZoneCounts.id() {
        return eval_other(args);
    }
    let format = Format::from_name(&args.format)
        .filter(|f| zone_counts::FORMATS.contains(f))
        .ok_or_else(|| {
            CliError::input(format!(
                "--format `{}` is not offered: give json, geojson or csv",
                args.format
            ))
        })?;
    let request = request_of(args)?;
    let ctx = Context {
        limits: Limits::default(),
        rasters: &LocalFiles,
        normalisers: &Uncached,
    };
    let mut counts = zone_counts::prepare(request, &ctx).map_err(|e| {
        let pointer = if e.pointer.is_empty() {
            "/"
        } else {
            &e.pointer
        };
        CliError::input(format!("{pointer}: {}", e.detail))
    })?;
    counts.format = format;
    let doc = zone_counts::compute(&counts, &ctx, &Control::new()).map_err(|e| CliError {
        message: format!("the computation failed: {e}"),
        code: 1,
    })?;
    let fault = |message: String| CliError { message, code: 1 };
    let mut bytes = if format == Format::Json {
        serde_json::to_vec_pretty(&doc).map_err(|e| fault(format!("cannot encode results: {e}")))?
    } else {
        zone_counts::encode(&counts, &doc)
            .map_err(|e| fault(format!("cannot encode results: {e:?}")))?
            .body
            .to_vec()
    };
    if format != Format::Csv {
        bytes.push(b'\n');
    }
    Ok(bytes)
}

/// Runs a process other than `zone-counts` on a request document of its inputs, through the
/// process's own decoding, and returns its output as the service would send it.
fn eval_other(args: &EvalArgs) -> Result<Vec<u8>, CliError> {
    let processes = registry();
    let process = processes
        .iter()
        .find(|p| p.id() == args.process)
        .ok_or_else(|| {
            let ids: Vec<&str> = processes.iter().map(|p| p.id()).collect();
            CliError::input(format!(
                "--process `{}` is not offered: give one of {}",
                args.process,
                ids.join(", ")
            ))
        })?;
    if args.raster.is_some() {
        return Err(CliError::input(format!(
            "--raster, --zones and --total build a zone-counts request: give `{}` a request document",
            args.process
        )));
    }
    let format = Format::from_name(&args.format)
        .filter(|f| process.formats().contains(f))
        .ok_or_else(|| {
            let names: Vec<&str> = process.formats().iter().map(|f| f.name()).collect();
            CliError::input(format!(
                "--format `{}` is not offered by `{}`: give {}",
                args.format,
                args.process,
                names.join(" or ")
            ))
        })?;
    let path = args.request.as_deref().ok_or_else(|| {
        CliError::input("give a request document (a file, or - for standard input)".into())
    })?;
    let text = read_text(path, "the request document")?;
    let inputs = RawValue::from_string(text)
        .map_err(|e| CliError::input(format!("`{path}` is not JSON: {e}")))?;
    let body = serde_json::to_vec(&serde_json::json!({ "inputs": inputs }))
        .map_err(|e| CliError::input(format!("`{path}` cannot be read: {e}")))?;
    let ctx = Context {
        limits: Limits::default(),
        rasters: &LocalFiles,
        normalisers: &Uncached,
    };
    let refused = |e: crate::api::problem::ApiError| {
        let problem = e.problem();
        let code = if e.status().is_server_error() { 1 } else { 2 };
        let pointer = problem.pointer.as_deref().unwrap_or("/");
        // The document read is the `inputs` of an execute body: name pointers within it.
        let pointer = pointer.strip_prefix("/inputs").unwrap_or(pointer);
        let pointer = if pointer.is_empty() { "/" } else { pointer };
        CliError {
            message: format!("{pointer}: {}", problem.detail),
            code,
        }
    };
    let (_, prepared) = process
        .prepare(&body, Some(format.media_type()), &ctx)
        .map_err(refused)?;
    let output = prepared.run(&ctx, &Control::new()).map_err(refused)?;
    let mut bytes = output.body.to_vec();
    if output.format != Format::GeoTiff && output.format != Format::Csv {
        bytes.push(b'\n');
    }
    Ok(bytes)
}

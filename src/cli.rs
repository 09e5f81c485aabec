//! Command-line entry points other than the service: `eval` reads a request document and prints
//! the results document. It decodes and computes through the same code as the `zone-counts`
//! process, with a context of its own: rasters inline only, normalisers computed afresh.

use std::io::Read;

use crate::api::decode::{InlineOnly, Limits};
use crate::api::processes::{zone_counts, Context, Uncached};
use crate::api::wire::EvalRequest;
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

/// Reads a request document from `path` (`-` for standard input) and returns the results
/// document as pretty JSON.
pub fn eval(path: &str) -> Result<String, CliError> {
    let text = if path == "-" {
        let mut s = String::new();
        std::io::stdin()
            .read_to_string(&mut s)
            .map_err(|e| CliError::input(format!("cannot read standard input: {e}")))?;
        s
    } else {
        std::fs::read_to_string(path)
            .map_err(|e| CliError::input(format!("cannot read `{path}`: {e}")))?
    };
    let request: EvalRequest = serde_json::from_str(&text).map_err(|e| {
        CliError::input(format!(
            "`{path}` is not a valid request document: {e} (see README.md for the fields)"
        ))
    })?;
    let ctx = Context {
        limits: Limits::default(),
        rasters: &InlineOnly,
        normalisers: &Uncached,
    };
    let counts = zone_counts::prepare(request, &ctx).map_err(|e| {
        let pointer = if e.pointer.is_empty() {
            "/"
        } else {
            &e.pointer
        };
        CliError::input(format!("{pointer}: {}", e.detail))
    })?;
    let doc = zone_counts::compute(&counts, &ctx, &Control::new()).map_err(|e| CliError {
        message: format!("the computation failed: {e}"),
        code: 1,
    })?;
    serde_json::to_string_pretty(&doc).map_err(|e| CliError {
        message: format!("cannot encode results: {e}"),
        code: 1,
    })
}

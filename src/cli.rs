//! Command-line entry points other than the service: `eval` reads a request document and prints
//! the results document.

use std::io::Read;

use crate::api::wire::{self, EvalRequest, Limits, ResultsDocument};
use crate::engine::{self, Control};

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
    let decoded = wire::decode(request, &Limits::default()).map_err(|e| {
        CliError::input(format!(
            "{}: {}",
            if e.pointer.is_empty() {
                "/"
            } else {
                &e.pointer
            },
            e.detail
        ))
    })?;
    let evaluation = engine::evaluate(
        &decoded.raster,
        &decoded.zones,
        decoded.total,
        &decoded.settings,
        &Control::new(),
    )
    .map_err(|e| CliError::input(format!("{}: {e}", wire::engine_pointer(&e))))?;
    let doc = ResultsDocument::from(evaluation);
    serde_json::to_string_pretty(&doc).map_err(|e| CliError {
        message: format!("cannot encode results: {e}"),
        code: 1,
    })
}

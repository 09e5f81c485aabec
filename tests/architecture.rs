//! The layering written down in DEVELOPERS.md, checked on the source text:
//!
//! - `engine` knows nothing of HTTP, async runtimes, JSON or files, and never does IO;
//! - `geo` decodes the bytes it is handed: no file or network IO, no HTTP, no async runtime;
//! - `jobs` knows no HTTP and no JSON;
//! - `api` touches job state only through `jobs::Jobs` (it never names a store);
//! - processes see their narrow `Context`, never the service's state;
//! - inside `api`, only `decode` builds the engine's validated input types.

use std::path::{Path, PathBuf};

fn rust_files(dir: &Path, out: &mut Vec<PathBuf>) {
    for entry in std::fs::read_dir(dir).expect("source folder is readable") {
        let path = entry.expect("directory entry").path();
        if path.is_dir() {
            rust_files(&path, out);
        } else if path.extension().is_some_and(|e| e == "rs") {
            out.push(path);
        }
    }
}

/// The code lines of every file under `src/<folder>` (comments and unit tests left out), as
/// (file, line number, code).
fn code_of(folder: &str) -> Vec<(PathBuf, usize, String)> {
    let mut files = Vec::new();
    rust_files(
        &Path::new(env!("CARGO_MANIFEST_DIR"))
            .join("src")
            .join(folder),
        &mut files,
    );
    assert!(!files.is_empty(), "found the files of src/{folder}");
    let mut out = Vec::new();
    for file in files {
        let text = std::fs::read_to_string(&file).expect("source file is readable");
        let code = text.split("#[cfg(test)]").next().unwrap_or("");
        for (n, line) in code.lines().enumerate() {
            let line = line.split("//").next().unwrap_or("").to_string();
            out.push((file.clone(), n + 1, line));
        }
    }
    out
}

/// Lines of `folder` (files for which `skip` is false) that mention any of `words`.
fn mentions(folder: &str, words: &[&str], skip: impl Fn(&Path) -> bool) -> Vec<String> {
    let mut hits = Vec::new();
    for (file, n, code) in code_of(folder) {
        if skip(&file) {
            continue;
        }
        for word in words {
            if code.contains(word) {
                hits.push(format!("{}:{n}: {word}", file.display()));
            }
        }
    }
    hits
}

fn assert_none(what: &str, hits: Vec<String>) {
    assert!(hits.is_empty(), "{what}:\n{}", hits.join("\n"));
}

#[test]
fn engine_knows_nothing_of_http_async_json_or_files() {
    let words = [
        "axum", "tokio", "serde", "hyper", "std::fs", "std::net", "std::io", "utoipa",
    ];
    assert_none(
        "the engine must stay pure",
        mentions("engine", &words, |_| false),
    );
}

#[test]
fn geo_does_no_io_and_knows_no_http_or_async_runtime() {
    let words = [
        "axum", "tokio", "hyper", "utoipa", "reqwest", "std::fs", "std::net", "File::",
    ];
    assert_none(
        "geo decodes the bytes it is handed",
        mentions("geo", &words, |_| false),
    );
}

#[test]
fn jobs_knows_no_http_or_json() {
    let words = [
        "axum",
        "hyper",
        "http::",
        "utoipa",
        "serde_json",
        "StatusCode",
    ];
    assert_none(
        "jobs keeps opaque bodies",
        mentions("jobs", &words, |_| false),
    );
}

#[test]
fn api_touches_job_state_only_through_the_job_manager() {
    let words = ["JobStore", "MemoryStore", "jobs::lifecycle"];
    assert_none(
        "api must go through jobs::Jobs",
        mentions("api", &words, |_| false),
    );
}

#[test]
fn processes_see_a_narrow_context() {
    let words = ["AppState", "state::", "axum"];
    assert_none(
        "processes must not reach the service state or HTTP",
        mentions("api/processes", &words, |_| false),
    );
}

#[test]
fn only_decode_builds_validated_engine_inputs_in_the_api() {
    let words = [
        "Raster::new",
        "Raster::from_probabilities",
        "Zone::new",
        "ZoneSet::new",
        "Settings::new",
        "Evidence::exact_total",
        "CellSelection::new",
    ];
    let hits = mentions("api", &words, |f| f.ends_with("decode.rs"));
    assert_none("decode is the one decoding path", hits);
}

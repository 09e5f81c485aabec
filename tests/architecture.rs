//! The layering written down in DEVELOPERS.md, checked: the engine knows nothing of HTTP, async
//! runtimes, JSON or files, and never does IO.

use std::path::Path;

/// Words that must not appear in `src/engine` (outside comments they would mean a dependency).
const FOREIGN_TO_ENGINE: [&str; 8] = [
    "axum", "tokio", "serde", "hyper", "std::fs", "std::net", "std::io", "utoipa",
];

fn rust_files(dir: &Path, out: &mut Vec<std::path::PathBuf>) {
    for entry in std::fs::read_dir(dir).expect("source folder is readable") {
        let path = entry.expect("directory entry").path();
        if path.is_dir() {
            rust_files(&path, out);
        } else if path.extension().is_some_and(|e| e == "rs") {
            out.push(path);
        }
    }
}

#[test]
fn engine_knows_nothing_of_http_async_json_or_files() {
    let mut files = Vec::new();
    rust_files(
        &Path::new(env!("CARGO_MANIFEST_DIR")).join("src/engine"),
        &mut files,
    );
    assert!(files.len() >= 5, "found the engine's files");
    let mut hits = Vec::new();
    for file in &files {
        let text = std::fs::read_to_string(file).expect("engine file is readable");
        for (n, line) in text.lines().enumerate() {
            let code = line.split("//").next().unwrap_or("");
            for word in FOREIGN_TO_ENGINE {
                if code.contains(word) {
                    hits.push(format!("{}:{}: {word}", file.display(), n + 1));
                }
            }
        }
    }
    assert!(
        hits.is_empty(),
        "the engine must stay pure:\n{}",
        hits.join("\n")
    );
}

//! Numbers in request bodies are read correctly rounded: the service's own body parser
//! (`zonetally::api::body::parse`) against CPython's `float()` bit for bit, on seeded random
//! 17-significant-digit decimals in [0, 1] and on the classic hard cases; and a probability just
//! below 1 stays below 1 through a whole request.
//!
//! reference: CPython float(), correctly rounded (David Gay's algorithm, Python/dtoa.c)

mod service_support;

use std::io::Write;
use std::process::Command;

use axum::body::Body;
use axum::http::{Request, StatusCode};
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use service_support::{config, send, state_with};

/// Decimal strings where parsers go wrong: near-halfway cases, the smallest normal and
/// subnormal numbers, and 2.2250738585072011e-308 (which once hung PHP and Java).
const EDGES: &[&str] = &[
    "0",
    "0.0",
    "1",
    "1.0",
    "1.00000000000000000",
    "0.1",
    "0.30000000000000004",
    "0.9999999999999999",
    "0.99999999999999994",
    "0.99999999999999995",
    "0.999999999999999944488848768742172978818416595458984375",
    "0.99999999999999988897769753748434595763683319091796875",
    "9.9999999999999999e-1",
    "2.2250738585072011e-308",
    "2.2250738585072012e-308",
    "2.2250738585072014e-308",
    "2.225073858507201136057409796709131975934819546351645648e-308",
    "1e-320",
    "1.0e-320",
    "9.8813129168249309e-324",
    "4.9406564584124654e-324",
    "2.4703282292062327e-324",
    "2.4703282292062328e-324",
    "1e-400",
    "5e-324",
    "3e-324",
    "2e-324",
    "7.2057594037927933e-17",
    "0.50000000000000011102230246251565404236316680908203125",
    "0.50000000000000016653345369377348106354475021362304688",
    "1.1102230246251565e-16",
    "0.0000000000000000000000000000000000000001",
];

/// Seeded 17-significant-digit decimals in [0, 1], written plainly (`0.000ddd...`) and in
/// exponent form (`d.ddd...e-k`, down into the subnormals), plus the 17-digit and shortest
/// forms of random doubles in [0, 1).
fn random_decimals(n: usize) -> Vec<String> {
    let mut rng = ChaCha8Rng::seed_from_u64(0x5eed_0017);
    let mut out = Vec::with_capacity(n);
    while out.len() < n {
        let digits: u64 = rng.gen_range(10_000_000_000_000_000u64..100_000_000_000_000_000);
        let s = match out.len() % 4 {
            0 => {
                let zeros = rng.gen_range(0..=20);
                format!("0.{}{digits}", "0".repeat(zeros))
            }
            1 => {
                let d = digits.to_string();
                let k = rng.gen_range(1..=330);
                format!("{}.{}e-{k}", &d[..1], &d[1..])
            }
            2 => format!("{:.16e}", rng.gen::<f64>()),
            _ => format!("{:e}", rng.gen::<f64>()),
        };
        out.push(s);
    }
    out
}

/// CPython's bits for each string, or `None` when there is no python3 to ask.
fn python_bits(strings: &[String]) -> Option<Vec<u64>> {
    if Command::new("python3").arg("--version").output().is_err() {
        return None;
    }
    let file = tempfile_path("zonetally-numbers");
    {
        let mut f = std::fs::File::create(&file).expect("temp file");
        for s in strings {
            writeln!(f, "{s}").unwrap();
        }
    }
    let out = Command::new("python3")
        .arg("-c")
        .arg("import struct, sys\nw = sys.stdout.write\nfor line in open(sys.argv[1]):\n    w('%d\\n' % struct.unpack('<Q', struct.pack('<d', float(line)))[0])\n")
        .arg(&file)
        .output()
        .expect("python3 runs");
    let _ = std::fs::remove_file(&file);
    assert!(
        out.status.success(),
        "python3 failed: {}",
        String::from_utf8_lossy(&out.stderr)
    );
    let bits: Vec<u64> = String::from_utf8(out.stdout)
        .unwrap()
        .lines()
        .map(|l| l.parse().unwrap())
        .collect();
    assert_eq!(
        bits.len(),
        strings.len(),
        "python3 answered for every string"
    );
    Some(bits)
}

fn tempfile_path(stem: &str) -> std::path::PathBuf {
    std::env::temp_dir().join(format!("{stem}-{}.txt", std::process::id()))
}

#[test]
fn body_numbers_match_cpython_bit_for_bit() {
    let mut strings: Vec<String> = EDGES.iter().map(|s| s.to_string()).collect();
    strings.extend(random_decimals(200_000));
    let Some(expected) = python_bits(&strings) else {
        eprintln!("SKIPPED: python3 not found, so CPython's float() cannot be the reference");
        return;
    };
    let body = format!("[{}]", strings.join(","));
    let parsed: Vec<f64> =
        zonetally::api::body::parse(body.as_bytes()).expect("the service's parser reads them");
    assert_eq!(parsed.len(), strings.len());
    let wrong: Vec<String> = strings
        .iter()
        .zip(parsed.iter().zip(&expected))
        .filter(|(_, (got, want))| got.to_bits() != **want)
        .map(|(s, (got, want))| format!("{s}: got {got:e}, CPython {:e}", f64::from_bits(*want)))
        .collect();
    assert!(
        wrong.is_empty(),
        "{} of {} strings read differently from CPython, e.g.:\n{}",
        wrong.len(),
        strings.len(),
        wrong[..wrong.len().min(10)].join("\n")
    );
    assert!(
        parsed[EDGES
            .iter()
            .position(|s| *s == "0.9999999999999999")
            .unwrap()]
            < 1.0
    );
    assert!(parsed[EDGES.iter().position(|s| *s == "1e-320").unwrap()] > 0.0);
}

#[tokio::test]
async fn a_probability_just_below_one_is_not_read_as_one() {
    let (_state, app) = state_with(config());
    // With p read as 1.0 the first cell would hold an event for sure, and a total of 0 would
    // be refused as impossible.
    let body = r#"{"inputs": {
        "raster": {"width": 2, "height": 1, "values": [0.9999999999999999, 0.5]},
        "zones": [{"id": "edge", "cells": [0]}],
        "evidence": {"total": 0}
    }}"#;
    let r = send(
        &app,
        Request::post("/processes/zone-counts/execution")
            .header("content-type", "application/json")
            .body(Body::from(body))
            .unwrap(),
    )
    .await;
    assert_eq!(
        r.status,
        StatusCode::OK,
        "{}",
        String::from_utf8_lossy(&r.body)
    );
    let v = r.json();
    let text = v.to_string();
    assert!(text.contains("\"edge\""), "{text}");
    // Given no event at all, the zone's count is 0 for sure.
    let zone = find_zone(&v, "edge").unwrap_or_else(|| panic!("no zone `edge` in {text}"));
    assert_eq!(zone["mean"].as_f64(), Some(0.0), "{zone}");
}

fn find_zone<'a>(v: &'a serde_json::Value, id: &str) -> Option<&'a serde_json::Value> {
    match v {
        serde_json::Value::Object(m) => {
            if m.get("id").and_then(|i| i.as_str()) == Some(id) && m.contains_key("mean") {
                return Some(v);
            }
            m.values().find_map(|x| find_zone(x, id))
        }
        serde_json::Value::Array(a) => a.iter().find_map(|x| find_zone(x, id)),
        _ => None,
    }
}

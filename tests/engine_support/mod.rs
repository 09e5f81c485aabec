//! Helpers shared by the engine's reference tests (`tests/engine_*.rs`): the accuracy contract
//! as assertions, exact rational arithmetic, seeded random inputs and a driver for the
//! `zonetally eval` binary.
//!
//! Nothing here computes a reference distribution: each test builds its own from an outside
//! source (a closed form, statrs, or exhaustive enumeration in exact arithmetic).

#![allow(dead_code)]

use std::io::Write;
use std::process::{Command, Stdio};

use num_bigint::BigInt;
use num_rational::BigRational;
use num_traits::{One, Signed, ToPrimitive, Zero};
use rand::Rng;
use rand_chacha::ChaCha8Rng;
use zonetally::engine::{self, Control, Evaluation, Raster, Settings, Zone};

/// The accuracy contract of issue 2: every reported probability within this of the exact value...
pub const ABS_TOL: f64 = 1e-13;
/// ... and within this relative error when the exact value is at least `REL_FLOOR`.
pub const REL_TOL: f64 = 1e-9;
pub const REL_FLOOR: f64 = 1e-10;

/// Unit roundoff of f64.
pub const U: f64 = f64::EPSILON / 2.0;

/// Checks one reported probability against an exact value known in f64 to well below the
/// contract (the f64 rounding of a rational or a 60-digit value adds at most 1.1e-16 relative).
pub fn assert_prob(got: f64, want: f64, what: &str) {
    let diff = (got - want).abs();
    assert!(got.is_finite(), "{what}: reported {got}, want {want}");
    assert!(
        diff <= ABS_TOL,
        "{what}: reported {got:e}, exact {want:e}, |diff| {diff:e} > {ABS_TOL:e}"
    );
    if want >= REL_FLOOR {
        let rel = diff / want;
        assert!(
            rel <= REL_TOL,
            "{what}: reported {got:e}, exact {want:e}, relative {rel:e} > {REL_TOL:e}"
        );
    }
}

/// Checks one reported probability against an exact rational, comparing in exact arithmetic.
pub fn assert_prob_exact(got: f64, want: &BigRational, what: &str) {
    let g = rat(got);
    let diff = (&g - want).abs();
    let w = want.to_f64().unwrap_or(f64::NAN);
    assert!(
        diff <= rat(ABS_TOL),
        "{what}: reported {got:e}, exact {w:e}, |diff| {:e} > {ABS_TOL:e}",
        diff.to_f64().unwrap_or(f64::NAN)
    );
    if *want >= rat(REL_FLOOR) {
        let rel = &diff / want;
        assert!(
            rel <= rat(REL_TOL),
            "{what}: reported {got:e}, exact {w:e}, relative {:e} > {REL_TOL:e}",
            rel.to_f64().unwrap_or(f64::NAN)
        );
    }
}

/// The exact value of an f64 as a rational.
pub fn rat(x: f64) -> BigRational {
    BigRational::from_float(x).expect("finite f64")
}

pub fn rat_int(n: u64) -> BigRational {
    BigRational::from_integer(BigInt::from(n))
}

pub fn rzero() -> BigRational {
    BigRational::zero()
}

pub fn rone() -> BigRational {
    BigRational::one()
}

/// C(n, k) exactly.
pub fn binom(n: u64, k: u64) -> BigInt {
    if k > n {
        return BigInt::zero();
    }
    let k = k.min(n - k);
    let mut c = BigInt::one();
    for i in 0..k {
        c = c * BigInt::from(n - i) / BigInt::from(i + 1);
    }
    c
}

/// Is `got` an acceptable value of a quantile "smallest k with CDF(k) >= t" of an exact pmf
/// over 0..? Accepted: the exact answer, and any k whose exact CDF lies within `slack` of the
/// threshold on the right side. The contract fixes probabilities only to within its tolerance, so
/// a CDF that equals the threshold to within it (a tie such as CDF = 1/2 exactly) may resolve
/// either way; the slack passed in is the contract's per-value tolerance times the support size.
pub fn quantile_ok(exact_pmf: &[f64], t: f64, slack: f64, got: u64) -> bool {
    let mut cdf = Vec::with_capacity(exact_pmf.len());
    let mut acc = 0.0;
    for &p in exact_pmf {
        acc += p;
        cdf.push(acc);
    }
    let k = got as usize;
    if k >= cdf.len() {
        return false;
    }
    let reaches = cdf[k] >= t - slack;
    let first = k == 0 || cdf[k - 1] < t + slack;
    reaches && first
}

/// Evaluates with default settings plus `thresholds`, on the calling thread's rayon pool.
pub fn evaluate(raster: &Raster, zones: &[Zone], total: u64, thresholds: Vec<u64>) -> Evaluation {
    let settings = Settings::new(
        engine::DEFAULT_LEVEL,
        thresholds,
        engine::DEFAULT_TOLERANCE,
        true,
    )
    .expect("default settings with thresholds are valid");
    engine::evaluate(raster, zones, total, &settings, &Control::new()).expect("evaluation succeeds")
}

/// The reported pmf as a vector over k = 0 ..= len (zeros outside the reported window).
pub fn dense_pmf(offset: u64, values: &[f64], len: usize) -> Vec<f64> {
    let mut out = vec![0.0; len + 1];
    for (i, &v) in values.iter().enumerate() {
        let k = offset as usize + i;
        assert!(k <= len, "pmf reports k = {k} for a zone of {len} cells");
        out[k] = v;
    }
    out
}

/// L1 distance between two dense pmfs.
pub fn l1(a: &[f64], b: &[f64]) -> f64 {
    assert_eq!(a.len(), b.len());
    a.iter().zip(b).map(|(x, y)| (x - y).abs()).sum()
}

/// Shares of special cells in a random raster.
#[derive(Clone, Copy, Debug)]
pub struct Special {
    pub zeros: f64,
    pub ones: f64,
    pub nodata: f64,
}

impl Special {
    pub const NONE: Special = Special {
        zeros: 0.0,
        ones: 0.0,
        nodata: 0.0,
    };
    /// The same share `s` of p = 0, p = 1 and nodata cells.
    pub fn each(s: f64) -> Special {
        Special {
            zeros: s,
            ones: s,
            nodata: s,
        }
    }
}

/// A seeded random raster: p uniform in `range`, with `special` shares of p = 0, p = 1 and
/// nodata cells.
pub fn random_raster(
    rng: &mut ChaCha8Rng,
    w: u32,
    h: u32,
    range: (f64, f64),
    special: Special,
) -> Raster {
    let Special {
        zeros,
        ones,
        nodata,
    } = special;
    let values = (0..w * h)
        .map(|_| {
            let u: f64 = rng.gen();
            if u < nodata {
                None
            } else if u < nodata + zeros {
                Some(0.0)
            } else if u < nodata + zeros + ones {
                Some(1.0)
            } else {
                Some(rng.gen_range(range.0..=range.1))
            }
        })
        .collect();
    Raster::new(w, h, values).expect("valid raster")
}

/// Valid (not nodata) cells of a raster.
pub fn valid_cells(raster: &Raster) -> Vec<u32> {
    raster
        .values()
        .iter()
        .enumerate()
        .filter(|(_, p)| !p.is_nan())
        .map(|(i, _)| i as u32)
        .collect()
}

/// A random zone of `n` distinct valid cells.
pub fn random_zone(rng: &mut ChaCha8Rng, id: &str, raster: &Raster, n: usize) -> Zone {
    let mut cells = valid_cells(raster);
    for i in 0..n.min(cells.len()) {
        let j = rng.gen_range(i..cells.len());
        cells.swap(i, j);
    }
    cells.truncate(n.max(1));
    Zone::new(id, cells, raster).expect("valid zone")
}

/// Runs `zonetally eval -` on a request document and returns (exit code, stdout, stderr).
pub fn run_eval(request: &str) -> (i32, String, String) {
    let mut child = Command::new(env!("CARGO_BIN_EXE_zonetally"))
        .args(["eval", "-"])
        .stdin(Stdio::piped())
        .stdout(Stdio::piped())
        .stderr(Stdio::piped())
        .spawn()
        .expect("the zonetally binary starts");
    child
        .stdin
        .take()
        .expect("stdin")
        .write_all(request.as_bytes())
        .expect("request written");
    let out = child
        .wait_with_output()
        .expect("the zonetally binary finishes");
    (
        out.status.code().unwrap_or(-1),
        String::from_utf8_lossy(&out.stdout).into_owned(),
        String::from_utf8_lossy(&out.stderr).into_owned(),
    )
}

/// A request document for a raster of values (`None` = nodata), zones as cell lists, a total.
pub fn request_json(
    width: u32,
    height: u32,
    values: &[Option<f64>],
    zones: &[(&str, Vec<u32>)],
    total: u64,
    thresholds: &[u64],
) -> String {
    let zones: Vec<serde_json::Value> = zones
        .iter()
        .map(|(id, cells)| serde_json::json!({"id": id, "cells": cells}))
        .collect();
    serde_json::json!({
        "raster": {"width": width, "height": height, "values": values},
        "zones": zones,
        "evidence": {"total": total},
        "summaries": {"exceedance": thresholds},
    })
    .to_string()
}

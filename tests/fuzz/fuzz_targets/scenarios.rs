//! The scenarios decoder and sampler: any bytes, read as `scenarios` inputs, either decode or
//! give a decoding error with a JSON pointer; nothing panics. Requests small enough are drawn,
//! and every scenario must hold the evidence it was drawn under and fit its zones.
#![no_main]

use libfuzzer_sys::fuzz_target;
use zonetally::api::decode::Limits;
use zonetally::api::formats::Format;
use zonetally::api::processes::{scenarios, Context, Uncached};
use zonetally::api::wire::ScenarioInputs;
use zonetally::engine::{Control, EngineError};

mod sealed;

use sealed::Sealed;

const LIMITS: Limits = Limits {
    max_cells: 1 << 12,
    max_zones: 64,
    max_zone_cells: 1 << 14,
    max_cost: 1e7,
    max_vertices: 10_000,
    max_exceedance_values: 10_000,
    max_scenarios: 64,
    max_scenario_bytes: 1 << 20,
};

fuzz_target!(|data: &[u8]| {
    let Ok(req) = serde_json::from_slice::<ScenarioInputs>(data) else {
        return;
    };
    let exact = req.evidence.total.as_ref().and_then(|t| t.as_u64());
    let asked_cells = req.cells;
    let ctx = Context {
        limits: LIMITS,
        rasters: &Sealed,
        normalisers: &Uncached,
    };
    let draws = match scenarios::prepare(req, Format::Json, &ctx) {
        Ok(d) => d,
        Err(e) => {
            assert!(
                e.pointer.is_empty() || e.pointer.starts_with('/'),
                "pointer {:?}",
                e.pointer
            );
            return;
        }
    };
    let doc = match scenarios::compute(&draws, &ctx, &Control::new()) {
        Ok(doc) => doc,
        // Evidence with no prior mass f64 can hold is found only when drawing.
        Err(EngineError::ImpossibleEvidence(_)) => return,
        Err(e) => panic!("a decoded request failed: {e}"),
    };
    for s in &doc.samples.draws {
        if let (Some(m), Some(cells)) = (exact, &s.cells) {
            assert_eq!(cells.len() as u64, m, "a scenario breaks the exact total");
        }
        if let Some(cells) = &s.cells {
            assert!(asked_cells);
            assert!(cells.windows(2).all(|w| w[0] < w[1]), "cells not ascending");
        }
    }
    for z in &doc.summary.zones {
        assert!(z.mean.is_finite() && z.mean >= 0.0, "mean {}", z.mean);
    }
    for row in &doc.summary.correlation.matrix {
        for r in row.iter().flatten() {
            assert!((-1.0..=1.0).contains(r), "correlation {r}");
        }
    }
    assert!(doc.error_bound.is_finite());
    serde_json::to_vec(&doc).expect("the document encodes");
});

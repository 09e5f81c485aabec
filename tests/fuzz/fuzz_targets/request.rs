//! The request decoder: any bytes, read as a `zone-counts` request document, either decode into
//! engine types or give a decoding error with a JSON pointer; nothing panics. Requests small
//! enough are also computed, and their results must hold the engine's invariants.
#![no_main]

use libfuzzer_sys::fuzz_target;
use zonetally::api::decode::{zone_counts, DecodedEvidence, Limits};
use zonetally::api::wire::EvalRequest;
use zonetally::engine::{execute, execute_strata, plan, Control, EngineError, Normaliser};

mod sealed;

use sealed::Sealed;

const LIMITS: Limits = Limits {
    max_cells: 1 << 16,
    max_zones: 256,
    max_zone_cells: 1 << 18,
    max_cost: 1e7,
    max_vertices: 10_000,
    max_exceedance_values: 10_000,
    max_scenarios: 100,
    max_scenario_bytes: 1 << 20,
};

fuzz_target!(|data: &[u8]| {
    let Ok(req) = serde_json::from_slice::<EvalRequest>(data) else {
        return;
    };
    let decoded = match zone_counts(req, &LIMITS, &Sealed) {
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
    let Some(set) = &decoded.zones.set else {
        return;
    };
    let plan = plan(&decoded.raster, set);
    if plan.estimated_cost > LIMITS.max_cost {
        return;
    }
    let control = Control::new();
    let summaries = match &decoded.evidence {
        DecodedEvidence::Whole(evidence) => {
            let Ok(normaliser) = Normaliser::of(&decoded.raster, evidence, &control) else {
                return;
            };
            execute(
                &plan,
                &decoded.raster,
                set,
                &normaliser,
                &decoded.settings,
                &control,
            )
            .expect("a decoded, possible request computes")
        }
        DecodedEvidence::Strata(strata) => {
            match execute_strata(&decoded.raster, set, strata, &decoded.settings, &control) {
                Ok(run) => run.zones,
                // Evidence whose totals have no prior mass f64 can hold is found only here.
                Err(EngineError::ImpossibleEvidence(_)) => return,
                Err(e) => panic!("a decoded request under strata failed: {e}"),
            }
        }
    };
    assert_eq!(summaries.len(), set.len());
    for s in &summaries {
        assert!(
            s.pmf.iter().all(|p| p.is_finite() && *p >= 0.0),
            "{}: pmf {:?}",
            s.id,
            s.pmf
        );
        for v in [s.mean, s.sd, s.prior_mean, s.prior_sd, s.error_bound] {
            assert!(v.is_finite() && v >= 0.0, "{}: {v}", s.id);
        }
        assert!(s.interval.lower <= s.interval.upper);
        for (_, p) in &s.exceedance {
            assert!((0.0..=1.0).contains(p), "{}: exceedance {p}", s.id);
        }
    }
});

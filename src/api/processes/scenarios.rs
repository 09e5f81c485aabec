//! `scenarios`: seeded, independent draws of the whole 0/1 event field given the evidence, with
//! every zone's count in each draw and a summary of the zones together (means, how many zones
//! reach k events, pairwise correlations). Inputs are those of `zone-counts` without
//! `summaries`, plus the draw count, the seed and what to summarise.

use serde_json::{json, Value};

use super::total_check::with_strata;
use super::{
    check_cost, input, parse_execute, run_error, schema_of, to_json, Context, Output, Prepared,
    Process, ResponseMode,
};
use crate::api::decode::{self, DecodeError, Decoded, DecodedEvidence};
use crate::api::formats::{self, Format};
use crate::api::problem::ApiError;
use crate::api::wire::{
    AtLeastOut, CorrelationOut, EvalRequest, EvidenceSpec, RasterInput, ScenarioInputs,
    ScenarioList, ScenarioSummaryOut, ScenarioZoneOut, ScenariosDocument, SummariesSpec,
    TotalResult, ZonesDoc,
};
use crate::engine::{self, Control, EngineError, Sampler, Scenario, DEFAULT_LEVEL};

pub struct ScenariosProcess;

const OUTPUT: &str = "scenarios";

/// The formats of the `scenarios` output: JSON, or the event cells as GeoJSON points.
pub const FORMATS: [Format; 2] = [Format::Json, Format::GeoJson];

/// Most zones whose pairwise correlations one request may ask for: the matrix grows with
/// their square.
pub const MAX_CORRELATION_ZONES: usize = 50;

/// Bytes one count takes in the output besides its zone id: the digits, quotes, colon, comma.
const BYTES_PER_COUNT: u64 = 12;
/// Bytes one event cell takes in the output: up to ten digits and a comma.
const BYTES_PER_CELL: u64 = 11;
/// Bytes one event cell takes as a GeoJSON point: the feature's frame, two coordinates of up
/// to 24 characters, the scenario and cell numbers.
const BYTES_PER_POINT: u64 = 128;

impl Process for ScenariosProcess {
    fn id(&self) -> &'static str {
        "scenarios"
    }
    fn title(&self) -> &'static str {
        "Joint scenarios of the event field given the evidence"
    }
    fn description(&self) -> &'static str {
        "Seeded, independent draws of which cells hold an event, each an exact draw from the law of the whole field given the evidence (cells independent a priori): every zone's count in each scenario, optionally its event cells, and a summary over the scenarios of each zone's mean, how many zones hold at least k events, and the pairwise correlations of zone counts."
    }
    fn output(&self) -> &'static str {
        OUTPUT
    }
    fn inputs(&self) -> Value {
        json!({
            "raster": input("probability raster", "per-cell event probabilities, inline or as {\"ref\": \"sha256:...\"} from POST /rasters", schema_of::<RasterInput>(), 1),
            "zones": input("zones", "the zones counted in each scenario: a list of zones (cell lists or rectangles), a GeoJSON Feature or FeatureCollection of polygons, or a label raster", schema_of::<ZonesDoc>(), 1),
            "evidence": input("evidence", "what is known about the number of events: over all valid cells, or per stratum", schema_of::<EvidenceSpec>(), 1),
            "count": input("count", "how many scenarios to draw", schema_of::<u64>(), 1),
            "seed": input("seed", "key of the random streams (default 0): the same seed, inputs and version give the same scenarios", schema_of::<u64>(), 0),
            "cells": input("cells", "also list each scenario's event cells (default false)", schema_of::<bool>(), 0),
            "at_least": input("at least", "thresholds k: for each, how many zones hold at least k events", schema_of::<Vec<u64>>(), 0),
            "correlation": input("correlation", "ids of up to 50 zones whose pairwise correlations to report (default the first 50 zones)", schema_of::<Vec<String>>(), 0),
        })
    }
    fn outputs(&self) -> Value {
        json!({OUTPUT: {"title": "scenarios", "description": "the scenarios in draw order, their summary, the error bound and the total check", "schema": schema_of::<ScenariosDocument>()}})
    }
    fn formats(&self) -> &'static [Format] {
        &FORMATS
    }
    fn prepare(
        &self,
        body: &[u8],
        accept: Option<&str>,
        ctx: &Context,
    ) -> Result<(ResponseMode, Box<dyn Prepared>), ApiError> {
        let (req, mode, format): (ScenarioInputs, _, _) =
            parse_execute(body, OUTPUT, accept, &FORMATS)?;
        let draws = prepare(req, format, ctx).map_err(|e| ApiError::from_decode(e, "/inputs"))?;
        Ok((mode, Box::new(draws)))
    }
}

/// A decoded and planned `scenarios` request.
pub struct Draws {
    decoded: Decoded,
    count: u64,
    seed: u64,
    cells: bool,
    at_least: Vec<u64>,
    /// Indices (in request order) of the zones whose correlations are reported.
    correlation: Vec<usize>,
    cost: f64,
    output_bytes: u64,
    format: Format,
}

/// Decodes and plans a request whose output is asked as `format`, refusing it when its draws,
/// output or cost are over the limits.
pub fn prepare(req: ScenarioInputs, format: Format, ctx: &Context) -> Result<Draws, DecodeError> {
    let limits = &ctx.limits;
    if format == Format::GeoJson && !req.cells {
        return Err(DecodeError::at(
            "/cells",
            "the GeoJSON output holds each scenario's event cells as points, and `cells` is false: set `cells` to true, or ask for JSON",
        ));
    }
    if req.count == 0 || req.count > limits.max_scenarios {
        let detail = if req.count == 0 {
            "`count` is 0: ask for at least one scenario".to_string()
        } else {
            format!(
                "{} scenarios are above this service's limit of {}: ask for fewer, or split them over several requests with different seeds",
                req.count, limits.max_scenarios
            )
        };
        return Err(if req.count == 0 {
            DecodeError::at("/count", detail)
        } else {
            DecodeError::limit("/count", detail)
        });
    }
    let (count, seed, cells) = (req.count, req.seed, req.cells);
    let mut at_least = req.at_least;
    at_least.sort_unstable();
    at_least.dedup();
    let asked_ids = req.correlation;
    let decoded = decode::zone_counts(
        EvalRequest {
            raster: req.raster,
            zones: req.zones,
            zone_options: req.zone_options,
            evidence: req.evidence,
            summaries: SummariesSpec::default(),
        },
        limits,
        ctx.rasters,
    )?;
    let entries = &decoded.zones.entries;
    let asked = at_least.len() as u64 * (entries.len() as u64 + 1);
    if asked > limits.max_exceedance_values {
        return Err(DecodeError::limit(
            "/at_least",
            format!(
                "{} thresholds for {} zones ask for {asked} values, above this service's limit of {} (--max-exceedance-values): send fewer thresholds",
                at_least.len(),
                entries.len(),
                limits.max_exceedance_values
            ),
        ));
    }
    let correlation = match asked_ids {
        None => (0..entries.len().min(MAX_CORRELATION_ZONES)).collect(),
        Some(ids) => {
            if ids.len() > MAX_CORRELATION_ZONES {
                return Err(DecodeError::limit(
                    "/correlation",
                    format!(
                        "{} zones are asked for correlations, above the limit of {MAX_CORRELATION_ZONES}: name at most {MAX_CORRELATION_ZONES} zones",
                        ids.len()
                    ),
                ));
            }
            let mut picked: Vec<usize> = Vec::with_capacity(ids.len());
            for (i, id) in ids.iter().enumerate() {
                let at = entries.iter().position(|e| &e.id == id).ok_or_else(|| {
                    DecodeError::at(
                        format!("/correlation/{i}"),
                        format!("`{id}` is not the id of any zone of this request: name zones by the ids they were sent with"),
                    )
                })?;
                if picked.contains(&at) {
                    return Err(DecodeError::at(
                        format!("/correlation/{i}"),
                        format!("zone `{id}` is named twice: name each zone once"),
                    ));
                }
                picked.push(at);
            }
            picked
        }
    };
    let stats = decoded.raster.stats();
    let nonzero = stats.free + stats.certain;
    let events = match &decoded.evidence {
        DecodedEvidence::Whole(e) => e.support().1.min(nonzero),
        DecodedEvidence::Strata(_) => nonzero,
    };
    let ids: u64 = entries.iter().map(|e| e.id.len() as u64).sum();
    let per_cell = if format == Format::GeoJson {
        BYTES_PER_POINT
    } else {
        BYTES_PER_CELL
    };
    let per_draw = ids
        + entries.len() as u64 * BYTES_PER_COUNT
        + 32
        + if cells { events * per_cell } else { 0 };
    let output_bytes = per_draw.saturating_mul(count);
    if output_bytes > limits.max_scenario_bytes {
        return Err(DecodeError::limit(
            if cells { "/cells" } else { "/count" },
            format!(
                "{count} scenarios{} may take {output_bytes} bytes, above this service's limit of {} (--max-scenario-bytes): ask for fewer scenarios{}",
                if cells { " with their event cells" } else { "" },
                limits.max_scenario_bytes,
                if cells { ", or leave out `cells`" } else { ", or fewer zones" }
            ),
        ));
    }
    let cost = engine::scenario_cost(stats.free, count, events, cells);
    check_cost(cost, limits, "/count")?;
    Ok(Draws {
        decoded,
        count,
        seed,
        cells,
        at_least,
        correlation,
        cost,
        output_bytes,
        format,
    })
}

/// Runs a prepared request: the tree (under the normaliser from the context's source, or one
/// per stratum), the draws, then their summary.
pub fn compute(
    d: &Draws,
    ctx: &Context,
    control: &Control,
) -> Result<ScenariosDocument, EngineError> {
    let dec = &d.decoded;
    let zones = dec.zones.engine_zones();
    let (sampler, total) = match &dec.evidence {
        DecodedEvidence::Whole(evidence) => {
            let normaliser = ctx.normalisers.normaliser(
                dec.raster_key.as_deref(),
                &dec.raster,
                evidence,
                control,
            )?;
            let sampler = Sampler::new(&dec.raster, zones, &normaliser, control)?;
            let total = TotalResult::of(normaliser.check.clone(), DEFAULT_LEVEL, false);
            (sampler, total)
        }
        DecodedEvidence::Strata(strata) => {
            let sampler = Sampler::strata(&dec.raster, zones, strata, control)?;
            let run = engine::execute_strata(&dec.raster, &[], strata, &dec.settings, control)?;
            let total = with_strata(
                run.total,
                run.strata,
                strata.cell_counts(),
                DEFAULT_LEVEL,
                false,
            );
            (sampler, total)
        }
    };
    let computed = engine::scenarios(&sampler, d.count, d.seed, d.cells, control)?;
    // Zones without a valid cell hold no event in any draw; the rest are read at their slot.
    let draws: Vec<Scenario> = computed
        .into_iter()
        .map(|s| Scenario {
            zones: dec
                .zones
                .entries
                .iter()
                .map(|e| e.slot.map_or(0, |slot| s.zones[slot]))
                .collect(),
            cells: s.cells,
        })
        .collect();
    let ids: Vec<String> = dec.zones.entries.iter().map(|e| e.id.clone()).collect();
    let summary = summarise(&ids, &draws, d, control)?;
    Ok(ScenariosDocument {
        samples: ScenarioList { ids, draws },
        summary,
        error_bound: sampler.error_bound,
        total,
    })
}

/// The summary over the draws: per-zone means and sds, the law of how many zones reach each
/// threshold, and the correlation matrix of the chosen zones.
fn summarise(
    ids: &[String],
    draws: &[Scenario],
    d: &Draws,
    control: &Control,
) -> Result<ScenarioSummaryOut, EngineError> {
    let n = draws.len() as f64;
    let zones = ids.len();
    let mut mean = vec![0.0f64; zones];
    for s in draws {
        for (m, &c) in mean.iter_mut().zip(&s.zones) {
            *m += c as f64;
        }
    }
    mean.iter_mut().for_each(|m| *m /= n);
    // Centred sums of squares and products: exact in f64 for the counts a zone can hold.
    let mut ss = vec![0.0f64; zones];
    for s in draws {
        for ((v, &c), m) in ss.iter_mut().zip(&s.zones).zip(&mean) {
            *v += (c as f64 - m).powi(2);
        }
    }
    control.check()?;
    let sd = |z: usize| (draws.len() > 1).then(|| (ss[z] / (n - 1.0)).sqrt());
    let zone_out = ids
        .iter()
        .enumerate()
        .map(|(z, id)| ScenarioZoneOut {
            id: id.clone(),
            mean: mean[z],
            sd: sd(z),
        })
        .collect();
    let at_least = d
        .at_least
        .iter()
        .map(|&k| {
            let mut scenarios = vec![0u64; zones + 1];
            let mut top = 0;
            let mut sum = 0u64;
            for s in draws {
                let reached = s.zones.iter().filter(|&&c| c >= k).count();
                scenarios[reached] += 1;
                top = top.max(reached);
                sum += reached as u64;
            }
            scenarios.truncate(top + 1);
            AtLeastOut {
                k,
                scenarios,
                mean: sum as f64 / n,
            }
        })
        .collect();
    let picked = &d.correlation;
    let mut matrix = vec![vec![None; picked.len()]; picked.len()];
    for (i, &a) in picked.iter().enumerate() {
        for (j, &b) in picked.iter().enumerate().skip(i) {
            let r = if ss[a] > 0.0 && ss[b] > 0.0 {
                let cross: f64 = draws
                    .iter()
                    .map(|s| (s.zones[a] as f64 - mean[a]) * (s.zones[b] as f64 - mean[b]))
                    .sum();
                Some(if i == j {
                    1.0
                } else {
                    (cross / (ss[a] * ss[b]).sqrt()).clamp(-1.0, 1.0)
                })
            } else {
                None
            };
            matrix[i][j] = r;
            matrix[j][i] = r;
        }
        control.check()?;
    }
    Ok(ScenarioSummaryOut {
        count: d.count,
        seed: d.seed,
        zones: zone_out,
        at_least,
        correlation: CorrelationOut {
            zones: picked.iter().map(|&z| ids[z].clone()).collect(),
            matrix,
        },
    })
}

impl Prepared for Draws {
    fn estimated_cost(&self) -> f64 {
        self.cost
    }
    fn cells(&self) -> u64 {
        self.decoded.raster.stats().free
    }
    fn held_bytes(&self) -> u64 {
        // The draws in memory (a count per zone, four bytes per event cell) are about as large
        // as their JSON; both are held while encoding. The tree holds, per free cell, its index
        // and tilted pair, and about as much again in the laws above the leaves.
        const TREE_PER_FREE_CELL: u64 = 48;
        let cells = self.decoded.zones.cell_count();
        cells * 4
            + self.decoded.raster.stats().free * TREE_PER_FREE_CELL
            + self.output_bytes.saturating_mul(2)
    }
    fn run(self: Box<Self>, ctx: &Context, control: &Control) -> Result<Output, ApiError> {
        let doc = compute(&self, ctx, control).map_err(run_error)?;
        match self.format {
            Format::GeoJson => Ok(Output {
                body: bytes::Bytes::from(formats::scenario_points(&doc, &self.decoded.frame)?),
                format: Format::GeoJson,
            }),
            _ => to_json(&doc),
        }
    }
}

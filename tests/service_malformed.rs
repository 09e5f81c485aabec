//! The malformed-request table: each bad request, sent over a real socket, gets its specific
//! 4xx problem document naming the offending field; the server still serves afterwards.

mod service_support;

use serde_json::{json, Value};
use service_support::socket::Server;
use service_support::tea_inputs;
use zonetally::Config;

struct Case {
    name: &'static str,
    method: &'static str,
    path: &'static str,
    content_type: Option<&'static str>,
    body: Vec<u8>,
    status: u16,
    kind: &'static str,
    /// Expected `pointer`; `None` when the problem names no field.
    pointer: Option<&'static str>,
}

const ZC: &str = "/processes/zone-counts/execution";
const OGC: &str = "http://www.opengis.net/def/exceptions/ogcapi-processes-1/1.0/";

fn with(change: impl FnOnce(&mut Value)) -> Vec<u8> {
    let mut body = json!({"inputs": tea_inputs()});
    change(&mut body);
    serde_json::to_vec(&body).unwrap()
}

fn case(
    name: &'static str,
    body: Vec<u8>,
    status: u16,
    kind: &'static str,
    pointer: Option<&'static str>,
) -> Case {
    Case {
        name,
        method: "POST",
        path: ZC,
        content_type: Some("application/json"),
        body,
        status,
        kind,
        pointer,
    }
}

fn cases() -> Vec<Case> {
    let raw = |s: &str| s.as_bytes().to_vec();
    let inv = "/problems/invalid-input";
    let bad = "/problems/malformed-json";
    let unusable = "/problems/unusable-content";
    let big = "/problems/too-large";
    let deep = format!("{{\"inputs\": {}{}}}", "[".repeat(40), "]".repeat(40));
    vec![
        case(
            "NaN in the raster",
            raw(
                r#"{"inputs": {"raster": {"width": 2, "height": 1, "values": [0.5, NaN]}, "zones": [{"id": "a", "cells": [0]}], "evidence": {"total": 1}}}"#,
            ),
            400,
            bad,
            Some("/inputs/raster/values/1"),
        ),
        case(
            "p above 1",
            with(|b| b["inputs"]["raster"]["values"][1] = json!(1.5)),
            400,
            inv,
            Some("/inputs/raster/values/1"),
        ),
        case(
            "negative p",
            with(|b| b["inputs"]["raster"]["values"][0] = json!(-0.25)),
            400,
            inv,
            Some("/inputs/raster/values/0"),
        ),
        case(
            "p as a string",
            with(|b| b["inputs"]["raster"]["values"][2] = json!("0.5")),
            400,
            bad,
            Some("/inputs/raster/values/2"),
        ),
        case(
            "wrong values length",
            with(|b| b["inputs"]["raster"]["values"] = json!([0.5, 0.5, 0.5])),
            400,
            inv,
            Some("/inputs/raster/values"),
        ),
        case(
            "zero width",
            with(|b| {
                b["inputs"]["raster"]["width"] = json!(0);
                b["inputs"]["raster"]["values"] = json!([])
            }),
            400,
            inv,
            Some("/inputs/raster"),
        ),
        case(
            "raster without values",
            with(|b| b["inputs"]["raster"] = json!({"width": 4, "height": 2})),
            400,
            bad,
            Some("/inputs/raster"),
        ),
        case(
            "cell out of range",
            with(|b| b["inputs"]["zones"][1]["cells"] = json!([4, 8])),
            400,
            inv,
            Some("/inputs/zones/1/cells/1"),
        ),
        case(
            "duplicated cell in a zone",
            with(|b| b["inputs"]["zones"][1]["cells"] = json!([5, 4, 5])),
            400,
            inv,
            Some("/inputs/zones/1/cells"),
        ),
        case(
            "empty zones list",
            with(|b| b["inputs"]["zones"] = json!([])),
            400,
            inv,
            Some("/inputs/zones"),
        ),
        case(
            "zone with cells and rect",
            with(|b| {
                b["inputs"]["zones"][1]["rect"] = json!({"row": 0, "col": 0, "rows": 1, "cols": 1})
            }),
            400,
            inv,
            Some("/inputs/zones/1"),
        ),
        case(
            "zone with neither",
            with(|b| b["inputs"]["zones"][1] = json!({"id": "bare"})),
            400,
            inv,
            Some("/inputs/zones/1"),
        ),
        case(
            "rect leaving the raster",
            with(|b| b["inputs"]["zones"][0]["rect"]["cols"] = json!(5)),
            400,
            inv,
            Some("/inputs/zones/0/rect"),
        ),
        case(
            "repeated zone id",
            with(|b| b["inputs"]["zones"][1]["id"] = json!("cups")),
            400,
            inv,
            Some("/inputs/zones/1/id"),
        ),
        case(
            "impossible total, too many",
            with(|b| b["inputs"]["evidence"]["total"] = json!(9)),
            422,
            unusable,
            Some("/inputs/evidence/total"),
        ),
        case(
            "impossible total, too few",
            with(|b| {
                b["inputs"]["raster"]["values"][0] = json!(1.0);
                b["inputs"]["raster"]["values"][1] = json!(1.0);
                b["inputs"]["evidence"]["total"] = json!(1)
            }),
            422,
            unusable,
            Some("/inputs/evidence/total"),
        ),
        case(
            "fractional total",
            with(|b| b["inputs"]["evidence"]["total"] = json!(3.5)),
            400,
            inv,
            Some("/inputs/evidence/total"),
        ),
        case(
            "total as a string",
            with(|b| b["inputs"]["evidence"]["total"] = json!("4")),
            400,
            inv,
            Some("/inputs/evidence/total"),
        ),
        case(
            "range without its max",
            with(|b| b["inputs"]["evidence"]["total"] = json!({"min": 2})),
            400,
            inv,
            Some("/inputs/evidence/total/max"),
        ),
        case(
            "range upside down",
            with(|b| b["inputs"]["evidence"]["total"] = json!({"min": 5, "max": 2})),
            400,
            inv,
            Some("/inputs/evidence/total"),
        ),
        case(
            "range beyond the raster",
            with(|b| b["inputs"]["evidence"]["total"] = json!({"min": 9, "max": 12})),
            422,
            unusable,
            Some("/inputs/evidence/total"),
        ),
        case(
            "range with a stray field",
            with(|b| {
                b["inputs"]["evidence"]["total"] = json!({"min": 1, "max": 3, "detection": 0.5})
            }),
            400,
            inv,
            Some("/inputs/evidence/total/detection"),
        ),
        case(
            "detection rate above 1",
            with(|b| b["inputs"]["evidence"]["total"] = json!({"detected": 3, "detection": 1.5})),
            400,
            inv,
            Some("/inputs/evidence/total/detection"),
        ),
        case(
            "more detected than the raster holds",
            with(|b| b["inputs"]["evidence"]["total"] = json!({"detected": 9, "detection": 0.5})),
            422,
            unusable,
            Some("/inputs/evidence/total/detected"),
        ),
        case(
            "negative likelihood value",
            with(|b| {
                b["inputs"]["evidence"]["total"] =
                    json!({"likelihood": {"offset": 2, "values": [0.5, -0.1]}})
            }),
            400,
            inv,
            Some("/inputs/evidence/total/likelihood/values/1"),
        ),
        case(
            "likelihood zero wherever the raster reaches",
            with(|b| {
                b["inputs"]["evidence"]["total"] =
                    json!({"likelihood": {"offset": 20, "values": [1.0]}})
            }),
            422,
            unusable,
            Some("/inputs/evidence/total/likelihood"),
        ),
        case(
            "total and strata together",
            with(|b| {
                b["inputs"]["evidence"]["strata"] =
                    json!([{"id": "a", "cells": [0, 1], "total": 1}])
            }),
            422,
            unusable,
            Some("/inputs/evidence"),
        ),
        case(
            "neither total nor strata",
            with(|b| b["inputs"]["evidence"] = json!({})),
            400,
            inv,
            Some("/inputs/evidence"),
        ),
        case(
            "overlapping strata",
            with(|b| {
                b["inputs"]["evidence"] = json!({"strata": [
                    {"id": "north", "cells": [0, 1, 2], "total": 1},
                    {"id": "south", "cells": [2, 3], "total": 1}
                ]})
            }),
            422,
            unusable,
            Some("/inputs/evidence/strata"),
        ),
        case(
            "a stratum with both cells and a rectangle",
            with(|b| {
                b["inputs"]["evidence"] = json!({"strata": [
                    {"id": "a", "cells": [0], "rect": {"row": 0, "col": 0, "rows": 1, "cols": 1}, "total": 0}
                ]})
            }),
            400,
            inv,
            Some("/inputs/evidence/strata/0"),
        ),
        case(
            "a stratum with both a geometry and cells",
            with(|b| {
                b["inputs"]["evidence"] = json!({"strata": [
                    {"id": "a", "cells": [0], "geometry": {"type": "Polygon", "coordinates": [[[0, 0], [1, 0], [1, 1], [0, 0]]]}, "total": 0}
                ]})
            }),
            400,
            inv,
            Some("/inputs/evidence/strata/0"),
        ),
        case(
            "a stratum geometry sent as a Feature",
            with(|b| {
                b["inputs"]["evidence"] = json!({"strata": [
                    {"id": "a", "geometry": {"type": "Feature", "properties": {}, "geometry": {"type": "Polygon", "coordinates": [[[0, 0], [4, 0], [4, 1], [0, 0]]]}}, "total": 1}
                ]})
            }),
            422,
            unusable,
            Some("/inputs/evidence/strata/0/geometry/type"),
        ),
        case(
            "a stratum geometry off the raster",
            with(|b| {
                b["inputs"]["evidence"] = json!({"strata": [
                    {"id": "a", "geometry": {"type": "Polygon", "coordinates": [[[10, 10], [14, 10], [14, 14], [10, 10]]]}, "total": 1}
                ]})
            }),
            400,
            inv,
            Some("/inputs/evidence/strata/0/geometry"),
        ),
        case(
            "a stratum by label without a label raster",
            with(|b| {
                b["inputs"]["evidence"] = json!({"strata": [{"id": "a", "label": 1, "total": 1}]})
            }),
            400,
            inv,
            Some("/inputs/evidence/strata/0/label"),
        ),
        case(
            "a stratum by a label no cell holds",
            with(|b| {
                b["inputs"]["evidence"] = json!({"strata": [{"id": "a", "label": 9, "total": 1}],
                    "labels": {"width": 4, "height": 2, "values": [1, 1, 0, 0, 2, 2, 0, 0]}})
            }),
            400,
            inv,
            Some("/inputs/evidence/strata/0/label"),
        ),
        case(
            "a label raster of another size",
            with(|b| {
                b["inputs"]["evidence"] = json!({"strata": [{"id": "a", "label": 1, "total": 1}],
                    "labels": {"width": 2, "height": 2, "values": [1, 1, 0, 0]}})
            }),
            400,
            inv,
            Some("/inputs/evidence/labels"),
        ),
        case(
            "a label raster no stratum uses",
            with(|b| {
                b["inputs"]["evidence"] = json!({"strata": [{"id": "a", "cells": [0, 1], "total": 1}],
                    "labels": {"width": 4, "height": 2, "values": [1, 1, 0, 0, 2, 2, 0, 0]}})
            }),
            400,
            inv,
            Some("/inputs/evidence/labels"),
        ),
        case(
            "a label raster beside an overall total",
            with(|b| {
                b["inputs"]["evidence"]["labels"] =
                    json!({"width": 4, "height": 2, "values": [1, 1, 0, 0, 2, 2, 0, 0]})
            }),
            400,
            inv,
            Some("/inputs/evidence/labels"),
        ),
        case(
            "a stratum total its cells cannot reach",
            with(|b| {
                b["inputs"]["evidence"] =
                    json!({"strata": [{"id": "a", "cells": [0, 1], "total": 3}]})
            }),
            422,
            unusable,
            Some("/inputs/evidence/strata/0/total"),
        ),
        case(
            "a total naming no form",
            with(|b| b["inputs"]["evidence"]["total"] = json!({"around": 4})),
            400,
            inv,
            Some("/inputs/evidence/total"),
        ),
        case(
            "negative total",
            with(|b| b["inputs"]["evidence"]["total"] = json!(-1)),
            400,
            inv,
            Some("/inputs/evidence/total"),
        ),
        case(
            "interval level out of range",
            with(|b| b["inputs"]["summaries"]["interval"] = json!(1.5)),
            400,
            inv,
            Some("/inputs/summaries/interval"),
        ),
        case(
            "tolerance out of range",
            with(|b| b["inputs"]["summaries"]["tolerance"] = json!(0.5)),
            400,
            inv,
            Some("/inputs/summaries/tolerance"),
        ),
        case(
            "unknown input field",
            with(|b| b["inputs"]["extra"] = json!(1)),
            400,
            bad,
            Some("/inputs/extra"),
        ),
        case(
            "missing evidence",
            with(|b| {
                b["inputs"].as_object_mut().unwrap().remove("evidence");
            }),
            400,
            bad,
            Some("/inputs"),
        ),
        case(
            "missing inputs",
            raw(r#"{"response": "raw"}"#),
            400,
            bad,
            Some(""),
        ),
        case(
            "unknown response mode",
            with(|b| b["response"] = json!("table")),
            400,
            bad,
            Some("/response"),
        ),
        case(
            "unknown output",
            with(|b| b["outputs"] = json!({"histogram": {}})),
            400,
            inv,
            Some("/outputs/histogram"),
        ),
        case(
            "output by reference",
            with(|b| b["outputs"] = json!({"counts": {"transmissionMode": "reference"}})),
            400,
            inv,
            Some("/outputs/counts/transmissionMode"),
        ),
        case(
            "malformed raster ref",
            with(|b| b["inputs"]["raster"] = json!({"ref": "sha256:xyz"})),
            400,
            inv,
            Some("/inputs/raster/ref"),
        ),
        case(
            "ref mixed with values",
            with(|b| b["inputs"]["raster"]["ref"] = json!(format!("sha256:{}", "a".repeat(64)))),
            400,
            bad,
            Some("/inputs/raster"),
        ),
        case(
            "unknown raster ref",
            with(|b| b["inputs"]["raster"] = json!({"ref": format!("sha256:{}", "a".repeat(64))})),
            400,
            "/problems/unknown-raster",
            Some("/inputs/raster/ref"),
        ),
        case("not JSON", raw("zones=all"), 400, bad, Some("")),
        case(
            "truncated JSON",
            raw(r#"{"inputs": {"raster": "#),
            400,
            bad,
            Some("/inputs/raster"),
        ),
        case(
            "trailing garbage",
            {
                let mut b = with(|_| {});
                b.extend_from_slice(b" }");
                b
            },
            400,
            bad,
            Some(""),
        ),
        case(
            "deep nesting",
            deep.into_bytes(),
            400,
            "/problems/nesting-too-deep",
            Some(""),
        ),
        case(
            "raster above the cell limit",
            with(|b| b["inputs"]["raster"] = json!({"width": 200, "height": 100, "values": []})),
            413,
            big,
            Some("/inputs/raster"),
        ),
        case(
            "too many zones",
            with(|b| {
                b["inputs"]["zones"] = json!((0..60)
                    .map(|i| json!({"id": format!("z{i}"), "cells": [0]}))
                    .collect::<Vec<_>>())
            }),
            413,
            big,
            Some("/inputs/zones"),
        ),
        case(
            "too many zone cells",
            with(|b| {
                b["inputs"]["zones"] = json!((0..10).map(|i| json!({"id": format!("z{i}"), "rect": {"row": 0, "col": 0, "rows": 2, "cols": 4}})).collect::<Vec<_>>())
            }),
            413,
            big,
            Some("/inputs/zones/7"),
        ),
        case(
            "oversized body",
            with(|b| b["inputs"]["summaries"]["exceedance"] = json!(vec![1; 40_000])),
            413,
            big,
            Some(""),
        ),
        Case {
            name: "wrong content type",
            content_type: Some("text/plain"),
            ..case(
                "",
                with(|_| {}),
                415,
                "/problems/unsupported-media-type",
                None,
            )
        },
        Case {
            name: "no content type",
            content_type: None,
            ..case(
                "",
                with(|_| {}),
                415,
                "/problems/unsupported-media-type",
                None,
            )
        },
        Case {
            name: "unknown process",
            path: "/processes/flood-depth/execution",
            ..case("", with(|_| {}), 404, "", None)
        },
        Case {
            name: "posterior cell out of range",
            path: "/processes/cell-posterior/execution",
            ..case(
                "",
                raw(
                    r#"{"inputs": {"raster": {"width": 2, "height": 1, "values": [0.5, 0.5]}, "evidence": {"total": 1}, "cells": [2]}}"#,
                ),
                400,
                inv,
                Some("/inputs/cells/0"),
            )
        },
        Case {
            name: "raster post with p above 1",
            path: "/rasters",
            ..case(
                "",
                raw(r#"{"width": 2, "height": 1, "values": [0.5, 2]}"#),
                400,
                inv,
                Some("/values/1"),
            )
        },
        Case {
            name: "unknown job",
            method: "GET",
            path: "/jobs/no-such-id",
            content_type: None,
            ..case("", vec![], 404, "", None)
        },
        Case {
            name: "results of an unknown job",
            method: "GET",
            path: "/jobs/no-such-id/results",
            content_type: None,
            ..case("", vec![], 404, "", None)
        },
        Case {
            name: "dismiss an unknown job",
            method: "DELETE",
            path: "/jobs/no-such-id",
            content_type: None,
            ..case("", vec![], 404, "", None)
        },
        Case {
            name: "unknown path",
            method: "GET",
            path: "/maps",
            content_type: None,
            ..case("", vec![], 404, "/problems/not-found", None)
        },
        Case {
            name: "wrong method",
            method: "PUT",
            path: "/processes",
            content_type: None,
            ..case("", vec![], 405, "/problems/method-not-allowed", None)
        },
    ]
}

fn expected_kind(c: &Case) -> String {
    match (c.kind, c.path) {
        ("", p) if p.starts_with("/processes/") => format!("{OGC}no-such-process"),
        ("", _) => format!("{OGC}no-such-job"),
        (k, _) => k.to_string(),
    }
}

#[tokio::test]
async fn every_malformed_request_gets_its_specific_problem() {
    let server = Server::start(Config {
        threads: 2,
        max_body_bytes: 64 * 1024,
        max_cells: 10_000,
        max_zones: 50,
        max_zone_cells: 60,
        ..Config::default()
    })
    .await;
    let client = reqwest::Client::new();
    let cases = cases();
    assert!(cases.len() >= 25, "the table must hold at least 25 cases");
    let mut failures = Vec::new();
    for c in &cases {
        let method = reqwest::Method::from_bytes(c.method.as_bytes()).unwrap();
        let mut req = client
            .request(method, server.url(c.path))
            .body(c.body.clone());
        if let Some(ct) = c.content_type {
            req = req.header("content-type", ct);
        }
        let resp = req
            .send()
            .await
            .unwrap_or_else(|e| panic!("{}: {e}", c.name));
        let status = resp.status().as_u16();
        let ct = resp
            .headers()
            .get("content-type")
            .map(|v| v.to_str().unwrap().to_string());
        let body: Value = match resp.json().await {
            Ok(v) => v,
            Err(e) => {
                failures.push(format!("{}: body not JSON: {e}", c.name));
                continue;
            }
        };
        let kind = expected_kind(c);
        let pointer = body.get("pointer").and_then(Value::as_str);
        if status != c.status
            || body["type"] != kind.as_str()
            || pointer != c.pointer
            || ct.as_deref() != Some("application/problem+json")
        {
            failures.push(format!(
                "{}: got {status} {} pointer {pointer:?} ({ct:?}); want {} {kind} {:?}\n    {body}",
                c.name, body["type"], c.status, c.pointer
            ));
        }
        if body["status"] != status
            || !body["title"].is_string()
            || body["detail"].as_str().is_none_or(str::is_empty)
        {
            failures.push(format!("{}: incomplete problem document {body}", c.name));
        }
    }
    assert!(
        failures.is_empty(),
        "{} of {} cases wrong:\n{}",
        failures.len(),
        cases.len(),
        failures.join("\n")
    );
    let ok = client
        .post(server.url(ZC))
        .json(&json!({"inputs": tea_inputs()}))
        .send()
        .await
        .unwrap();
    assert_eq!(
        ok.status(),
        200,
        "the server must still serve after the table"
    );
    let health = client.get(server.url("/healthz")).send().await.unwrap();
    assert_eq!(health.status(), 200);
}

#[tokio::test]
async fn a_request_over_the_cost_limit_is_refused_before_running() {
    let server = Server::start(Config {
        threads: 1,
        max_cost: 1.0,
        ..Config::default()
    })
    .await;
    let resp = reqwest::Client::new()
        .post(server.url(ZC))
        .json(&json!({"inputs": tea_inputs()}))
        .send()
        .await
        .unwrap();
    assert_eq!(resp.status(), 413);
    let p: Value = resp.json().await.unwrap();
    assert_eq!(p["type"], "/problems/too-large");
    assert_eq!(p["pointer"], "/inputs/zones");
    assert_eq!(
        server.state.pool_stats().compute_seconds,
        0.0,
        "nothing may run for a refused request"
    );
}

//! The service speaking GIS: GeoTIFF rasters (uploaded, inline, by link), GeoJSON and label
//! zones, zones on nodata, GeoJSON / CSV / GeoTIFF outputs, and malformed files refused with a
//! specific 4xx while the server keeps serving. The demo files are the invented valley.

mod service_support;

use std::io::Cursor;

use axum::body::Body;
use axum::http::{Request, StatusCode};
use base64::Engine as _;
use serde_json::{json, Value};
use service_support::{config, get, post_json, send, state_with, tea_inputs, Reply};
use zonetally::Config;

const VALLEY_TIF: &[u8] = include_bytes!("../demo/valley.tif");
const VALLEY_ZONES: &str = include_str!("../demo/valley-zones.geojson");
const ZC: &str = "/processes/zone-counts/execution";
const CP: &str = "/processes/cell-posterior/execution";

async fn post_tiff(router: &axum::Router, path: &str, bytes: Vec<u8>) -> Reply {
    send(
        router,
        Request::post(path)
            .header("content-type", "image/tiff; application=geotiff")
            .body(Body::from(bytes))
            .unwrap(),
    )
    .await
}

async fn post_accept(router: &axum::Router, path: &str, body: &Value, accept: &str) -> Reply {
    send(
        router,
        Request::post(path)
            .header("content-type", "application/json")
            .header("accept", accept)
            .body(Body::from(serde_json::to_vec(body).unwrap()))
            .unwrap(),
    )
    .await
}

fn valley_request(raster: Value) -> Value {
    let zones: Value = serde_json::from_str(VALLEY_ZONES).unwrap();
    json!({"inputs": {
        "raster": raster,
        "zones": zones,
        "evidence": {"total": 371},
        "summaries": {"exceedance": [5, 10]}
    }})
}

fn problem_of(r: &Reply) -> (u16, String, String) {
    let p = r.json();
    (
        r.status.as_u16(),
        p["type"].as_str().unwrap_or("").to_string(),
        p["pointer"].as_str().unwrap_or("").to_string(),
    )
}

#[tokio::test]
async fn a_geotiff_upload_and_geojson_zones_give_a_map_ready_answer() {
    let (_, router) = state_with(config());
    let posted = post_tiff(&router, "/rasters", VALLEY_TIF.to_vec()).await;
    assert_eq!(posted.status, StatusCode::CREATED, "{:?}", posted.body);
    let info = posted.json();
    // reference: demo/make_valley.py writes this grid (EPSG:32631, 25 m cells, corner
    // (512000, 5204000)) and its valley has 9,179 valid cells of 9,600.
    assert_eq!(info["crs"], 32631);
    assert_eq!(
        info["geotransform"],
        json!([512000.0, 25.0, 0.0, 5204000.0, 0.0, -25.0])
    );
    assert_eq!(info["valid_cells"], 9179);
    assert_eq!(info["nodata_cells"], 9600 - 9179);
    assert_eq!(info["nodata"], -9999.0);
    let reference = info["ref"].as_str().unwrap().to_string();

    let request = valley_request(json!({"ref": reference}));
    let as_json = post_json(&router, ZC, &request, None).await;
    assert_eq!(as_json.status, StatusCode::OK);
    let doc = as_json.json();
    let zones = doc["zones"].as_array().unwrap();
    assert_eq!(zones.len(), 15);
    let lake = zones.iter().find(|z| z["id"] == "lakeside-cabins").unwrap();
    assert!(
        lake["nodata_cells"].as_u64().unwrap() > 0,
        "the ellipse around the lake covers nodata cells: {lake}"
    );
    // The band zones trace the cells of valley.json's cell lists along cell edges.
    let valley: Value = serde_json::from_str(include_str!("../demo/valley.json")).unwrap();
    let listed = |id: &str| {
        valley["zones"]
            .as_array()
            .unwrap()
            .iter()
            .find(|z| z["id"] == id)
            .unwrap()["cells"]
            .as_array()
            .unwrap()
            .len() as u64
    };
    for id in ["quarry-slope", "north-road", "sawpit-gully"] {
        let z = zones.iter().find(|z| z["id"] == id).unwrap();
        assert_eq!(z["cells"].as_u64().unwrap(), listed(id), "zone {id}");
    }

    let geo = post_accept(&router, ZC, &request, "application/geo+json").await;
    assert_eq!(geo.status, StatusCode::OK);
    assert_eq!(
        geo.header("content-type").as_deref(),
        Some("application/geo+json")
    );
    let fc = geo.json();
    assert_eq!(fc["type"], "FeatureCollection");
    assert_eq!(fc["grid"]["crs"], "EPSG:32631");
    assert_eq!(fc["total"], doc["total"]);
    let features = fc["features"].as_array().unwrap();
    assert_eq!(features.len(), zones.len());
    for (f, z) in features.iter().zip(zones) {
        assert_eq!(f["id"], z["id"]);
        assert_eq!(f["properties"]["mean"], z["mean"]);
        assert_eq!(f["properties"]["p_at_least_10"], z["exceedance"][1]["p"]);
        assert_eq!(f["properties"]["nodata_cells"], z["nodata_cells"]);
        assert_eq!(f["geometry"]["type"], "MultiPolygon");
    }

    let mut csv_request = request.clone();
    csv_request["outputs"] = json!({"counts": {"format": {"mediaType": "text/csv"}}});
    let table = post_json(&router, ZC, &csv_request, None).await;
    assert_eq!(table.status, StatusCode::OK);
    assert!(table
        .header("content-type")
        .unwrap()
        .starts_with("text/csv"));
    let mut reader = csv::Reader::from_reader(&table.body[..]);
    let header = reader.headers().unwrap().clone();
    let column = |name: &str| header.iter().position(|h| h == name).unwrap();
    let rows: Vec<csv::StringRecord> = reader.records().map(Result::unwrap).collect();
    assert_eq!(rows.len(), zones.len());
    for (row, z) in rows.iter().zip(zones) {
        assert_eq!(&row[column("id")], z["id"].as_str().unwrap());
        let mean: f64 = row[column("mean")].parse().unwrap();
        assert_eq!(
            mean,
            z["mean"].as_f64().unwrap(),
            "CSV numbers read back exactly"
        );
        let p: f64 = row[column("p_at_least_5")].parse().unwrap();
        assert_eq!(p, z["exceedance"][0]["p"].as_f64().unwrap());
    }
}

#[tokio::test]
async fn a_geotiff_body_is_bounded_by_the_cell_limit_not_the_json_limit() {
    let (_, router) = state_with(Config {
        max_body_bytes: 4096,
        ..config()
    });
    assert!(VALLEY_TIF.len() > 4096);
    let posted = post_tiff(&router, "/rasters", VALLEY_TIF.to_vec()).await;
    assert_eq!(posted.status, StatusCode::CREATED, "{:?}", posted.body);
    let (_, small) = state_with(Config {
        max_cells: 1000,
        ..config()
    });
    let refused = post_tiff(&small, "/rasters", VALLEY_TIF.to_vec()).await;
    assert_eq!(
        refused.status,
        StatusCode::PAYLOAD_TOO_LARGE,
        "{:?}",
        refused.body
    );
}

#[tokio::test]
async fn inline_and_linked_geotiffs_decode_to_the_uploaded_raster() {
    let dir = std::env::temp_dir().join(format!("zonetally-geo-{}", std::process::id()));
    std::fs::create_dir_all(dir.join("rasters")).unwrap();
    std::fs::write(dir.join("rasters/valley.tif"), VALLEY_TIF).unwrap();
    let (_, router) = state_with(Config {
        data_dir: Some(dir.clone()),
        ..config()
    });
    let value = base64::engine::general_purpose::STANDARD.encode(VALLEY_TIF);
    let inline = post_json(
        &router,
        ZC,
        &valley_request(json!({"value": value, "mediaType": "image/tiff; application=geotiff"})),
        None,
    )
    .await;
    assert_eq!(inline.status, StatusCode::OK, "{:?}", inline.body);
    let linked = post_json(
        &router,
        ZC,
        &valley_request(json!({"href": "rasters/valley.tif"})),
        None,
    )
    .await;
    assert_eq!(linked.status, StatusCode::OK, "{:?}", linked.body);
    assert_eq!(inline.json(), linked.json());
    for href in [
        "../valley.tif",
        "/etc/passwd",
        "http://127.0.0.1/valley.tif",
    ] {
        let refused = post_json(&router, ZC, &valley_request(json!({"href": href})), None).await;
        let (status, kind, pointer) = problem_of(&refused);
        assert_eq!(
            (status, kind.as_str(), pointer.as_str()),
            (400, "/problems/invalid-input", "/inputs/raster/href"),
            "href {href}"
        );
    }
    let (_, closed) = state_with(config());
    let refused = post_json(
        &closed,
        ZC,
        &valley_request(json!({"href": "rasters/valley.tif"})),
        None,
    )
    .await;
    assert_eq!(refused.status, StatusCode::BAD_REQUEST);
    assert!(refused.json()["detail"]
        .as_str()
        .unwrap()
        .contains("--data-dir"));
    std::fs::remove_dir_all(dir).ok();
}

/// A u8 GeoTIFF of the tea grid (no georeferencing), written with the tiff crate.
fn u8_tiff(values: &[u8]) -> Vec<u8> {
    use tiff::encoder::{colortype, TiffEncoder};
    let mut out = Cursor::new(Vec::new());
    TiffEncoder::new(&mut out)
        .unwrap()
        .write_image::<colortype::Gray8>(4, 2, values)
        .unwrap();
    out.into_inner()
}

#[tokio::test]
async fn integer_rasters_need_a_scale_and_compact_values_decode_exactly() {
    let (_, router) = state_with(config());
    let percent = u8_tiff(&[50; 8]);
    let refused = post_tiff(&router, "/rasters", percent.clone()).await;
    let (status, kind, _) = problem_of(&refused);
    assert_eq!((status, kind.as_str()), (422, "/problems/unusable-content"));
    let detail = refused.json()["detail"].as_str().unwrap().to_string();
    assert!(
        detail.contains("row 0, column 0") && detail.contains("`scale`"),
        "{detail}"
    );
    let scaled = post_tiff(&router, "/rasters?scale=0.01", percent).await;
    assert_eq!(scaled.status, StatusCode::CREATED, "{:?}", scaled.body);
    let reference = scaled.json()["ref"].as_str().unwrap().to_string();
    // reference: IEEE 754 binary64 arithmetic, checked in CPython: 50 * 0.01 == 0.5 exactly,
    // so the scaled raster is the tea example's.
    let mut by_link = json!({"inputs": tea_inputs()});
    by_link["inputs"]["raster"] = json!({"href": format!("/rasters/{reference}")});
    let linked = post_json(&router, ZC, &by_link, None).await;
    assert_eq!(linked.status, StatusCode::OK, "{:?}", linked.body);
    let plain = post_json(&router, ZC, &json!({"inputs": tea_inputs()}), None).await;
    assert_eq!(linked.json()["zones"], plain.json()["zones"]);

    // values_base64: little-endian float64 (default) and float32, equal to the JSON values.
    let f32s: Vec<u8> = [0.5f32; 8].iter().flat_map(|v| v.to_le_bytes()).collect();
    let f64s: Vec<u8> = [0.5f64; 8].iter().flat_map(|v| v.to_le_bytes()).collect();
    let b64 = |b: &[u8]| base64::engine::general_purpose::STANDARD.encode(b);
    for raster in [
        json!({"width": 4, "height": 2, "values_base64": b64(&f64s)}),
        json!({"width": 4, "height": 2, "values_base64": b64(&f32s), "sample_type": "float32"}),
        json!({"width": 4, "height": 2, "values": [50, 50, 50, 50, 50, 50, 50, 50], "scale": 0.01}),
    ] {
        let mut body = json!({"inputs": tea_inputs()});
        body["inputs"]["raster"] = raster.clone();
        let r = post_json(&router, ZC, &body, None).await;
        assert_eq!(r.status, StatusCode::OK, "{raster}: {:?}", r.body);
        assert_eq!(r.json()["zones"], plain.json()["zones"], "{raster}");
    }
    let mut short = json!({"inputs": tea_inputs()});
    short["inputs"]["raster"] = json!({"width": 4, "height": 2, "values_base64": b64(&f64s[..56])});
    let (status, _, pointer) = problem_of(&post_json(&router, ZC, &short, None).await);
    assert_eq!(
        (status, pointer.as_str()),
        (400, "/inputs/raster/values_base64")
    );
}

#[tokio::test]
async fn zones_on_nodata_are_answered_not_refused() {
    let (_, router) = state_with(config());
    let mut inputs = tea_inputs();
    inputs["raster"]["values"][5] = Value::Null;
    inputs["zones"] = json!([
        {"id": "cups", "rect": {"row": 0, "col": 0, "rows": 1, "cols": 4}},
        {"id": "pair", "cells": [4, 5]},
        {"id": "dry", "cells": [5]},
        {"id": "none", "cells": []}
    ]);
    let r = post_json(&router, ZC, &json!({"inputs": inputs}), None).await;
    assert_eq!(r.status, StatusCode::OK, "{:?}", r.body);
    let doc = r.json();
    let pair = &doc["zones"][1];
    assert_eq!(
        (pair["cells"].as_u64(), pair["nodata_cells"].as_u64()),
        (Some(1), Some(1))
    );
    // reference: closed form. Seven valid cells all at p = 1/2 given 4 events: the events
    // are a uniform choice of 4 of the 7 cells, so P(one given cell holds one) = 4/7.
    let p1 = pair["pmf"]["values"][1].as_f64().unwrap();
    assert!((p1 - 4.0 / 7.0).abs() < 1e-15, "{p1}");
    for (i, id) in [(2, "dry"), (3, "none")] {
        let z = &doc["zones"][i];
        assert_eq!(z["id"], id);
        assert_eq!(z["no_valid_cells"], true);
        assert_eq!(z["cells"], 0);
        // reference: closed form; an empty set holds no event for certain.
        assert_eq!(z["mean"], 0.0);
        assert_eq!(z["pmf"], json!({"offset": 0, "values": [1.0]}));
        assert_eq!(z["exceedance"][0]["p"], 0.0);
    }
    assert_eq!(doc["zones"][2]["nodata_cells"], 1);
}

#[tokio::test]
async fn label_rasters_and_polygons_outside_the_raster_make_zones() {
    let (_, router) = state_with(config());
    let mut inputs = tea_inputs();
    // Labels on the tea grid: 0 is no zone.
    inputs["zones"] =
        json!({"labels": {"width": 4, "height": 2, "values": [1, 1, 0, 0, 2, 2, 2, 2]}});
    let r = post_json(&router, ZC, &json!({"inputs": inputs}), None).await;
    assert_eq!(r.status, StatusCode::OK, "{:?}", r.body);
    let doc = r.json();
    let ids: Vec<&str> = doc["zones"]
        .as_array()
        .unwrap()
        .iter()
        .map(|z| z["id"].as_str().unwrap())
        .collect();
    assert_eq!(ids, ["1", "2"]);
    // reference: closed form; 4 of 8 equal cells hold an event, so a 2-cell zone holds
    // 4 * 2 / 8 = 1 on average and a 4-cell zone 2.
    assert!((doc["zones"][0]["mean"].as_f64().unwrap() - 1.0).abs() < 1e-14);
    assert!((doc["zones"][1]["mean"].as_f64().unwrap() - 2.0).abs() < 1e-14);

    let mut inputs = tea_inputs();
    inputs["raster"]["geotransform"] = json!([0.0, 1.0, 0.0, 2.0, 0.0, -1.0]);
    inputs["zones"] = json!({"type": "FeatureCollection", "features": [
        {"type": "Feature", "id": 7, "properties": {}, "geometry": {"type": "Polygon",
            "coordinates": [[[0.0, 0.0], [2.0, 0.0], [2.0, 2.0], [0.0, 2.0], [0.0, 0.0]]]}},
        {"type": "Feature", "id": "far", "properties": {}, "geometry": {"type": "Polygon",
            "coordinates": [[[50.0, 50.0], [51.0, 50.0], [51.0, 51.0], [50.0, 50.0]]]}}
    ]});
    let r = post_json(&router, ZC, &json!({"inputs": inputs.clone()}), None).await;
    assert_eq!(r.status, StatusCode::OK, "{:?}", r.body);
    let doc = r.json();
    assert_eq!(doc["zones"][0]["id"], "7");
    assert_eq!(doc["zones"][0]["cells"], 4);
    assert_eq!(doc["zones"][1]["no_valid_cells"], true);
    // Ids from a property the request names.
    inputs["zones"]["features"][0]["properties"] = json!({"name": "west"});
    inputs["zones"]["features"][1]["properties"] = json!({"name": "beyond"});
    inputs["zone_options"] = json!({"id_property": "name"});
    let r = post_json(&router, ZC, &json!({"inputs": inputs}), None).await;
    assert_eq!(r.status, StatusCode::OK, "{:?}", r.body);
    let ids: Vec<Value> = r.json()["zones"]
        .as_array()
        .unwrap()
        .iter()
        .map(|z| z["id"].clone())
        .collect();
    assert_eq!(ids, [json!("west"), json!("beyond")]);
}

#[tokio::test]
async fn cell_posteriors_come_back_as_a_georeferenced_geotiff() {
    let (_, router) = state_with(config());
    let mut raster = tea_inputs()["raster"].clone();
    raster["geotransform"] = json!([1000.0, 10.0, 0.0, 2000.0, 0.0, -10.0]);
    raster["crs"] = json!(32631);
    raster["values"][7] = Value::Null;
    let inputs = json!({"raster": raster, "evidence": {"total": 4}});
    let as_json = post_json(&router, CP, &json!({"inputs": inputs}), None).await;
    assert_eq!(as_json.status, StatusCode::OK);
    let tif = post_accept(
        &router,
        CP,
        &json!({"inputs": inputs}),
        "image/tiff; application=geotiff",
    )
    .await;
    assert_eq!(tif.status, StatusCode::OK, "{:?}", tif.body);
    assert_eq!(
        tif.header("content-type").as_deref(),
        Some("image/tiff; application=geotiff")
    );
    let mut decoder = tiff::decoder::Decoder::new(Cursor::new(&tif.body[..])).unwrap();
    let values = match decoder.read_image().unwrap() {
        tiff::decoder::DecodingResult::F64(v) => v,
        other => panic!("not float64: {:?}", std::mem::discriminant(&other)),
    };
    assert_eq!(values.len(), 16, "two bands of 8 cells");
    let cells = as_json.json()["cells"].as_array().unwrap().clone();
    for c in &cells {
        let i = c["cell"].as_u64().unwrap() as usize;
        assert_eq!(values[2 * i], c["posterior"].as_f64().unwrap());
        assert_eq!(values[2 * i + 1], c["prior"].as_f64().unwrap());
    }
    // reference: closed form; 7 valid cells at p = 1/2 given 4 events: each holds one with
    // probability 4/7.
    assert!((values[0] - 4.0 / 7.0).abs() < 1e-15);
    assert!(values[14].is_nan(), "the nodata cell stays nodata");
    // The georeferencing survives, read off the output's own tags (GeoTIFF 1.1): cell size,
    // the tiepoint of the top-left corner, and the EPSG code in the GeoKey directory.
    use tiff::tags::Tag;
    assert_eq!(
        decoder.get_tag_f64_vec(Tag::ModelPixelScaleTag).unwrap(),
        [10.0, 10.0, 0.0]
    );
    assert_eq!(
        decoder.get_tag_f64_vec(Tag::ModelTiepointTag).unwrap(),
        [0.0, 0.0, 0.0, 1000.0, 2000.0, 0.0]
    );
    let keys = decoder.get_tag_u16_vec(Tag::GeoKeyDirectoryTag).unwrap();
    assert!(
        keys.chunks(4).any(|k| k[0] == 3072 && k[3] == 32631),
        "{keys:?}"
    );
}

#[tokio::test]
async fn formats_are_chosen_or_refused_never_ignored() {
    let (_, router) = state_with(config());
    let body = json!({"inputs": tea_inputs()});
    let r = post_accept(&router, ZC, &body, "text/html").await;
    assert_eq!(r.status, StatusCode::NOT_ACCEPTABLE);
    assert!(r.json()["detail"]
        .as_str()
        .unwrap()
        .contains("application/geo+json"));
    let r = post_accept(&router, ZC, &body, "text/html, */*;q=0.1").await;
    assert_eq!(r.status, StatusCode::OK);
    assert_eq!(
        r.header("content-type").as_deref(),
        Some("application/json")
    );
    let mut asked = body.clone();
    asked["outputs"] = json!({"counts": {"format": {"mediaType": "image/tiff"}}});
    let (status, _, pointer) = problem_of(&post_json(&router, ZC, &asked, None).await);
    assert_eq!(
        (status, pointer.as_str()),
        (400, "/outputs/counts/format/mediaType")
    );
    asked["outputs"] = json!({"counts": {"format": {"mediaType": "text/csv"}}});
    asked["response"] = json!("document");
    let (status, _, pointer) = problem_of(&post_json(&router, ZC, &asked, None).await);
    assert_eq!((status, pointer.as_str()), (400, "/response"));
    // An async job keeps its format for the results.
    asked["response"] = json!("raw");
    let job = post_json(&router, ZC, &asked, Some("respond-async")).await;
    assert_eq!(job.status, StatusCode::CREATED);
    let location = job.header("location").unwrap();
    service_support::wait_job(&router, &location).await;
    let results = get(&router, &format!("{location}/results")).await;
    assert_eq!(results.status, StatusCode::OK);
    assert!(results
        .header("content-type")
        .unwrap()
        .starts_with("text/csv"));
    assert!(results.body.starts_with(b"id,cells,nodata_cells"));
}

/// A minimal little-endian TIFF header claiming `width` x `height` float32 pixels.
fn claiming(width: u32, height: u32) -> Vec<u8> {
    let mut b = b"II*\0\x08\0\0\0".to_vec();
    let entries: [(u16, u16, u32, u32); 9] = [
        (256, 4, 1, width),
        (257, 4, 1, height),
        (258, 3, 1, 32),
        (259, 3, 1, 1),
        (262, 3, 1, 1),
        (273, 4, 1, 200),
        (277, 3, 1, 1),
        (279, 4, 1, 4),
        (339, 3, 1, 3),
    ];
    b.extend_from_slice(&(entries.len() as u16).to_le_bytes());
    for (tag, kind, count, value) in entries {
        b.extend_from_slice(&tag.to_le_bytes());
        b.extend_from_slice(&kind.to_le_bytes());
        b.extend_from_slice(&count.to_le_bytes());
        b.extend_from_slice(&value.to_le_bytes());
    }
    b.extend_from_slice(&0u32.to_le_bytes());
    b.resize(204, 0);
    b
}

#[tokio::test]
async fn malformed_files_get_a_specific_problem_and_the_server_keeps_serving() {
    let (_, router) = state_with(Config {
        max_vertices: 1000,
        ..config()
    });
    let truncated = post_tiff(
        &router,
        "/rasters",
        VALLEY_TIF[..VALLEY_TIF.len() / 2].to_vec(),
    )
    .await;
    assert_eq!(truncated.status.as_u16() / 100, 4, "{:?}", truncated.body);
    assert_ne!(truncated.status, StatusCode::NOT_FOUND);
    let huge = post_tiff(&router, "/rasters", claiming(1_000_000, 1_000_000)).await;
    assert_eq!(
        huge.status,
        StatusCode::PAYLOAD_TOO_LARGE,
        "{:?}",
        huge.body
    );
    let not_tiff = post_tiff(&router, "/rasters", b"GIF89a not a tiff".to_vec()).await;
    assert_eq!(not_tiff.status.as_u16() / 100, 4);
    let (status, kind, _) = problem_of(
        &send(
            &router,
            Request::post("/rasters")
                .header("content-type", "text/plain")
                .body(Body::from("0.5"))
                .unwrap(),
        )
        .await,
    );
    assert_eq!(
        (status, kind.as_str()),
        (415, "/problems/unsupported-media-type")
    );

    // A ring with more positions than the vertex limit.
    let ring: Vec<[f64; 2]> = (0..2000)
        .map(|i| {
            let a = i as f64 / 2000.0 * std::f64::consts::TAU;
            [2.0 + a.cos(), 1.0 + a.sin()]
        })
        .chain(std::iter::once([3.0, 1.0]))
        .collect();
    let mut inputs = tea_inputs();
    inputs["raster"]["geotransform"] = json!([0.0, 1.0, 0.0, 2.0, 0.0, -1.0]);
    inputs["zones"] = json!({"type": "Feature", "id": "big", "properties": {},
        "geometry": {"type": "Polygon", "coordinates": [ring]}});
    let r = post_json(&router, ZC, &json!({"inputs": inputs.clone()}), None).await;
    assert_eq!(r.status, StatusCode::PAYLOAD_TOO_LARGE, "{:?}", r.body);

    // Content that parses but cannot be used: 422 with a pointer into the geometry.
    inputs["zones"] = json!({"type": "Feature", "id": "open", "properties": {},
        "geometry": {"type": "Polygon", "coordinates": [[[0.0, 0.0], [1.0, 0.0], [1.0, 1.0], [0.0, 1.0]]]}});
    let (status, kind, pointer) =
        problem_of(&post_json(&router, ZC, &json!({"inputs": inputs.clone()}), None).await);
    assert_eq!(status, 422);
    assert_eq!(kind, "/problems/unusable-content");
    assert!(pointer.starts_with("/inputs/zones/geometry"), "{pointer}");
    inputs["zones"] = json!({"type": "Feature", "id": "well", "properties": {},
        "geometry": {"type": "Point", "coordinates": [1.0, 1.0]}});
    let point = post_json(&router, ZC, &json!({"inputs": inputs.clone()}), None).await;
    assert_eq!(point.status.as_u16(), 422);
    assert!(point.json()["detail"].as_str().unwrap().contains("buffer"));
    let mut rotated = tea_inputs();
    rotated["raster"]["geotransform"] = json!([0.0, 1.0, 0.1, 2.0, 0.0, -1.0]);
    let (status, _, pointer) =
        problem_of(&post_json(&router, ZC, &json!({"inputs": rotated}), None).await);
    assert_eq!(
        (status, pointer.as_str()),
        (422, "/inputs/raster/geotransform")
    );

    let health = get(&router, "/healthz").await;
    assert_eq!(health.status, StatusCode::OK);
}

//! Malformed and adversarial inputs to `zonetally::geo`: every one must come back as a specific
//! error, never a panic, a hang or an unbounded allocation; and the public functions on small
//! inputs whose answers follow from first principles.

use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use zonetally::geo::geotiff::{self, ReadLimits, SampleKind};
use zonetally::geo::zones::{self, Polygon, ZoneOptions};
use zonetally::geo::{outline, GeoError, GeoTransform, Grid};

fn utm_grid(width: u32, height: u32) -> Grid {
    Grid {
        width,
        height,
        transform: Some(GeoTransform::new(300_000.0, 5_000_000.0, 10.0, 10.0).unwrap()),
        crs: Some(32632),
    }
}

const LIMITS: ReadLimits = ReadLimits {
    max_cells: 25_000_000,
};

fn options() -> ZoneOptions<'static> {
    ZoneOptions {
        id_property: None,
        max_vertices: 1_000_000,
        raster_crs: Some(32632),
    }
}

/// Overwrite the value of a LONG/SHORT tag in the first IFD of a little-endian TIFF.
fn patch_tag(bytes: &mut [u8], tag: u16, value: u32) {
    let ifd = u32::from_le_bytes(bytes[4..8].try_into().unwrap()) as usize;
    let count = u16::from_le_bytes(bytes[ifd..ifd + 2].try_into().unwrap()) as usize;
    for k in 0..count {
        let at = ifd + 2 + 12 * k;
        if u16::from_le_bytes(bytes[at..at + 2].try_into().unwrap()) == tag {
            bytes[at + 2..at + 4].copy_from_slice(&4u16.to_le_bytes()); // LONG
            bytes[at + 4..at + 8].copy_from_slice(&1u32.to_le_bytes());
            bytes[at + 8..at + 12].copy_from_slice(&value.to_le_bytes());
            return;
        }
    }
    panic!("tag {tag} not in the test file");
}

#[test]
fn tiff_claiming_a_trillion_pixels_is_refused_before_decoding() {
    let mut bytes = geotiff::write(&utm_grid(1, 1), &[&[0.5]], None).unwrap();
    patch_tag(&mut bytes, 256, 1_000_000); // ImageWidth
    patch_tag(&mut bytes, 257, 1_000_000); // ImageLength
    patch_tag(&mut bytes, 278, 1_000_000); // RowsPerStrip, so the strip table stays consistent
    let err = geotiff::read(&bytes, &LIMITS).unwrap_err();
    assert_eq!(
        err,
        GeoError::TooManyCells {
            width: 1_000_000,
            height: 1_000_000,
            cells: 1e12,
            limit: 25_000_000
        }
    );
    assert_eq!(
        err.to_string(),
        "the GeoTIFF claims 1000000x1000000 = 1e12 pixels, above the limit of 25000000 cells: \
         coarsen or tile the raster"
    );
}

#[test]
fn truncated_tiff_at_every_length_is_an_error() {
    let values: Vec<f64> = (0..64).map(f64::from).collect();
    let bytes = geotiff::write(&utm_grid(8, 8), &[&values], Some(-1.0)).unwrap();
    for len in 0..bytes.len() {
        let result = geotiff::read(&bytes[..len], &LIMITS);
        assert!(result.is_err(), "a file cut to {len} bytes decoded");
    }
    assert_eq!(geotiff::read(&bytes, &LIMITS).unwrap().samples, values);
}

#[test]
fn corrupted_tiffs_never_escape_as_panics() {
    let values: Vec<f64> = (0..400).map(|i| f64::from(i).sqrt()).collect();
    let clean = geotiff::write(&utm_grid(20, 20), &[&values], Some(-9999.0)).unwrap();
    let mut rng = ChaCha8Rng::seed_from_u64(7);
    for _ in 0..3000 {
        let mut bytes = clean.clone();
        for _ in 0..rng.gen_range(1..6) {
            let at = rng.gen_range(0..bytes.len());
            bytes[at] = rng.gen();
        }
        // Any outcome but a panic (or a huge allocation) is acceptable here.
        let _ = geotiff::read(&bytes, &ReadLimits { max_cells: 10_000 });
    }
}

#[test]
fn not_a_tiff_and_rotation_are_specific_errors() {
    let err = geotiff::read(b"{\"type\": \"Feature\"}", &LIMITS).unwrap_err();
    assert!(matches!(err, GeoError::TiffDecode { .. }), "{err}");
    let err = GeoTransform::from_gdal([0.0, 10.0, 0.5, 100.0, 0.0, -10.0]).unwrap_err();
    assert_eq!(
        err,
        GeoError::Rotated {
            row_rotation: 0.5,
            column_rotation: 0.0
        }
    );
    let err = GeoTransform::from_gdal([0.0, 10.0, 0.0, 100.0, 0.0, 10.0]).unwrap_err();
    assert!(err.to_string().contains("south-up"), "{err}");
}

#[test]
fn geotransform_round_trips_and_centres() {
    // reference: closed form: x = x0 + (col + 0.5) dx, y = y0 - (row + 0.5) dy.
    let terms = [300_000.0, 10.0, 0.0, 5_000_000.0, 0.0, -10.0];
    let t = GeoTransform::from_gdal(terms).unwrap();
    assert_eq!(t.to_gdal(), terms);
    assert_eq!(t.cell_centre(2, 3), (300_035.0, 4_999_975.0));
}

#[test]
fn written_bands_read_back_with_georeferencing() {
    // reference: closed form: write then read returns the same f64 bits, transform and CRS.
    let grid = utm_grid(6, 4);
    let posterior: Vec<f64> = (0..24).map(|i| f64::from(i) / 24.0).collect();
    let bytes = geotiff::write(&grid, &[&posterior], Some(-9999.0)).unwrap();
    let raster = geotiff::read(&bytes, &LIMITS).unwrap();
    assert_eq!(raster.grid, grid);
    assert_eq!(raster.samples, posterior);
    assert_eq!(raster.sample_kind, SampleKind::F64);
    let err = geotiff::write(&grid, &[&posterior[..5]], None).unwrap_err();
    assert!(matches!(
        err,
        GeoError::BandLength {
            found: 5,
            expected: 24,
            ..
        }
    ));
    let err = geotiff::write(&grid, &[], None).unwrap_err();
    assert!(matches!(err, GeoError::WriteBandCount { bands: 0, .. }));
}

#[test]
fn ten_million_vertex_ring_stops_at_the_limit() {
    let mut text = String::with_capacity(70_000_000);
    text.push_str(r#"{"type":"FeatureCollection","features":[{"type":"Feature","id":1,"geometry":{"type":"Polygon","coordinates":[["#);
    for i in 0..10_000_000u32 {
        if i > 0 {
            text.push(',');
        }
        text.push_str(if i % 2 == 0 { "[1,2]" } else { "[3,4]" });
    }
    text.push_str("]]}}]}");
    let err = zones::parse_zones(text.as_bytes(), &options()).unwrap_err();
    assert_eq!(
        err,
        GeoError::TooManyVertices {
            pointer: Some("/features/0/geometry/coordinates/0/1000000".into()),
            limit: 1_000_000
        }
    );
}

fn parse_err(json: &str) -> GeoError {
    zones::parse_zones(json.as_bytes(), &options()).unwrap_err()
}

const SQUARE: &str = "[[[0,0],[10,0],[10,10],[0,10],[0,0]]]";

#[test]
fn geojson_errors_point_at_the_problem() {
    let line = parse_err(&format!(
        r#"{{"type":"FeatureCollection","features":[
            {{"type":"Feature","id":"a","geometry":{{"type":"Polygon","coordinates":{SQUARE}}}}},
            {{"type":"Feature","id":"b","geometry":{{"type":"LineString","coordinates":[[0,0],[1,1]]}}}}]}}"#
    ));
    assert_eq!(line.pointer(), Some("/features/1/geometry"));
    assert!(line.to_string().contains("buffer"), "{line}");

    let open = parse_err(
        r#"{"type":"Feature","id":"a","geometry":{"type":"Polygon","coordinates":[[[0,0],[1,0],[1,1],[0,1]]]}}"#,
    );
    assert!(matches!(open, GeoError::InvalidRing { .. }));
    assert_eq!(open.pointer(), Some("/geometry/coordinates/0"));

    let short = parse_err(
        r#"{"type":"Feature","id":"a","geometry":{"type":"MultiPolygon","coordinates":[[[[0,0],[1,0],[0,0]]]]}}"#,
    );
    assert_eq!(short.pointer(), Some("/geometry/coordinates/0/0"));

    let huge = parse_err(
        r#"{"type":"Feature","id":"a","geometry":{"type":"Polygon","coordinates":[[[0,0],[1e300,0],[1,1],[0,0]]]}}"#,
    );
    assert!(matches!(huge, GeoError::BadCoordinate { value, .. } if value == 1e300));
    assert_eq!(huge.pointer(), Some("/geometry/coordinates/0/1/0"));

    let dup = parse_err(&format!(
        r#"{{"type":"FeatureCollection","features":[
            {{"type":"Feature","id":7,"geometry":{{"type":"Polygon","coordinates":{SQUARE}}}}},
            {{"type":"Feature","id":7,"geometry":{{"type":"Polygon","coordinates":{SQUARE}}}}}]}}"#
    ));
    assert!(
        matches!(&dup, GeoError::DuplicateZoneId { id, first, .. } if id == "7" && first == "/features/0/id")
    );
    assert_eq!(dup.pointer(), Some("/features/1/id"));

    let missing = parse_err(&format!(
        r#"{{"type":"Feature","geometry":{{"type":"Polygon","coordinates":{SQUARE}}}}}"#
    ));
    assert_eq!(missing.pointer(), Some("/id"));

    let crs = parse_err(&format!(
        r#"{{"type":"Feature","id":"a","crs":{{"type":"name","properties":{{"name":"urn:ogc:def:crs:EPSG::4326"}}}},
            "geometry":{{"type":"Polygon","coordinates":{SQUARE}}}}}"#
    ));
    assert_eq!(
        crs,
        GeoError::CrsMismatch {
            pointer: Some("/crs".into()),
            found: 4326,
            raster: 32632
        }
    );

    let syntax = parse_err(r#"{"type":"Feature", "id": }"#);
    assert!(
        matches!(syntax, GeoError::JsonSyntax { line: 1, .. }),
        "{syntax}"
    );

    let wrong_type = parse_err(r#"{"type":"Feature","id":"a","geometry":{"type":5}}"#);
    assert_eq!(wrong_type.pointer(), Some("/geometry/type"));
}

#[test]
fn ids_come_from_a_named_property() {
    let doc = format!(
        r#"{{"type":"FeatureCollection","crs":{{"type":"name","properties":{{"name":"EPSG:32632"}}}},
           "features":[
            {{"type":"Feature","properties":{{"zone/name":"north"}},"geometry":{{"type":"Polygon","coordinates":{SQUARE}}}}},
            {{"type":"Feature","properties":{{"zone/name":12}},"geometry":{{"type":"MultiPolygon","coordinates":[{SQUARE},{SQUARE}]}}}}]}}"#
    );
    let opts = ZoneOptions {
        id_property: Some("zone/name"),
        ..options()
    };
    let zones = zones::parse_zones(doc.as_bytes(), &opts).unwrap();
    assert_eq!(zones.len(), 2);
    assert_eq!(zones[0].id, "north");
    assert_eq!(zones[1].id, "12");
    assert_eq!(zones[1].polygons.len(), 2);
    let missing = zones::parse_zones(
        format!(r#"{{"type":"Feature","properties":{{}},"geometry":{{"type":"Polygon","coordinates":{SQUARE}}}}}"#)
            .as_bytes(),
        &opts,
    )
    .unwrap_err();
    assert_eq!(missing.pointer(), Some("/properties/zone~1name"));
}

fn cell_grid(width: u32, height: u32) -> Grid {
    Grid {
        width,
        height,
        transform: Some(GeoTransform::new(0.0, f64::from(height), 1.0, 1.0).unwrap()),
        crs: None,
    }
}

fn rect(x0: f64, y0: f64, x1: f64, y1: f64) -> Vec<[f64; 2]> {
    vec![[x0, y0], [x1, y0], [x1, y1], [x0, y1], [x0, y0]]
}

#[test]
fn rasterize_centre_and_touch_rules() {
    let g = cell_grid(6, 6);
    // A 0.5-cell square around the centre of cell (row 2, col 3), map y 3..4.
    let inner = Polygon {
        rings: vec![rect(3.25, 3.25, 3.75, 3.75)],
    };
    // reference: closed form: the square holds exactly one cell centre.
    assert_eq!(
        zones::rasterize(std::slice::from_ref(&inner), &g, false),
        vec![2 * 6 + 3]
    );
    assert_eq!(zones::rasterize(&[inner], &g, true), vec![2 * 6 + 3]);
    // A square off every centre: nothing by centre, its one cell when touched.
    let off = Polygon {
        rings: vec![rect(3.05, 3.05, 3.2, 3.2)],
    };
    assert!(zones::rasterize(std::slice::from_ref(&off), &g, false).is_empty());
    assert_eq!(zones::rasterize(&[off], &g, true), vec![2 * 6 + 3]);
    // Whole grid and beyond: every cell once, in order.
    let all = Polygon {
        rings: vec![rect(-10.0, -10.0, 20.0, 20.0)],
    };
    assert_eq!(
        zones::rasterize(&[all], &g, true),
        (0..36).collect::<Vec<u32>>()
    );
}

#[test]
fn labels_and_outlines_agree() {
    // reference: closed form: the outline of a label zone covers its cells' area exactly.
    let labels = [1.0, 1.0, 0.0, 2.0, 1.0, 0.0, 2.0, 2.0, -1.0];
    let zones = zones::zones_from_labels(&labels, Some(-1.0)).unwrap();
    assert_eq!(zones, vec![(1, vec![0, 1, 4]), (2, vec![3, 6, 7])]);
    let g = cell_grid(3, 3);
    let traced = outline::trace(&zones[0].1, &g).unwrap();
    assert_eq!(traced.len(), 1);
    let area: f64 = traced[0].rings[0]
        .windows(2)
        .map(|w| w[0][0] * w[1][1] - w[1][0] * w[0][1])
        .sum::<f64>()
        / 2.0;
    assert_eq!(area, 3.0);
    let geo = outline::to_geojson(&zones[1].1, &g).unwrap();
    assert_eq!(geo["type"], "MultiPolygon");
    let err = outline::trace(
        &[0],
        &Grid {
            transform: None,
            ..g
        },
    )
    .unwrap_err();
    assert!(matches!(err, GeoError::NoTransform { .. }));
}

#[test]
fn inputs_the_fuzzer_found_are_refused_without_a_panic() {
    // Every file under tests/fuzz/regressions/geotiff once crashed the `geotiff` fuzz target.
    // Our reader catches a panic of the tiff crate, but the crate itself must not panic either
    // (empty-sample-format.tif: a SampleFormat tag of count 0 indexed an empty list in tiff
    // 0.10.3; 0.11 refuses it).
    let dir =
        std::path::Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/fuzz/regressions/geotiff");
    let mut seen = 0;
    for entry in std::fs::read_dir(&dir).unwrap() {
        let path = entry.unwrap().path();
        let bytes = std::fs::read(&path).unwrap();
        let direct = std::panic::catch_unwind(|| {
            tiff::decoder::Decoder::new(std::io::Cursor::new(&bytes[..])).map(|_| ())
        });
        assert!(
            direct.is_ok(),
            "{}: the tiff crate panicked",
            path.display()
        );
        let err = geotiff::read(&bytes, &LIMITS).unwrap_err();
        assert!(
            matches!(
                err,
                GeoError::TiffDecode { .. }
                    | GeoError::TiffUnsupported { .. }
                    | GeoError::TiffTag { .. }
            ),
            "{}: {err:?}",
            path.display()
        );
        seen += 1;
    }
    assert!(seen >= 1);
}

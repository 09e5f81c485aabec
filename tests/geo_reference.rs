//! The Rust side of the outside reference check for `zonetally::geo`.
//!
//! `tests/reference/geo/check_geo.py` writes fixtures made with rasterio (GDAL) and points
//! `ZONETALLY_GEO_FIXTURES` at them; this test then compares our rasterisation and GeoTIFF
//! reading with GDAL's answers, and writes our GeoTIFFs and outlines for the script to check
//! with rasterio and shapely. Without the variable the test has nothing to compare and passes.

use std::fs;
use std::path::Path;

use serde_json::{json, Value};
use zonetally::geo::geotiff::{self, ReadLimits};
use zonetally::geo::zones::{self, ZoneOptions};
use zonetally::geo::{outline, GeoError, GeoTransform, Grid};

fn grid_from(v: &Value) -> Grid {
    let gdal: Vec<f64> = serde_json::from_value(v["gdal"].clone()).unwrap();
    Grid {
        width: v["width"].as_u64().unwrap() as u32,
        height: v["height"].as_u64().unwrap() as u32,
        transform: Some(GeoTransform::from_gdal(gdal.try_into().unwrap()).unwrap()),
        crs: None,
    }
}

fn read_f64s(path: &Path) -> Vec<f64> {
    fs::read(path)
        .unwrap()
        .chunks_exact(8)
        .map(|c| f64::from_le_bytes(c.try_into().unwrap()))
        .collect()
}

fn same_bits(a: &[f64], b: &[f64]) -> bool {
    a.len() == b.len()
        && a.iter()
            .zip(b)
            .all(|(x, y)| x == y || (x.is_nan() && y.is_nan()))
}

#[derive(Default)]
struct Tally {
    passed: usize,
    failed: usize,
    known: usize,
}

impl Tally {
    fn check(&mut self, ok: bool, what: impl FnOnce() -> String) {
        if ok {
            self.passed += 1;
        } else {
            self.failed += 1;
            println!("MISMATCH {}", what());
        }
    }
}

fn rasterize_cases(dir: &Path, tally: &mut Tally) {
    let doc: Value = serde_json::from_slice(&fs::read(dir.join("polygons.json")).unwrap()).unwrap();
    let grids: Vec<Grid> = doc["grids"]
        .as_array()
        .unwrap()
        .iter()
        .map(grid_from)
        .collect();
    for case in doc["cases"].as_array().unwrap() {
        let grid = &grids[case["grid"].as_u64().unwrap() as usize];
        let feature = json!({"type": "Feature", "id": "zone", "geometry": case["geometry"]});
        let options = ZoneOptions {
            id_property: None,
            max_vertices: 1_000_000,
            raster_crs: None,
        };
        let parsed = zones::parse_zones(feature.to_string().as_bytes(), &options).unwrap();
        let all_touched = case["all_touched"].as_bool().unwrap();
        let ours = zones::rasterize(&parsed[0].polygons, grid, all_touched);
        let theirs: Vec<u32> = serde_json::from_value(case["cells"].clone()).unwrap();
        // reference: rasterio.features.rasterize (GDAL), all_touched as in the case
        tally.check(ours == theirs, || {
            let extra: Vec<_> = ours.iter().filter(|c| !theirs.contains(c)).collect();
            let missing: Vec<_> = theirs.iter().filter(|c| !ours.contains(c)).collect();
            format!(
                "rasterize {} all_touched={all_touched}: extra {extra:?}, missing {missing:?}",
                case["name"]
            )
        });
    }
}

fn tiff_cases(dir: &Path, tally: &mut Tally) {
    let doc: Value = serde_json::from_slice(&fs::read(dir.join("tiffs.json")).unwrap()).unwrap();
    let limits = ReadLimits {
        max_cells: 1_000_000,
    };
    for entry in doc["tiffs"].as_array().unwrap() {
        let file = entry["file"].as_str().unwrap();
        let bytes = fs::read(dir.join(file)).unwrap();
        let result = geotiff::read(&bytes, &limits);
        if entry.get("expect_error").is_some() {
            tally.check(
                matches!(result, Err(GeoError::BandCount { bands: 2 })),
                || format!("{file}: expected the band-count error, got {result:?}"),
            );
            continue;
        }
        let raster = match result {
            Ok(r) => r,
            // A limit of the tiff crate in use, answered with a specific error, not wrong data.
            Err(GeoError::TiffUnsupported {
                feature: "this LZW stream",
                value,
                ..
            }) => {
                tally.known += 1;
                println!("KNOWN {file}: tiff 0.10 cannot decode this LZW stream ({value})");
                continue;
            }
            Err(e) => {
                tally.check(false, || format!("{file}: {e}"));
                continue;
            }
        };
        // reference: rasterio (GDAL) reading the same file: values, transform, CRS, nodata
        let expected = read_f64s(&dir.join(format!("{file}.f64")));
        tally.check(same_bits(&raster.samples, &expected), || {
            format!("{file}: values differ")
        });
        let gdal: Vec<f64> = serde_json::from_value(entry["gdal"].clone()).unwrap();
        let ours = raster.grid.transform.map(|t| t.to_gdal().to_vec());
        tally.check(ours.as_deref() == Some(&gdal[..]), || {
            format!("{file}: transform {ours:?} vs {gdal:?}")
        });
        let epsg = entry["epsg"].as_u64().map(|c| c as u32);
        tally.check(raster.grid.crs == epsg, || {
            format!("{file}: crs {:?} vs {epsg:?}", raster.grid.crs)
        });
        let nodata = entry["nodata"].as_f64();
        tally.check(raster.nodata == nodata, || {
            format!("{file}: nodata {:?} vs {nodata:?}", raster.nodata)
        });
    }
}

/// File name, grid, bands and nodata of one GeoTIFF we write.
type OurTiff<'a> = (&'a str, Grid, Vec<&'a [f64]>, Option<f64>);

/// Our GeoTIFFs for the script to read with rasterio.
fn write_ours(dir: &Path) {
    let out = dir.join("ours");
    fs::create_dir_all(&out).unwrap();
    let (w, h) = (29u32, 17u32);
    let cells = (w * h) as usize;
    let band = |k: f64| -> Vec<f64> {
        (0..cells)
            .map(|i| {
                if i % 37 == 5 {
                    f64::NAN
                } else {
                    (i as f64 * 0.37 + k).sin()
                }
            })
            .collect()
    };
    let utm = GeoTransform::new(612_000.0, 4_388_000.0, 20.0, 20.0).unwrap();
    let lonlat = GeoTransform::new(-73.25, 12.5, 0.0625, 0.0625).unwrap();
    let (b1, b2) = (band(0.0), band(1.5));
    let specs: Vec<OurTiff> = vec![
        (
            "one_band_utm.tif",
            Grid {
                width: w,
                height: h,
                transform: Some(utm),
                crs: Some(32633),
            },
            vec![&b1],
            Some(-9999.0),
        ),
        (
            "two_bands_lonlat.tif",
            Grid {
                width: w,
                height: h,
                transform: Some(lonlat),
                crs: Some(4326),
            },
            vec![&b1, &b2],
            Some(-1.0),
        ),
        (
            "no_crs_nan_nodata.tif",
            Grid {
                width: w,
                height: h,
                transform: Some(utm),
                crs: None,
            },
            vec![&b2],
            Some(f64::NAN),
        ),
        (
            "no_nodata.tif",
            Grid {
                width: w,
                height: h,
                transform: Some(utm),
                crs: Some(32633),
            },
            vec![&b1],
            None,
        ),
    ];
    let mut manifest = Vec::new();
    for (file, grid, bands, nodata) in specs {
        let bytes = geotiff::write(&grid, &bands, nodata).unwrap();
        fs::write(out.join(file), bytes).unwrap();
        let raw: Vec<u8> = bands
            .iter()
            .flat_map(|b| b.iter().flat_map(|v| v.to_le_bytes()))
            .collect();
        fs::write(out.join(format!("{file}.f64")), raw).unwrap();
        manifest.push(json!({
            "file": file,
            "bands": bands.len(),
            "gdal": grid.transform.unwrap().to_gdal(),
            "epsg": grid.crs,
            "nodata": nodata.map(|v| if v.is_nan() { json!("nan") } else { json!(v) }),
        }));
    }
    fs::write(
        out.join("manifest.json"),
        json!({ "tiffs": manifest }).to_string(),
    )
    .unwrap();
}

fn write_outlines(dir: &Path) {
    let doc: Value = serde_json::from_slice(&fs::read(dir.join("cellsets.json")).unwrap()).unwrap();
    let grid = grid_from(&doc["grid"]);
    let outlines: Vec<Value> = doc["sets"]
        .as_array()
        .unwrap()
        .iter()
        .map(|s| {
            let cells: Vec<u32> = serde_json::from_value(s["cells"].clone()).unwrap();
            outline::to_geojson(&cells, &grid).unwrap()
        })
        .collect();
    fs::write(
        dir.join("ours").join("outlines.json"),
        json!({ "outlines": outlines }).to_string(),
    )
    .unwrap();
}

#[test]
fn geo_against_rasterio_fixtures() {
    let Ok(dir) = std::env::var("ZONETALLY_GEO_FIXTURES") else {
        println!("ZONETALLY_GEO_FIXTURES is not set: run tests/reference/geo/check_geo.py");
        return;
    };
    let dir = Path::new(&dir);
    let mut tally = Tally::default();
    rasterize_cases(dir, &mut tally);
    tiff_cases(dir, &mut tally);
    write_ours(dir);
    write_outlines(dir);
    println!(
        "geo reference (rust): {} passed, {} failed",
        tally.passed, tally.failed
    );
    println!("geo reference (rust) known limitations: {}", tally.known);
    assert_eq!(tally.failed, 0, "see the MISMATCH lines above");
}

//! GeoJSON zones: any bytes either decode into zones whose rasterised cells lie inside the grid,
//! or give an error; nothing panics, and the position limit holds.
#![no_main]

use libfuzzer_sys::fuzz_target;
use zonetally::geo::zones::{parse_zones, rasterize, ZoneOptions};
use zonetally::geo::{GeoTransform, Grid};

const MAX_VERTICES: u64 = 10_000;

fuzz_target!(|data: &[u8]| {
    let options = ZoneOptions {
        id_property: None,
        max_vertices: MAX_VERTICES,
        raster_crs: Some(32633),
    };
    let Ok(zones) = parse_zones(data, &options) else {
        return;
    };
    let positions: usize = zones
        .iter()
        .flat_map(|z| &z.polygons)
        .map(|p| p.rings.iter().map(Vec::len).sum::<usize>())
        .sum();
    assert!(
        positions as u64 <= MAX_VERTICES,
        "{positions} positions passed the limit"
    );
    let grid = Grid {
        width: 40,
        height: 30,
        transform: GeoTransform::from_gdal([0.0, 10.0, 0.0, 300.0, 0.0, -10.0]).ok(),
        crs: Some(32633),
    };
    for zone in &zones {
        for all_touched in [false, true] {
            let cells = rasterize(&zone.polygons, &grid, all_touched);
            assert!(
                cells.windows(2).all(|w| w[0] < w[1]),
                "cells not sorted and unique"
            );
            assert!(cells.iter().all(|&c| u64::from(c) < grid.cell_count()));
        }
    }
});

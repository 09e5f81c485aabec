//! GeoTIFF rasters: any bytes either decode into a raster within the cell limit, with as many
//! values as cells, or give an error; nothing panics.
#![no_main]

use libfuzzer_sys::fuzz_target;
use zonetally::geo::geotiff::{read, ReadLimits};

const MAX_CELLS: u64 = 1 << 20;

fuzz_target!(|data: &[u8]| {
    let Ok(raster) = read(
        data,
        &ReadLimits {
            max_cells: MAX_CELLS,
        },
    ) else {
        return;
    };
    let cells = raster.grid.cell_count();
    assert!(cells <= MAX_CELLS, "{cells} cells passed the limit");
    assert_eq!(raster.samples.len() as u64, cells);
});

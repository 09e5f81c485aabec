//! The raster source the request targets decode with: it resolves nothing and reads no file,
//! so the fuzzer never touches the disk.

use zonetally::api::decode::{DecodeError, Frame, HeldRaster, RasterSource};
use zonetally::engine::Raster;

pub struct Sealed;

impl RasterSource for Sealed {
    fn resolve(&self, _: &str) -> Result<(String, HeldRaster), DecodeError> {
        Err(DecodeError::at("/raster/ref", "no rasters are held"))
    }
    fn keep(&self, raster: Raster, frame: Frame) -> (Option<String>, HeldRaster) {
        let raster = std::sync::Arc::new(raster);
        (None, HeldRaster { raster, frame })
    }
    fn read_file(&self, _: &str, _: u64) -> Result<Vec<u8>, DecodeError> {
        Err(DecodeError::at("/raster/href", "no files are read"))
    }
}

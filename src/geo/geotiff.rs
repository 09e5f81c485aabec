//! GeoTIFF in and out: one band of cell values plus its georeferencing and nodata value.
//!
//! Reading decodes float32, float64, uint8 and uint16 single-band images (striped or tiled;
//! uncompressed, deflate or LZW; predictors 1 to 3) with the `tiff` crate, and reads the
//! GeoTIFF tags itself: pixel scale, tiepoint, model transformation (rotation refused), the
//! GeoKey directory (model type, raster type, EPSG code) and GDAL's nodata tag. Writing emits
//! float64 deflate GeoTIFFs of one or more bands. This module owns byte layouts only: it is
//! handed a byte slice, never a path, and the declared pixel count is checked against the
//! caller's limit before any pixel buffer is reserved.

use std::io::Cursor;
use std::panic::{catch_unwind, AssertUnwindSafe};

use tiff::decoder::{Decoder, DecodingResult, Limits};
use tiff::encoder::colortype::ColorType;
use tiff::encoder::compression::DeflateLevel;
use tiff::encoder::{Compression, TiffEncoder};
use tiff::tags::{PhotometricInterpretation, SampleFormat, Tag};
use tiff::{TiffError, TiffFormatError, TiffUnsupportedError};

use super::{GeoError, GeoTransform, Grid};

/// How much a caller lets one decode reserve.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct ReadLimits {
    /// Largest `width * height` accepted; checked before pixel data is decoded.
    pub max_cells: u64,
}

/// The stored sample type of a decoded raster (values are returned as `f64` either way).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum SampleKind {
    F32,
    F64,
    U8,
    U16,
}

/// A decoded single-band GeoTIFF: row-major values, one per cell.
#[derive(Debug, Clone, PartialEq)]
pub struct TiffRaster {
    pub grid: Grid,
    pub samples: Vec<f64>,
    pub nodata: Option<f64>,
    pub sample_kind: SampleKind,
}

/// Most bands [`write`] emits: posterior and prior plus room for two more. Each band count
/// needs its own encoder colour type, so the count is fixed at compile time.
pub const MAX_WRITE_BANDS: usize = 4;

/// Bytes of the widest sample held while decoding (float64): bounds the tiff decoder's buffer.
const WIDEST_SAMPLE_BYTES: u64 = 8;

/// GeoKey ids (GeoTIFF 1.1, section 7) and values read or written here.
const KEY_MODEL_TYPE: u16 = 1024;
const KEY_RASTER_TYPE: u16 = 1025;
const KEY_GEOGRAPHIC_TYPE: u16 = 2048;
const KEY_PROJECTED_TYPE: u16 = 3072;
const MODEL_PROJECTED: u16 = 1;
const MODEL_GEOGRAPHIC: u16 = 2;
const RASTER_PIXEL_IS_AREA: u16 = 1;
const RASTER_PIXEL_IS_POINT: u16 = 2;
/// GeoTIFF's "user-defined" code: no EPSG code to report.
const USER_DEFINED: u16 = 32767;

/// TIFF compression codes accepted on input: none, LZW, deflate (Adobe), deflate (old code).
const COMPRESSION_ACCEPTED: [u16; 4] = [1, COMPRESSION_LZW, 8, 32946];
const COMPRESSION_LZW: u16 = 5;

const DECODE_HINT: &str = "send a complete single-band GeoTIFF (uncompressed, deflate or LZW)";

/// Decode a single-band GeoTIFF from `bytes`.
///
/// The declared `width * height` is checked against `limits.max_cells` before any pixel data
/// is decoded, and the tiff decoder's own buffer limit is set to match.
pub fn read(bytes: &[u8], limits: &ReadLimits) -> Result<TiffRaster, GeoError> {
    // The tiff crate is fuzzed, but it is third-party code on a request path: an internal
    // panic there must become an error here, not a failed request thread.
    catch_unwind(AssertUnwindSafe(|| read_checked(bytes, limits))).unwrap_or_else(|_| {
        Err(GeoError::TiffDecode {
            detail: "the decoder met an internal inconsistency".into(),
            hint: DECODE_HINT,
        })
    })
}

fn read_checked(bytes: &[u8], limits: &ReadLimits) -> Result<TiffRaster, GeoError> {
    let mut decoder = Decoder::new(Cursor::new(bytes)).map_err(decode_error)?;
    let (width, height) = decoder.dimensions().map_err(decode_error)?;
    let cells = u64::from(width) * u64::from(height);
    if cells > limits.max_cells {
        return Err(GeoError::TooManyCells {
            width: width.into(),
            height: height.into(),
            cells: cells as f64,
            limit: limits.max_cells,
        });
    }
    if cells == 0 {
        return Err(GeoError::TiffDecode {
            detail: format!("the image is {width}x{height}, with no cells"),
            hint: DECODE_HINT,
        });
    }
    let bands: u32 =
        find_unsigned(&mut decoder, Tag::SamplesPerPixel, "SamplesPerPixel")?.unwrap_or(1);
    if bands != 1 {
        return Err(GeoError::BandCount { bands });
    }
    let sample_kind = sample_kind(&mut decoder)?;
    let compression = check_layout(&mut decoder)?;

    let transform = read_transform(&mut decoder)?;
    let keys = read_geokeys(&mut decoder)?;
    let transform = match transform {
        Some(mut terms) => {
            if keys.raster_type == Some(RASTER_PIXEL_IS_POINT) {
                // PixelIsPoint ties cell centres to the tiepoint; move the origin to the corner
                // of cell (0, 0) by half a cell, as GDAL does.
                terms[0] -= terms[1] * 0.5 + terms[2] * 0.5;
                terms[3] -= terms[4] * 0.5 + terms[5] * 0.5;
            }
            Some(GeoTransform::from_gdal(terms)?)
        }
        None => None,
    };
    let nodata = read_nodata(&mut decoder)?;

    // Tags are read with the default limits above; the pixel buffer is bounded by the caller's
    // cell limit from here on.
    let mut tiff_limits = Limits::default();
    tiff_limits.decoding_buffer_size =
        usize::try_from(limits.max_cells.saturating_mul(WIDEST_SAMPLE_BYTES)).unwrap_or(usize::MAX);
    let decoder = decoder.with_limits(tiff_limits.clone());
    let samples = read_bands(
        bytes,
        decoder,
        &tiff_limits,
        width,
        height,
        sample_kind,
        compression,
    )?;
    if samples.len() as u64 != cells {
        return Err(GeoError::TiffDecode {
            detail: format!(
                "{} samples were decoded for {width}x{height} cells",
                samples.len()
            ),
            hint: DECODE_HINT,
        });
    }
    Ok(TiffRaster {
        grid: Grid {
            width,
            height,
            transform,
            crs: keys.epsg,
        },
        samples,
        nodata,
        sample_kind,
    })
}

/// Decodes the pixels band by band in parallel: a band is one strip, or one row of tiles, and
/// so a run of whole image rows. Each worker opens its own decoder on the same bytes and writes
/// its bands into their rows of the one output buffer.
fn read_bands(
    bytes: &[u8],
    mut decoder: Decoder<Cursor<&[u8]>>,
    tiff_limits: &Limits,
    width: u32,
    height: u32,
    kind: SampleKind,
    compression: u16,
) -> Result<Vec<f64>, GeoError> {
    use rayon::prelude::*;
    use tiff::decoder::ChunkType;
    let chunk_type = decoder.get_chunk_type();
    let (chunk_w, chunk_h) = decoder.chunk_dimensions();
    if chunk_w == 0 || chunk_h == 0 {
        return Err(GeoError::TiffDecode {
            detail: format!("the image declares {chunk_w}x{chunk_h} chunks"),
            hint: DECODE_HINT,
        });
    }
    let across = match chunk_type {
        ChunkType::Strip => 1,
        ChunkType::Tile => width.div_ceil(chunk_w),
    };
    let declared = match chunk_type {
        ChunkType::Strip => decoder.strip_count(),
        ChunkType::Tile => decoder.tile_count(),
    }
    .map_err(decode_error)?;
    let bands = height.div_ceil(chunk_h);
    if u64::from(declared) < u64::from(bands) * u64::from(across) {
        return Err(GeoError::TiffDecode {
            detail: format!(
                "the image has {declared} chunks, fewer than its {width}x{height} cells need"
            ),
            hint: DECODE_HINT,
        });
    }
    let band_cells = chunk_h as usize * width as usize;
    let mut samples = vec![0.0f64; width as usize * height as usize];
    samples
        .par_chunks_mut(band_cells)
        .enumerate()
        .try_for_each_init(
            || {
                Decoder::new(Cursor::new(bytes))
                    .map(|d| d.with_limits(tiff_limits.clone()))
                    .map_err(|e| e.to_string())
            },
            |decoder, (band, out)| {
                let decoder = decoder.as_mut().map_err(|e| GeoError::TiffDecode {
                    detail: e.clone(),
                    hint: DECODE_HINT,
                })?;
                for col in 0..across {
                    let index = band as u32 * across + col;
                    let (data_w, data_h) = decoder.chunk_data_dimensions(index);
                    let chunk = read_chunk(decoder, index, compression)?;
                    let x0 = (col * chunk_w) as usize;
                    let (data_w, data_h) = (data_w as usize, data_h as usize);
                    for r in 0..data_h.min(out.len() / width as usize) {
                        let row = &mut out[r * width as usize + x0..][..data_w];
                        place(&chunk, kind, r * data_w, row)?;
                    }
                }
                Ok(())
            },
        )?;
    Ok(samples)
}

/// One chunk decoded, the LZW reader's known failures named.
fn read_chunk(
    decoder: &mut Decoder<Cursor<&[u8]>>,
    index: u32,
    compression: u16,
) -> Result<DecodingResult, GeoError> {
    // tiff 0.10's LZW reader stops on some tiled streams GDAL writes (with a panic, caught
    // here): name that case so the fix (re-save with deflate) is clear.
    match catch_unwind(AssertUnwindSafe(|| decoder.read_chunk(index))) {
        Ok(Ok(decoded)) => Ok(decoded),
        Ok(Err(TiffError::IoError(e))) if compression == COMPRESSION_LZW => {
            Err(lzw_failure(e.to_string()))
        }
        Ok(Err(e)) => Err(decode_error(e)),
        Err(_) if compression == COMPRESSION_LZW => {
            Err(lzw_failure("the LZW decoder stopped mid-stream".into()))
        }
        Err(_) => Err(GeoError::TiffDecode {
            detail: "the decoder met an internal inconsistency".into(),
            hint: DECODE_HINT,
        }),
    }
}

/// Copies `row.len()` samples of `chunk` from `at` into `row`, as f64.
fn place(
    chunk: &DecodingResult,
    kind: SampleKind,
    at: usize,
    row: &mut [f64],
) -> Result<(), GeoError> {
    fn copy<T: Copy + Into<f64>>(src: &[T], at: usize, row: &mut [f64]) -> Option<()> {
        let src = src.get(at..at + row.len())?;
        row.iter_mut().zip(src).for_each(|(d, &s)| *d = s.into());
        Some(())
    }
    let done = match (chunk, kind) {
        (DecodingResult::F32(v), SampleKind::F32) => copy(v, at, row),
        (DecodingResult::F64(v), SampleKind::F64) => copy(v, at, row),
        (DecodingResult::U8(v), SampleKind::U8) => copy(v, at, row),
        (DecodingResult::U16(v), SampleKind::U16) => copy(v, at, row),
        _ => {
            return Err(GeoError::TiffDecode {
                detail: "the decoded samples do not match the declared sample format".into(),
                hint: DECODE_HINT,
            })
        }
    };
    done.ok_or_else(|| GeoError::TiffDecode {
        detail: "a chunk decoded to fewer samples than it declares".into(),
        hint: DECODE_HINT,
    })
}

fn lzw_failure(detail: String) -> GeoError {
    GeoError::TiffUnsupported {
        feature: "this LZW stream",
        value: detail,
        hint: "re-save the raster with deflate compression (or LZW with striped layout)",
    }
}

fn decode_error(err: TiffError) -> GeoError {
    match err {
        TiffError::UnsupportedError(TiffUnsupportedError::FloatingPointPredictor(_)) => {
            GeoError::TiffUnsupported {
                feature: "the floating-point predictor",
                value: "3 on a non-float band".into(),
                hint: "use predictor 1 or 2 for integer bands",
            }
        }
        TiffError::UnsupportedError(e) => GeoError::TiffUnsupported {
            feature: "a TIFF feature",
            value: e.to_string(),
            hint: "re-save as a single-band GeoTIFF, uncompressed, deflate or LZW",
        },
        TiffError::LimitsExceeded => GeoError::TiffDecode {
            detail: "a buffer the file asks for exceeds the decoder's limits".into(),
            hint: "coarsen or tile the raster",
        },
        TiffError::IoError(e) => GeoError::TiffDecode {
            detail: format!("the data ends early or cannot be read ({e})"),
            hint: "the file looks truncated: send it whole",
        },
        TiffError::FormatError(TiffFormatError::TiffSignatureNotFound)
        | TiffError::FormatError(TiffFormatError::TiffSignatureInvalid) => GeoError::TiffDecode {
            detail: "the bytes do not start with a TIFF signature".into(),
            hint: "send a GeoTIFF file",
        },
        other => GeoError::TiffDecode {
            detail: other.to_string(),
            hint: DECODE_HINT,
        },
    }
}

fn tag_error(tag: Tag, name: &'static str, problem: String) -> GeoError {
    GeoError::TiffTag {
        tag: tag.to_u16(),
        name,
        problem,
        hint: "re-save the file with a GeoTIFF writer",
    }
}

fn find_unsigned<T: TryFrom<u64>>(
    decoder: &mut Decoder<Cursor<&[u8]>>,
    tag: Tag,
    name: &'static str,
) -> Result<Option<T>, GeoError> {
    decoder
        .find_tag_unsigned::<T>(tag)
        .map_err(|e| tag_error(tag, name, format!("expected one unsigned integer ({e})")))
}

fn first_unsigned(
    decoder: &mut Decoder<Cursor<&[u8]>>,
    tag: Tag,
    name: &'static str,
) -> Result<Option<u16>, GeoError> {
    let values = decoder
        .find_tag_unsigned_vec::<u16>(tag)
        .map_err(|e| tag_error(tag, name, format!("expected unsigned integers ({e})")))?;
    Ok(values.and_then(|v| v.first().copied()))
}

fn sample_kind(decoder: &mut Decoder<Cursor<&[u8]>>) -> Result<SampleKind, GeoError> {
    let bits = first_unsigned(decoder, Tag::BitsPerSample, "BitsPerSample")?.unwrap_or(1);
    let format = first_unsigned(decoder, Tag::SampleFormat, "SampleFormat")?.unwrap_or(1);
    match (format, bits) {
        (3, 32) => Ok(SampleKind::F32),
        (3, 64) => Ok(SampleKind::F64),
        (1, 8) => Ok(SampleKind::U8),
        (1, 16) => Ok(SampleKind::U16),
        _ => {
            let name = match format {
                1 => "unsigned",
                2 => "signed",
                3 => "float",
                _ => "unknown-format",
            };
            Err(GeoError::TiffUnsupported {
                feature: "the sample type",
                value: format!("{name} {bits}-bit"),
                hint: "convert the band to float32, float64, uint8 or uint16",
            })
        }
    }
}

/// Checks compression, predictor and photometric interpretation; returns the compression code.
fn check_layout(decoder: &mut Decoder<Cursor<&[u8]>>) -> Result<u16, GeoError> {
    let compression = find_unsigned::<u16>(decoder, Tag::Compression, "Compression")?.unwrap_or(1);
    if !COMPRESSION_ACCEPTED.contains(&compression) {
        return Err(GeoError::TiffUnsupported {
            feature: "the compression",
            value: compression.to_string(),
            hint: "re-save with no compression, deflate or LZW",
        });
    }
    let predictor = find_unsigned::<u16>(decoder, Tag::Predictor, "Predictor")?.unwrap_or(1);
    if !(1..=3).contains(&predictor) {
        return Err(GeoError::TiffUnsupported {
            feature: "the predictor",
            value: predictor.to_string(),
            hint: "re-save with predictor 1, 2 or 3",
        });
    }
    let photometric = find_unsigned::<u16>(decoder, Tag::PhotometricInterpretation, "Photometric")?;
    // Only "black is zero" keeps stored values as they are: the decoder inverts white-is-zero
    // bands and palettes map values to colours.
    if !matches!(photometric, None | Some(1)) {
        return Err(GeoError::TiffUnsupported {
            feature: "the photometric interpretation",
            value: photometric.unwrap_or_default().to_string(),
            hint: "re-save the band as plain greyscale (min-is-black) values",
        });
    }
    Ok(compression)
}

fn find_doubles(
    decoder: &mut Decoder<Cursor<&[u8]>>,
    tag: Tag,
    name: &'static str,
) -> Result<Option<Vec<f64>>, GeoError> {
    let value = decoder
        .find_tag(tag)
        .map_err(|e| tag_error(tag, name, format!("it cannot be read ({e})")))?;
    match value {
        None => Ok(None),
        Some(v) => v
            .into_f64_vec()
            .map(Some)
            .map_err(|_| tag_error(tag, name, "expected DOUBLE values".into())),
    }
}

/// The GDAL geotransform terms from the model transformation, or pixel scale and tiepoint.
fn read_transform(decoder: &mut Decoder<Cursor<&[u8]>>) -> Result<Option<[f64; 6]>, GeoError> {
    let matrix = find_doubles(decoder, Tag::ModelTransformationTag, "ModelTransformation")?;
    if let Some(m) = matrix {
        if m.len() < 16 {
            return Err(tag_error(
                Tag::ModelTransformationTag,
                "ModelTransformation",
                format!("expected 16 values, found {}", m.len()),
            ));
        }
        if m[1] != 0.0 || m[4] != 0.0 {
            return Err(GeoError::Rotated {
                row_rotation: m[1],
                column_rotation: m[4],
            });
        }
        return Ok(Some([m[3], m[0], m[1], m[7], m[4], m[5]]));
    }
    let scale = find_doubles(decoder, Tag::ModelPixelScaleTag, "ModelPixelScale")?;
    let ties = find_doubles(decoder, Tag::ModelTiepointTag, "ModelTiepoint")?;
    match (scale, ties) {
        (Some(scale), Some(ties)) => {
            if scale.len() < 2 {
                return Err(tag_error(
                    Tag::ModelPixelScaleTag,
                    "ModelPixelScale",
                    format!("expected 3 values, found {}", scale.len()),
                ));
            }
            if ties.len() < 6 {
                return Err(tag_error(
                    Tag::ModelTiepointTag,
                    "ModelTiepoint",
                    format!("expected 6 values, found {}", ties.len()),
                ));
            }
            if ties.len() > 6 {
                return Err(ground_control_points(ties.len() / 6));
            }
            let (sx, sy) = (scale[0], scale[1]);
            Ok(Some([
                ties[3] - ties[0] * sx,
                sx,
                0.0,
                ties[4] - ties[1] * -sy,
                0.0,
                -sy,
            ]))
        }
        (None, Some(ties)) if ties.len() >= 6 => Err(ground_control_points(ties.len() / 6)),
        _ => Ok(None),
    }
}

fn ground_control_points(count: usize) -> GeoError {
    GeoError::TiffUnsupported {
        feature: "georeferencing by ground control points",
        value: format!("{count} tiepoints"),
        hint: "warp the raster to a north-up grid first",
    }
}

#[derive(Debug, Default)]
struct GeoKeys {
    raster_type: Option<u16>,
    epsg: Option<u32>,
}

fn read_geokeys(decoder: &mut Decoder<Cursor<&[u8]>>) -> Result<GeoKeys, GeoError> {
    const NAME: &str = "GeoKeyDirectory";
    let tag = Tag::GeoKeyDirectoryTag;
    let value = decoder
        .find_tag(tag)
        .map_err(|e| tag_error(tag, NAME, format!("it cannot be read ({e})")))?;
    let Some(value) = value else {
        return Ok(GeoKeys::default());
    };
    let dir = value
        .into_u16_vec()
        .map_err(|_| tag_error(tag, NAME, "expected SHORT values".into()))?;
    if dir.len() < 4 {
        return Err(tag_error(
            tag,
            NAME,
            format!("the header needs 4 values, found {}", dir.len()),
        ));
    }
    let declared = usize::from(dir[3]);
    let entries = &dir[4..];
    if entries.len() / 4 < declared {
        return Err(tag_error(
            tag,
            NAME,
            format!(
                "it declares {declared} keys but holds {}",
                entries.len() / 4
            ),
        ));
    }
    let (mut model, mut raster, mut projected, mut geographic) = (None, None, None, None);
    for key in entries.chunks_exact(4).take(declared) {
        // Location 0 means the value is the short itself; other locations point into the
        // double or ASCII parameter tags, which carry nothing read here.
        if key[1] != 0 {
            continue;
        }
        match key[0] {
            KEY_MODEL_TYPE => model = Some(key[3]),
            KEY_RASTER_TYPE => raster = Some(key[3]),
            KEY_PROJECTED_TYPE => projected = Some(key[3]),
            KEY_GEOGRAPHIC_TYPE => geographic = Some(key[3]),
            _ => {}
        }
    }
    let code = match model {
        Some(MODEL_PROJECTED) => projected,
        Some(MODEL_GEOGRAPHIC) => geographic,
        _ => projected.or(geographic),
    };
    Ok(GeoKeys {
        raster_type: raster,
        epsg: code
            .filter(|c| *c != 0 && *c != USER_DEFINED)
            .map(u32::from),
    })
}

fn read_nodata(decoder: &mut Decoder<Cursor<&[u8]>>) -> Result<Option<f64>, GeoError> {
    const NAME: &str = "GDAL_NODATA";
    let tag = Tag::GdalNodata;
    let value = decoder
        .find_tag(tag)
        .map_err(|e| tag_error(tag, NAME, format!("it cannot be read ({e})")))?;
    let Some(value) = value else {
        return Ok(None);
    };
    let text = value
        .into_string()
        .map_err(|_| tag_error(tag, NAME, "expected ASCII text".into()))?;
    let text = text.trim_matches(|c: char| c == '\0' || c.is_whitespace());
    text.parse::<f64>()
        .map(Some)
        .map_err(|_| tag_error(tag, NAME, format!("{text:?} is not a number")))
}

/// One float64 encoder colour type per band count: the tiff crate fixes samples per pixel
/// through the type.
macro_rules! float64_bands {
    ($name:ident, $n:expr) => {
        struct $name;
        impl ColorType for $name {
            type Inner = f64;
            const TIFF_VALUE: PhotometricInterpretation = PhotometricInterpretation::BlackIsZero;
            const BITS_PER_SAMPLE: &'static [u16] = &[64; $n];
            const SAMPLE_FORMAT: &'static [SampleFormat] = &[SampleFormat::IEEEFP; $n];
            // Written without a predictor, so this is never called with effect.
            fn horizontal_predict(row: &[f64], result: &mut Vec<f64>) {
                result.extend_from_slice(row);
            }
        }
    };
}
float64_bands!(Float64x1, 1);
float64_bands!(Float64x2, 2);
float64_bands!(Float64x3, 3);
float64_bands!(Float64x4, 4);

/// Encode `bands` (each row-major, one value per cell of `grid`) as a float64, deflate
/// GeoTIFF with pixel scale, tiepoint, GeoKey directory (EPSG code when known) and nodata tag.
/// NaN cells are written as `nodata` when it is given (and stay NaN otherwise).
pub fn write(grid: &Grid, bands: &[&[f64]], nodata: Option<f64>) -> Result<Vec<u8>, GeoError> {
    if bands.is_empty() || bands.len() > MAX_WRITE_BANDS {
        return Err(GeoError::WriteBandCount {
            bands: bands.len(),
            max: MAX_WRITE_BANDS,
        });
    }
    let cells = grid.cell_count();
    for (band, values) in bands.iter().enumerate() {
        if values.len() as u64 != cells {
            return Err(GeoError::BandLength {
                band,
                found: values.len(),
                expected: cells,
                width: grid.width,
                height: grid.height,
            });
        }
    }
    if cells == 0 {
        return Err(GeoError::TiffEncode {
            detail: format!("the grid is {}x{}, with no cells", grid.width, grid.height),
        });
    }
    let fill = nodata.filter(|v| !v.is_nan());
    let mut interleaved = Vec::with_capacity(bands.len() * bands[0].len());
    for cell in 0..bands[0].len() {
        for band in bands {
            let v = band[cell];
            interleaved.push(match fill {
                Some(f) if v.is_nan() => f,
                _ => v,
            });
        }
    }
    let keys = geokey_directory(grid)?;
    let encoded = match bands.len() {
        1 => encode::<Float64x1>(grid, &interleaved, &keys, nodata, 1),
        2 => encode::<Float64x2>(grid, &interleaved, &keys, nodata, 2),
        3 => encode::<Float64x3>(grid, &interleaved, &keys, nodata, 3),
        _ => encode::<Float64x4>(grid, &interleaved, &keys, nodata, 4),
    };
    encoded.map_err(|e| GeoError::TiffEncode {
        detail: e.to_string(),
    })
}

fn geokey_directory(grid: &Grid) -> Result<Vec<u16>, GeoError> {
    let mut keys: Vec<[u16; 4]> = Vec::new();
    if let Some(code) = grid.crs {
        let code = u16::try_from(code)
            .ok()
            .filter(|c| *c != 0 && *c != USER_DEFINED)
            .ok_or_else(|| GeoError::TiffEncode {
                detail: format!(
                    "EPSG:{code} does not fit a GeoTIFF key (codes 1 to 32766 do): write the \
                     raster without a CRS and name it alongside"
                ),
            })?;
        // EPSG keeps geographic 2D CRSs in 4000-4999 (4326 and its kin); the rest written here
        // are taken as projected. Without a CRS database this range is the distinction.
        let geographic = (4000..5000).contains(&code);
        let model = if geographic {
            MODEL_GEOGRAPHIC
        } else {
            MODEL_PROJECTED
        };
        keys.push([KEY_MODEL_TYPE, 0, 1, model]);
        keys.push([KEY_RASTER_TYPE, 0, 1, RASTER_PIXEL_IS_AREA]);
        let key = if geographic {
            KEY_GEOGRAPHIC_TYPE
        } else {
            KEY_PROJECTED_TYPE
        };
        keys.push([key, 0, 1, code]);
    } else {
        keys.push([KEY_RASTER_TYPE, 0, 1, RASTER_PIXEL_IS_AREA]);
    }
    // Header: directory version 1, revision 1.0, key count.
    let mut dir = vec![1, 1, 0, keys.len() as u16];
    dir.extend(keys.into_iter().flatten());
    Ok(dir)
}

fn encode<C: ColorType<Inner = f64>>(
    grid: &Grid,
    interleaved: &[f64],
    geokeys: &[u16],
    nodata: Option<f64>,
    bands: usize,
) -> tiff::TiffResult<Vec<u8>> {
    let mut out = Cursor::new(Vec::new());
    {
        let mut encoder = TiffEncoder::new(&mut out)?
            .with_compression(Compression::Deflate(DeflateLevel::Balanced));
        let mut image = encoder.new_image::<C>(grid.width, grid.height)?;
        let dir = image.encoder();
        if let Some(t) = grid.transform {
            dir.write_tag(
                Tag::ModelPixelScaleTag,
                &[t.cell_width, t.cell_height, 0.0][..],
            )?;
            dir.write_tag(
                Tag::ModelTiepointTag,
                &[0.0, 0.0, 0.0, t.origin_x, t.origin_y, 0.0][..],
            )?;
        }
        if grid.transform.is_some() || grid.crs.is_some() {
            dir.write_tag(Tag::GeoKeyDirectoryTag, geokeys)?;
        }
        if let Some(v) = nodata {
            // Shortest text that parses back to the same f64 ("NaN" for NaN).
            let text = if v.is_nan() {
                "nan".to_string()
            } else {
                v.to_string()
            };
            dir.write_tag(Tag::GdalNodata, text.as_str())?;
        }
        if bands > 1 {
            // Bands past the first are unspecified extra samples, not alpha.
            dir.write_tag(Tag::ExtraSamples, &vec![0u16; bands - 1][..])?;
        }
        image.write_data(interleaved)?;
    }
    Ok(out.into_inner())
}

#[cfg(test)]
mod tests {
    use super::*;

    fn grid(width: u32, height: u32) -> Grid {
        Grid {
            width,
            height,
            transform: Some(GeoTransform::new(500_000.0, 4_100_000.0, 30.0, 30.0).unwrap()),
            crs: Some(32633),
        }
    }

    #[test]
    fn written_raster_reads_back() {
        // reference: closed form: the values written are the values read, bit for bit.
        let g = grid(7, 5);
        let values: Vec<f64> = (0..35).map(|i| f64::from(i) / 7.0 - 1.0).collect();
        let bytes = write(&g, &[&values], Some(-9999.0)).unwrap();
        let raster = read(&bytes, &ReadLimits { max_cells: 100 }).unwrap();
        assert_eq!(raster.grid, g);
        assert_eq!(raster.samples, values);
        assert_eq!(raster.nodata, Some(-9999.0));
        assert_eq!(raster.sample_kind, SampleKind::F64);
    }

    #[test]
    fn nan_cells_are_written_as_nodata() {
        let g = grid(2, 2);
        let values = [1.0, f64::NAN, 3.0, 4.0];
        let bytes = write(&g, &[&values], Some(-1.0)).unwrap();
        let raster = read(&bytes, &ReadLimits { max_cells: 4 }).unwrap();
        assert_eq!(raster.samples, vec![1.0, -1.0, 3.0, 4.0]);
    }

    #[test]
    fn two_bands_are_refused_on_input() {
        let g = grid(2, 2);
        let bytes = write(&g, &[&[1.0; 4], &[2.0; 4]], None).unwrap();
        let err = read(&bytes, &ReadLimits { max_cells: 4 }).unwrap_err();
        assert_eq!(err, GeoError::BandCount { bands: 2 });
    }

    #[test]
    fn limit_is_checked_before_decoding() {
        let g = grid(10, 10);
        let bytes = write(&g, &[&[0.5; 100]], None).unwrap();
        let err = read(&bytes, &ReadLimits { max_cells: 99 }).unwrap_err();
        assert!(
            matches!(err, GeoError::TooManyCells { limit: 99, .. }),
            "{err}"
        );
    }
}

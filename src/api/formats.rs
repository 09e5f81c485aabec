//! Output formats beyond JSON: a GeoJSON FeatureCollection and CSV for zone counts, a GeoTIFF
//! for cell posteriors, GeoJSON points for the event cells of scenarios. Each is written from the same results document as the JSON output, so
//! every format carries the same numbers (written by the same shortest round-trip rule).
//!
//! Which format a request gets is chosen once, by `outputs.<id>.format.mediaType` in the
//! execute body, else by `Accept`, else JSON; an unsupported choice is refused, never ignored.

use serde::Serialize;
use serde_json::{json, Map, Value};

use super::decode::{DecodedZones, Frame, ZoneShape};
use super::problem::ApiError;
use super::wire::{PosteriorDocument, ResultsDocument, ScenariosDocument, ZoneResult};
use crate::engine::Raster;
use crate::geo::zones::Polygon;
use crate::geo::{geotiff, outline, GeoTransform, Grid};

/// An output encoding.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Format {
    Json,
    GeoJson,
    Csv,
    GeoTiff,
}

impl Format {
    /// The media type sent as `Content-Type`.
    pub fn media_type(self) -> &'static str {
        match self {
            Format::Json => "application/json",
            Format::GeoJson => "application/geo+json",
            Format::Csv => "text/csv; charset=utf-8; header=present",
            Format::GeoTiff => "image/tiff; application=geotiff",
        }
    }

    /// The format a media type names, parameters other than GeoTIFF's `application` ignored.
    pub fn from_media_type(text: &str) -> Option<Format> {
        let essence = text.split(';').next().unwrap_or("").trim();
        let lower = essence.to_ascii_lowercase();
        match lower.as_str() {
            "application/json" => Some(Format::Json),
            "application/geo+json" => Some(Format::GeoJson),
            "text/csv" => Some(Format::Csv),
            "image/tiff" => Some(Format::GeoTiff),
            _ => None,
        }
    }

    /// The name `zonetally eval --format` gives this format.
    pub fn name(self) -> &'static str {
        match self {
            Format::Json => "json",
            Format::GeoJson => "geojson",
            Format::Csv => "csv",
            Format::GeoTiff => "geotiff",
        }
    }

    /// The name used by `zonetally eval --format`.
    pub fn from_name(name: &str) -> Option<Format> {
        match name {
            "json" => Some(Format::Json),
            "geojson" => Some(Format::GeoJson),
            "csv" => Some(Format::Csv),
            "geotiff" | "tiff" => Some(Format::GeoTiff),
            _ => None,
        }
    }
}

/// The supported media types, listed for error messages.
pub fn listing(formats: &[Format]) -> String {
    formats
        .iter()
        .map(|f| format!("`{}`", f.media_type()))
        .collect::<Vec<_>>()
        .join(", ")
}

/// The format for a request: the body's `mediaType` when given (refused when unsupported),
/// else the first supported type of `Accept` (a wildcard or no header means JSON).
pub fn choose(
    requested: Option<(&str, &str)>,
    accept: Option<&str>,
    supported: &[Format],
) -> Result<Format, ApiError> {
    if let Some((pointer, media_type)) = requested {
        return Format::from_media_type(media_type)
            .filter(|f| supported.contains(f))
            .ok_or_else(|| ApiError::InvalidInput {
                pointer: pointer.to_string(),
                detail: format!(
                    "output format `{media_type}` is not offered by this process: ask for one of {}",
                    listing(supported)
                ),
            });
    }
    let Some(accept) = accept.filter(|a| !a.trim().is_empty()) else {
        return Ok(Format::Json);
    };
    let mut ranges: Vec<(f64, usize, &str)> = accept
        .split(',')
        .enumerate()
        .filter_map(|(i, range)| {
            let mut parts = range.split(';');
            let essence = parts.next()?.trim();
            let q = parts
                .filter_map(|p| p.trim().strip_prefix("q="))
                .find_map(|q| q.trim().parse::<f64>().ok())
                .unwrap_or(1.0);
            (q > 0.0 && !essence.is_empty()).then_some((q, i, range.trim()))
        })
        .collect();
    // Highest quality first; equal qualities in the order given.
    ranges.sort_by(|a, b| b.0.total_cmp(&a.0).then(a.1.cmp(&b.1)));
    for (_, _, range) in ranges {
        let essence = range.split(';').next().unwrap_or("").trim();
        if essence == "*/*" || essence.eq_ignore_ascii_case("application/*") {
            return Ok(Format::Json);
        }
        if let Some(f) = Format::from_media_type(range).filter(|f| supported.contains(f)) {
            return Ok(f);
        }
    }
    Err(ApiError::NotAcceptable {
        got: accept.to_string(),
        supported: listing(supported),
    })
}

/// The property names of a zone row, in column order; exceedance thresholds from the first zone
/// (every zone of a request reports the same thresholds).
fn columns(doc: &ResultsDocument) -> Vec<String> {
    let mut names: Vec<String> = [
        "id",
        "cells",
        "nodata_cells",
        "no_valid_cells",
        "prior_mean",
        "prior_sd",
        "mean",
        "sd",
        "mode",
        "median",
        "interval_level",
        "interval_lower",
        "interval_upper",
    ]
    .iter()
    .map(|s| s.to_string())
    .collect();
    if let Some(z) = doc.zones.first() {
        names.extend(z.exceedance.iter().map(|e| format!("p_at_least_{}", e.k)));
    }
    names.push("error_bound".into());
    names
}

/// One zone's row as JSON values, in `columns` order.
fn row(z: &ZoneResult) -> Vec<Value> {
    let mut values = vec![
        json!(z.id),
        json!(z.cells),
        json!(z.nodata_cells),
        json!(z.no_valid_cells),
        json!(z.prior.mean),
        json!(z.prior.sd),
        json!(z.mean),
        json!(z.sd),
        json!(z.mode),
        json!(z.median),
        json!(z.interval.level),
        json!(z.interval.lower),
        json!(z.interval.upper),
    ];
    values.extend(z.exceedance.iter().map(|e| json!(e.p)));
    values.push(json!(z.error_bound));
    values
}

/// Zone counts as CSV (RFC 4180): a header row, then one row per zone in request order.
pub fn zone_counts_csv(doc: &ResultsDocument) -> Result<Vec<u8>, ApiError> {
    let mut out = csv::Writer::from_writer(Vec::new());
    let fault = |e: csv::Error| ApiError::Internal {
        cause: format!("cannot write CSV: {e}"),
    };
    out.write_record(columns(doc)).map_err(fault)?;
    for z in &doc.zones {
        let cells: Vec<String> = row(z)
            .into_iter()
            .map(|v| match v {
                Value::String(s) => s,
                // serde_json writes numbers as the JSON output does: shortest round trip.
                Value::Number(n) => n.to_string(),
                other => other.to_string(),
            })
            .collect();
        out.write_record(&cells).map_err(fault)?;
    }
    out.into_inner().map_err(|e| ApiError::Internal {
        cause: format!("cannot write CSV: {e}"),
    })
}

/// The transform outputs draw with: the raster's, or cell units (x = column, y = -row) when
/// the raster has no georeferencing.
fn drawing_grid(frame: &Frame) -> Grid {
    let mut grid = frame.grid;
    if grid.transform.is_none() {
        grid.transform = GeoTransform::new(0.0, 0.0, 1.0, 1.0).ok();
    }
    grid
}

fn multipolygon(polygons: &[Polygon]) -> Value {
    let coordinates: Vec<&Vec<Vec<[f64; 2]>>> = polygons.iter().map(|p| &p.rings).collect();
    json!({"type": "MultiPolygon", "coordinates": coordinates})
}

/// A zone's geometry: polygons as sent, a rect as its rectangle, cells traced around their
/// valid cells; `null` for a zone with no valid cell given as cells.
fn geometry(
    shape: &ZoneShape,
    slot: Option<usize>,
    zones: &DecodedZones,
    grid: &Grid,
) -> Result<Value, ApiError> {
    let fault = |e: crate::geo::GeoError| ApiError::Internal {
        cause: format!("cannot draw a zone: {e}"),
    };
    Ok(match shape {
        ZoneShape::Polygons(p) => multipolygon(p),
        ZoneShape::Rect(r) => {
            let t = grid.transform.ok_or_else(|| ApiError::Internal {
                cause: "a drawing grid without a transform".into(),
            })?;
            let x0 = t.origin_x + f64::from(r.col) * t.cell_width;
            let x1 = t.origin_x + (f64::from(r.col) + f64::from(r.cols)) * t.cell_width;
            let y0 = t.origin_y - f64::from(r.row) * t.cell_height;
            let y1 = t.origin_y - (f64::from(r.row) + f64::from(r.rows)) * t.cell_height;
            // Exterior ring counter-clockwise (RFC 7946, 3.1.6).
            json!({"type": "Polygon", "coordinates": [[[x0, y1], [x1, y1], [x1, y0], [x0, y0], [x0, y1]]]})
        }
        ZoneShape::Cells => match slot.and_then(|s| zones.engine_zones().get(s)) {
            Some(zone) => {
                let cells: Vec<u32> = zone.indices().collect();
                outline::to_geojson(&cells, grid).map_err(fault)?
            }
            None => Value::Null,
        },
    })
}

/// Zone counts as a GeoJSON FeatureCollection (RFC 7946): one feature per zone in request
/// order, the summaries as flat properties, the total check and the grid as foreign members.
pub fn zone_counts_geojson(
    doc: &ResultsDocument,
    zones: &DecodedZones,
    frame: &Frame,
) -> Result<Vec<u8>, ApiError> {
    let grid = drawing_grid(frame);
    let names = columns(doc);
    let mut features = Vec::with_capacity(doc.zones.len());
    for (z, entry) in doc.zones.iter().zip(&zones.entries) {
        let properties: Map<String, Value> = names.iter().cloned().zip(row(z)).collect();
        features.push(json!({
            "type": "Feature",
            "id": z.id,
            "geometry": geometry(&entry.shape, entry.slot, zones, &grid)?,
            "properties": properties,
        }));
    }
    let mut collection = json!({
        "type": "FeatureCollection",
        "features": features,
        "total": doc.total,
        "grid": grid_member(frame),
    });
    if frame.grid.transform.is_none() {
        collection["grid"]["units"] = json!("cells: x is the column, y minus the row");
    }
    serde_json::to_vec(&collection).map_err(|e| ApiError::Internal {
        cause: format!("cannot encode GeoJSON: {e}"),
    })
}

/// The event cells of every scenario as GeoJSON points at the cells' centres, one feature per
/// event cell and scenario (`scenario`: its draw number, `cell`: its row-major index), in draw
/// order; the summary, the error bound, the total check and the grid as foreign members.
/// Written feature by feature: a run of 1,000 maps can hold millions of points.
pub fn scenario_points(doc: &ScenariosDocument, frame: &Frame) -> Result<Vec<u8>, ApiError> {
    #[derive(Serialize)]
    struct Point {
        r#type: &'static str,
        coordinates: [f64; 2],
    }
    #[derive(Serialize)]
    struct Props {
        scenario: usize,
        cell: u32,
    }
    #[derive(Serialize)]
    struct Feature {
        r#type: &'static str,
        geometry: Point,
        properties: Props,
    }
    let fault = |e: serde_json::Error| ApiError::Internal {
        cause: format!("cannot encode GeoJSON: {e}"),
    };
    let grid = drawing_grid(frame);
    let transform = grid.transform.ok_or_else(|| ApiError::Internal {
        cause: "the drawing grid has no transform".into(),
    })?;
    let width = grid.width.max(1);
    let mut out = Vec::new();
    out.extend_from_slice(b"{\"type\":\"FeatureCollection\",\"features\":[");
    let mut first = true;
    for (i, d) in doc.samples.draws.iter().enumerate() {
        for &cell in d.cells.iter().flatten() {
            if !first {
                out.push(b',');
            }
            first = false;
            let (x, y) = transform.cell_centre(cell / width, cell % width);
            serde_json::to_writer(
                &mut out,
                &Feature {
                    r#type: "Feature",
                    geometry: Point {
                        r#type: "Point",
                        coordinates: [x, y],
                    },
                    properties: Props { scenario: i, cell },
                },
            )
            .map_err(fault)?;
        }
    }
    out.extend_from_slice(b"],\"summary\":");
    serde_json::to_writer(&mut out, &doc.summary).map_err(fault)?;
    out.extend_from_slice(b",\"error_bound\":");
    serde_json::to_writer(&mut out, &doc.error_bound).map_err(fault)?;
    out.extend_from_slice(b",\"total\":");
    serde_json::to_writer(&mut out, &doc.total).map_err(fault)?;
    let mut grid_member = grid_member(frame);
    if frame.grid.transform.is_none() {
        grid_member["units"] = json!("cells: x is the column, y minus the row");
    }
    out.extend_from_slice(b",\"grid\":");
    serde_json::to_writer(&mut out, &grid_member).map_err(fault)?;
    out.push(b'}');
    Ok(out)
}

/// Where the coordinates lie: the raster's size, geotransform and CRS.
fn grid_member(frame: &Frame) -> Value {
    let g = &frame.grid;
    let mut m = json!({"width": g.width, "height": g.height});
    if let Some(t) = g.transform {
        m["geotransform"] = json!(t.to_gdal());
    }
    if let Some(crs) = g.crs {
        m["crs"] = json!(format!("EPSG:{crs}"));
    }
    m
}

/// Cell posteriors as a two-band float64 GeoTIFF on the input grid: band 1 the posterior,
/// band 2 the prior; cells not reported and nodata cells are nodata (the input's value, or NaN).
pub fn posterior_tiff(
    doc: &PosteriorDocument,
    raster: &Raster,
    frame: &Frame,
) -> Result<Vec<u8>, ApiError> {
    let n = frame.grid.cell_count() as usize;
    let mut posterior = vec![f64::NAN; n];
    let mut prior = vec![f64::NAN; n];
    if raster.values().len() != n {
        return Err(ApiError::Internal {
            cause: "the raster and its frame differ in size".into(),
        });
    }
    for c in &doc.cells {
        if let Some(slot) = posterior.get_mut(c.cell as usize) {
            *slot = c.posterior;
        }
    }
    prior.copy_from_slice(raster.values());
    let nodata = Some(frame.nodata.unwrap_or(f64::NAN));
    geotiff::write(&frame.grid, &[&posterior, &prior], nodata).map_err(|e| ApiError::Internal {
        cause: format!("cannot write the GeoTIFF: {e}"),
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    const ALL: [Format; 3] = [Format::Json, Format::GeoJson, Format::Csv];

    #[test]
    fn the_body_choice_wins_and_an_unknown_one_is_refused() {
        let f = choose(
            Some(("/outputs/counts/format/mediaType", "text/csv")),
            Some("application/geo+json"),
            &ALL,
        );
        assert_eq!(f.unwrap(), Format::Csv);
        let e = choose(
            Some((
                "/outputs/counts/format/mediaType",
                "application/x-shapefile",
            )),
            None,
            &ALL,
        )
        .unwrap_err();
        assert!(format!("{e:?}").contains("text/csv"), "{e:?}");
    }

    #[test]
    fn accept_is_read_by_quality_and_wildcards_mean_json() {
        let pick = |a: &str| choose(None, Some(a), &ALL);
        assert_eq!(
            pick("text/csv;q=0.5, application/geo+json").unwrap(),
            Format::GeoJson
        );
        assert_eq!(pick("text/html, */*;q=0.8").unwrap(), Format::Json);
        assert_eq!(pick("text/csv").unwrap(), Format::Csv);
        assert!(pick("text/html").is_err());
        assert_eq!(choose(None, None, &ALL).unwrap(), Format::Json);
    }
}

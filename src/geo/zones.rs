//! Zones from GeoJSON polygons or from a label raster, and the cells each zone covers.
//!
//! [`parse_zones`] streams a GeoJSON Feature or FeatureCollection of Polygon / MultiPolygon
//! features into [`Zone`]s, counting vertices as it goes so an oversized document is refused
//! before it is held in memory, and reporting every problem with a JSON pointer to it.
//! [`rasterize`] turns a zone's polygons into the sorted cell indices that GDAL's rasteriser
//! (and so `rasterio.features.rasterize`) burns, in both its centre and all-touched modes.
//! [`zones_from_labels`] reads zones off an integer label raster. Nothing here reprojects:
//! zones must already be in the raster's CRS.

use std::cell::{Cell, RefCell};
use std::collections::{BTreeMap, HashMap};
use std::fmt;

use serde::de::{self, DeserializeSeed, Deserializer, IgnoredAny, MapAccess, SeqAccess, Visitor};
use serde_json::Value;

use super::{GeoError, Grid};

/// Largest accepted coordinate magnitude: ten thousand times the Earth's circumference in
/// metres. Anything larger is a unit mistake, and the bound keeps cell arithmetic far from
/// where f64 loses whole cells.
pub const MAX_COORDINATE: f64 = 4.0e11;

/// One polygon: the exterior ring first, then holes. Rings are closed (first == last), with at
/// least four positions, in map coordinates `[x, y]`.
#[derive(Debug, Clone, PartialEq)]
pub struct Polygon {
    pub rings: Vec<Vec<[f64; 2]>>,
}

/// A named zone: the polygons of one feature (one for a Polygon, several for a MultiPolygon).
#[derive(Debug, Clone, PartialEq)]
pub struct Zone {
    /// The feature id (or id property), numbers in their JSON spelling.
    pub id: String,
    pub polygons: Vec<Polygon>,
    /// JSON pointer of the feature, for messages about it later.
    pub pointer: String,
}

/// How [`parse_zones`] reads a document.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct ZoneOptions<'a> {
    /// Take the zone id from this property instead of the feature `id`.
    pub id_property: Option<&'a str>,
    /// Most positions accepted over the whole document.
    pub max_vertices: u64,
    /// The raster's EPSG code; a document `crs` naming another code is refused.
    pub raster_crs: Option<u32>,
}

/// Parse a GeoJSON Feature or FeatureCollection of Polygon / MultiPolygon features.
///
/// A document without a `crs` member is taken to be in the raster's CRS (coordinates are
/// never reprojected). Ids must be present and unique.
pub fn parse_zones(json: &[u8], options: &ZoneOptions<'_>) -> Result<Vec<Zone>, GeoError> {
    let (doc, _) = parse_object(json, options.max_vertices)?;
    build_zones(doc, options)
}

/// Parse one bare GeoJSON Polygon or MultiPolygon geometry, in the raster's CRS.
///
/// Returns the polygons and the positions read; more than `max_vertices` positions are refused
/// while streaming. Pointers in errors are relative to the geometry.
pub fn parse_geometry(json: &[u8], max_vertices: u64) -> Result<(Vec<Polygon>, u64), GeoError> {
    let (doc, vertices) = parse_object(json, max_vertices)?;
    if let Some(kind @ ("Feature" | "FeatureCollection")) = doc.kind.as_deref() {
        return Err(shape_error(
            "/type".into(),
            "a geometry is expected here, not a feature",
            format!("{kind:?}"),
            "give the Polygon or MultiPolygon geometry itself",
        ));
    }
    Ok((geometry_polygons(doc, "")?, vertices))
}

/// Streams one JSON object, counting positions; returns it and the positions read.
fn parse_object(json: &[u8], max_vertices: u64) -> Result<(RawObject, u64), GeoError> {
    let ctx = Ctx {
        max_vertices,
        vertices: Cell::new(0),
        path: RefCell::new(Vec::new()),
        failure: RefCell::new(None),
    };
    let mut de = serde_json::Deserializer::from_slice(json);
    let parsed = ObjectSeed { ctx: &ctx }
        .deserialize(&mut de)
        .and_then(|doc| de.end().map(|()| doc));
    match parsed {
        Ok(doc) => Ok((doc, ctx.vertices.get())),
        Err(err) => Err(ctx.failure.take().unwrap_or_else(|| json_error(&ctx, &err))),
    }
}

fn json_error(ctx: &Ctx, err: &serde_json::Error) -> GeoError {
    use serde_json::error::Category;
    match err.classify() {
        Category::Data => GeoError::GeoJson {
            pointer: Some(ctx.pointer()),
            problem: "a member has the wrong JSON type".into(),
            found: err.to_string(),
            hint: "follow RFC 7946 for Feature, FeatureCollection and geometry members",
        },
        _ => GeoError::JsonSyntax {
            line: err.line(),
            column: err.column(),
            detail: err.to_string(),
        },
    }
}

/// Escape one JSON pointer segment (RFC 6901).
fn escape(segment: &str) -> String {
    segment.replace('~', "~0").replace('/', "~1")
}

enum Seg {
    Key(&'static str),
    Index(usize),
}

/// Shared state of one streaming parse: the vertex budget, where the parser is, and the
/// first domain error (serde errors carry only text, so the structured error waits here).
struct Ctx {
    max_vertices: u64,
    vertices: Cell<u64>,
    path: RefCell<Vec<Seg>>,
    failure: RefCell<Option<GeoError>>,
}

impl Ctx {
    fn pointer(&self) -> String {
        let mut out = String::new();
        for seg in self.path.borrow().iter() {
            out.push('/');
            match seg {
                Seg::Key(k) => out.push_str(k),
                Seg::Index(i) => out.push_str(&i.to_string()),
            }
        }
        out
    }

    fn fail<E: de::Error>(&self, err: GeoError) -> E {
        let mut slot = self.failure.borrow_mut();
        if slot.is_none() {
            *slot = Some(err);
        }
        E::custom("stopped on a GeoJSON problem")
    }

    fn push(&self, seg: Seg) {
        self.path.borrow_mut().push(seg);
    }

    fn pop(&self) {
        self.path.borrow_mut().pop();
    }

    fn set_index(&self, i: usize) {
        if let Some(Seg::Index(last)) = self.path.borrow_mut().last_mut() {
            *last = i;
        }
    }
}

/// Any GeoJSON object (FeatureCollection, Feature or geometry) with the members read here.
#[derive(Default)]
struct RawObject {
    kind: Option<String>,
    id: Option<Value>,
    properties: Option<Value>,
    crs: Option<Value>,
    features: Option<Vec<RawObject>>,
    geometry: Option<Option<Box<RawObject>>>,
    coordinates: Option<Node>,
}

/// Nested coordinate arrays; positions keep x and y (a third value is dropped).
enum Node {
    Num(f64),
    Pos([f64; 2]),
    List(Vec<Node>),
}

struct ObjectSeed<'c> {
    ctx: &'c Ctx,
}

impl<'de> DeserializeSeed<'de> for ObjectSeed<'_> {
    type Value = RawObject;
    fn deserialize<D: Deserializer<'de>>(self, d: D) -> Result<RawObject, D::Error> {
        d.deserialize_map(self)
    }
}

impl<'de> Visitor<'de> for ObjectSeed<'_> {
    type Value = RawObject;

    fn expecting(&self, f: &mut fmt::Formatter) -> fmt::Result {
        f.write_str("a GeoJSON object")
    }

    fn visit_map<A: MapAccess<'de>>(self, mut map: A) -> Result<RawObject, A::Error> {
        let ctx = self.ctx;
        let mut obj = RawObject::default();
        while let Some(key) = map.next_key::<std::borrow::Cow<'de, str>>()? {
            match key.as_ref() {
                "type" => {
                    ctx.push(Seg::Key("type"));
                    obj.kind = Some(map.next_value()?);
                    ctx.pop();
                }
                "id" => obj.id = Some(map.next_value()?),
                "properties" => obj.properties = Some(map.next_value()?),
                "crs" => obj.crs = Some(map.next_value()?),
                "features" => {
                    ctx.push(Seg::Key("features"));
                    obj.features = Some(map.next_value_seed(FeaturesSeed { ctx })?);
                    ctx.pop();
                }
                "geometry" => {
                    ctx.push(Seg::Key("geometry"));
                    obj.geometry = Some(map.next_value_seed(OptionalObject { ctx })?.map(Box::new));
                    ctx.pop();
                }
                "coordinates" => {
                    ctx.push(Seg::Key("coordinates"));
                    obj.coordinates = Some(map.next_value_seed(NodeSeed { ctx })?);
                    ctx.pop();
                }
                _ => {
                    map.next_value::<IgnoredAny>()?;
                }
            }
        }
        Ok(obj)
    }
}

struct OptionalObject<'c> {
    ctx: &'c Ctx,
}

impl<'de> DeserializeSeed<'de> for OptionalObject<'_> {
    type Value = Option<RawObject>;
    fn deserialize<D: Deserializer<'de>>(self, d: D) -> Result<Self::Value, D::Error> {
        d.deserialize_option(self)
    }
}

impl<'de> Visitor<'de> for OptionalObject<'_> {
    type Value = Option<RawObject>;
    fn expecting(&self, f: &mut fmt::Formatter) -> fmt::Result {
        f.write_str("a geometry object or null")
    }
    fn visit_none<E: de::Error>(self) -> Result<Self::Value, E> {
        Ok(None)
    }
    fn visit_unit<E: de::Error>(self) -> Result<Self::Value, E> {
        Ok(None)
    }
    fn visit_some<D: Deserializer<'de>>(self, d: D) -> Result<Self::Value, D::Error> {
        ObjectSeed { ctx: self.ctx }.deserialize(d).map(Some)
    }
}

struct FeaturesSeed<'c> {
    ctx: &'c Ctx,
}

impl<'de> DeserializeSeed<'de> for FeaturesSeed<'_> {
    type Value = Vec<RawObject>;
    fn deserialize<D: Deserializer<'de>>(self, d: D) -> Result<Self::Value, D::Error> {
        d.deserialize_seq(self)
    }
}

impl<'de> Visitor<'de> for FeaturesSeed<'_> {
    type Value = Vec<RawObject>;
    fn expecting(&self, f: &mut fmt::Formatter) -> fmt::Result {
        f.write_str("an array of features")
    }
    fn visit_seq<A: SeqAccess<'de>>(self, mut seq: A) -> Result<Self::Value, A::Error> {
        let ctx = self.ctx;
        let mut out = Vec::new();
        ctx.push(Seg::Index(0));
        while let Some(feature) = seq.next_element_seed(ObjectSeed { ctx })? {
            out.push(feature);
            ctx.set_index(out.len());
        }
        ctx.pop();
        Ok(out)
    }
}

struct NodeSeed<'c> {
    ctx: &'c Ctx,
}

impl<'de> DeserializeSeed<'de> for NodeSeed<'_> {
    type Value = Node;
    fn deserialize<D: Deserializer<'de>>(self, d: D) -> Result<Node, D::Error> {
        d.deserialize_any(self)
    }
}

impl NodeSeed<'_> {
    fn number<E: de::Error>(&self, v: f64) -> Result<Node, E> {
        if !v.is_finite() || v.abs() > MAX_COORDINATE {
            return Err(self.ctx.fail(GeoError::BadCoordinate {
                pointer: Some(self.ctx.pointer()),
                value: v,
                limit: MAX_COORDINATE,
            }));
        }
        Ok(Node::Num(v))
    }
}

impl<'de> Visitor<'de> for NodeSeed<'_> {
    type Value = Node;
    fn expecting(&self, f: &mut fmt::Formatter) -> fmt::Result {
        f.write_str("coordinates (nested arrays of numbers)")
    }
    fn visit_f64<E: de::Error>(self, v: f64) -> Result<Node, E> {
        self.number(v)
    }
    fn visit_i64<E: de::Error>(self, v: i64) -> Result<Node, E> {
        self.number(v as f64)
    }
    fn visit_u64<E: de::Error>(self, v: u64) -> Result<Node, E> {
        self.number(v as f64)
    }
    fn visit_seq<A: SeqAccess<'de>>(self, mut seq: A) -> Result<Node, A::Error> {
        let ctx = self.ctx;
        ctx.push(Seg::Index(0));
        let first = seq.next_element_seed(NodeSeed { ctx })?;
        let node = match first {
            None => Node::List(Vec::new()),
            Some(Node::Num(x)) => {
                // A position: numbers only, x and y kept.
                let mut y = None;
                let mut count = 1;
                loop {
                    ctx.set_index(count);
                    match seq.next_element_seed(NodeSeed { ctx })? {
                        None => break,
                        Some(Node::Num(v)) => {
                            if count == 1 {
                                y = Some(v);
                            }
                            count += 1;
                        }
                        Some(_) => return Err(ctx.fail(mixed(ctx))),
                    }
                }
                ctx.pop();
                let Some(y) = y else {
                    return Err(ctx.fail(GeoError::GeoJson {
                        pointer: Some(ctx.pointer()),
                        problem: "a position needs at least two numbers".into(),
                        found: format!("[{x}]"),
                        hint: "write positions as [x, y]",
                    }));
                };
                let seen = ctx.vertices.get() + 1;
                ctx.vertices.set(seen);
                if seen > ctx.max_vertices {
                    return Err(ctx.fail(GeoError::TooManyVertices {
                        pointer: Some(ctx.pointer()),
                        limit: ctx.max_vertices,
                    }));
                }
                return Ok(Node::Pos([x, y]));
            }
            Some(other) => {
                let mut items = vec![other];
                loop {
                    ctx.set_index(items.len());
                    match seq.next_element_seed(NodeSeed { ctx })? {
                        None => break,
                        Some(Node::Num(_)) => return Err(ctx.fail(mixed(ctx))),
                        Some(n) => items.push(n),
                    }
                }
                Node::List(items)
            }
        };
        ctx.pop();
        Ok(node)
    }
}

fn mixed(ctx: &Ctx) -> GeoError {
    GeoError::GeoJson {
        pointer: Some(ctx.pointer()),
        problem: "an array mixes numbers and arrays".into(),
        found: "a number beside arrays".into(),
        hint: "nest coordinates as RFC 7946 requires for the geometry type",
    }
}

fn shape_error(pointer: String, problem: &str, found: String, hint: &'static str) -> GeoError {
    GeoError::GeoJson {
        pointer: Some(pointer),
        problem: problem.to_string(),
        found,
        hint,
    }
}

fn build_zones(doc: RawObject, options: &ZoneOptions<'_>) -> Result<Vec<Zone>, GeoError> {
    if let (Some(crs), Some(raster)) = (doc.crs.as_ref(), options.raster_crs) {
        if let Some(found) = crs_code(crs)? {
            if found != raster {
                return Err(GeoError::CrsMismatch {
                    pointer: Some("/crs".into()),
                    found,
                    raster,
                });
            }
        }
    } else if let Some(crs) = doc.crs.as_ref() {
        crs_code(crs)?;
    }
    let kind = doc.kind.clone().ok_or_else(|| {
        shape_error(
            String::new(),
            "the document has no \"type\" member",
            "an object without type".into(),
            "send a Feature or FeatureCollection",
        )
    })?;
    let features: Vec<(String, RawObject)> = match kind.as_str() {
        "FeatureCollection" => {
            let list = doc.features.ok_or_else(|| {
                shape_error(
                    String::new(),
                    "the FeatureCollection has no \"features\" array",
                    "no features member".into(),
                    "list the zones under \"features\"",
                )
            })?;
            list.into_iter()
                .enumerate()
                .map(|(i, f)| (format!("/features/{i}"), f))
                .collect()
        }
        "Feature" => vec![(String::new(), doc)],
        other => {
            return Err(shape_error(
                "/type".into(),
                "the document must be a Feature or FeatureCollection",
                format!("{other:?}"),
                "wrap each polygon in a Feature that carries the zone id",
            ))
        }
    };
    let mut first_seen: HashMap<String, String> = HashMap::new();
    let mut zones = Vec::with_capacity(features.len());
    for (pointer, feature) in features {
        if feature.kind.as_deref() != Some("Feature") {
            return Err(shape_error(
                format!("{pointer}/type"),
                "each member of \"features\" must be a Feature",
                format!("{:?}", feature.kind.as_deref().unwrap_or("no type")),
                "wrap each polygon in a Feature that carries the zone id",
            ));
        }
        let (id, id_pointer) = zone_id(&feature, &pointer, options.id_property)?;
        if let Some(first) = first_seen.get(&id) {
            return Err(GeoError::DuplicateZoneId {
                pointer: Some(id_pointer),
                id,
                first: first.clone(),
            });
        }
        first_seen.insert(id.clone(), id_pointer);
        let geometry_pointer = format!("{pointer}/geometry");
        let Some(Some(geometry)) = feature.geometry else {
            return Err(shape_error(
                geometry_pointer,
                "the feature has no geometry",
                "null or missing".into(),
                "give every zone a Polygon or MultiPolygon geometry",
            ));
        };
        let polygons = geometry_polygons(*geometry, &geometry_pointer)?;
        zones.push(Zone {
            id,
            polygons,
            pointer,
        });
    }
    Ok(zones)
}

fn zone_id(
    feature: &RawObject,
    pointer: &str,
    id_property: Option<&str>,
) -> Result<(String, String), GeoError> {
    let (value, at, wanted) = match id_property {
        Some(name) => (
            feature.properties.as_ref().and_then(|p| p.get(name)),
            format!("{pointer}/properties/{}", escape(name)),
            format!("property {name:?}"),
        ),
        None => (
            feature.id.as_ref(),
            format!("{pointer}/id"),
            "member \"id\"".to_string(),
        ),
    };
    let id = match value {
        Some(Value::String(s)) => s.clone(),
        Some(Value::Number(n)) => n.to_string(),
        _ => {
            return Err(GeoError::MissingZoneId {
                pointer: Some(at),
                wanted,
            })
        }
    };
    Ok((id, at))
}

/// The EPSG code named by a (pre-RFC 7946) `crs` member, if any.
fn crs_code(crs: &Value) -> Result<Option<u32>, GeoError> {
    if crs.is_null() {
        return Ok(None);
    }
    let name = crs
        .get("properties")
        .and_then(|p| p.get("name"))
        .and_then(Value::as_str);
    let bad = |found: String| GeoError::GeoJson {
        pointer: Some("/crs".into()),
        problem: "the crs member does not name an EPSG code".into(),
        found,
        hint: "drop the crs member (coordinates are then taken in the raster's CRS) or name \
               it as {\"type\": \"name\", \"properties\": {\"name\": \"EPSG:<code>\"}}",
    };
    let Some(name) = name else {
        return Err(bad(crs.to_string()));
    };
    let upper = name.to_ascii_uppercase();
    // OGC CRS84 is WGS 84 with longitude first, GeoJSON's own default.
    if upper.ends_with("CRS84") {
        return Ok(Some(4326));
    }
    if upper.starts_with("EPSG:") || upper.starts_with("URN:OGC:DEF:CRS:EPSG:") {
        if let Some(code) = upper.rsplit(':').next().and_then(|c| c.parse::<u32>().ok()) {
            return Ok(Some(code));
        }
    }
    Err(bad(format!("{name:?}")))
}

fn geometry_polygons(geometry: RawObject, pointer: &str) -> Result<Vec<Polygon>, GeoError> {
    let kind = geometry.kind.unwrap_or_default();
    let coords_pointer = format!("{pointer}/coordinates");
    let coordinates = || {
        geometry.coordinates.ok_or_else(|| {
            shape_error(
                coords_pointer.clone(),
                "the geometry has no coordinates",
                "missing".into(),
                "give the polygon's rings under \"coordinates\"",
            )
        })
    };
    match kind.as_str() {
        "Polygon" => Ok(vec![polygon(coordinates()?, &coords_pointer)?]),
        "MultiPolygon" => {
            let Node::List(parts) = coordinates()? else {
                return Err(nesting(&coords_pointer, "MultiPolygon"));
            };
            if parts.is_empty() {
                return Err(shape_error(
                    coords_pointer,
                    "the MultiPolygon has no polygons",
                    "[]".into(),
                    "give each zone at least one polygon",
                ));
            }
            parts
                .into_iter()
                .enumerate()
                .map(|(i, p)| polygon(p, &format!("{coords_pointer}/{i}")))
                .collect()
        }
        "Point" | "MultiPoint" | "LineString" | "MultiLineString" => Err(GeoError::NotAnArea {
            pointer: Some(pointer.to_string()),
            found: kind,
        }),
        "GeometryCollection" => Err(shape_error(
            pointer.to_string(),
            "geometry collections are not read",
            kind,
            "merge the polygons into one MultiPolygon",
        )),
        _ => Err(shape_error(
            format!("{pointer}/type"),
            "unknown geometry type",
            format!("{kind:?}"),
            "use Polygon or MultiPolygon",
        )),
    }
}

fn nesting(pointer: &str, kind: &str) -> GeoError {
    shape_error(
        pointer.to_string(),
        "the coordinates are not nested as the geometry type requires",
        kind.to_string(),
        "a Polygon is an array of rings, each an array of [x, y] positions",
    )
}

fn polygon(node: Node, pointer: &str) -> Result<Polygon, GeoError> {
    let Node::List(rings) = node else {
        return Err(nesting(pointer, "Polygon"));
    };
    if rings.is_empty() {
        return Err(shape_error(
            pointer.to_string(),
            "the polygon has no rings",
            "[]".into(),
            "give the exterior ring first, then any holes",
        ));
    }
    let mut out = Vec::with_capacity(rings.len());
    for (r, ring) in rings.into_iter().enumerate() {
        let at = format!("{pointer}/{r}");
        let Node::List(positions) = ring else {
            return Err(nesting(&at, "Polygon"));
        };
        let mut points = Vec::with_capacity(positions.len());
        for p in positions {
            match p {
                Node::Pos(xy) => points.push(xy),
                _ => return Err(nesting(&at, "Polygon")),
            }
        }
        if points.len() < 4 {
            return Err(GeoError::InvalidRing {
                pointer: Some(at),
                problem: "a ring needs at least 4 positions",
                found: format!("{} positions", points.len()),
                hint: "close each ring by repeating its first position last",
            });
        }
        if points.first() != points.last() {
            return Err(GeoError::InvalidRing {
                pointer: Some(at),
                problem: "the ring is not closed",
                found: format!(
                    "first {:?}, last {:?}",
                    points.first().copied().unwrap_or_default(),
                    points.last().copied().unwrap_or_default()
                ),
                hint: "repeat the first position as the last one",
            });
        }
        out.push(points);
    }
    Ok(Polygon { rings: out })
}

/// Zones of a label raster: every distinct integer value one zone, with its row-major cells,
/// in increasing label order. 0, NaN and the nodata value are no zone.
pub fn zones_from_labels(
    samples: &[f64],
    nodata: Option<f64>,
) -> Result<Vec<(i64, Vec<u32>)>, GeoError> {
    // Labels are whole numbers that f64 holds exactly.
    const MAX_LABEL: f64 = 9_007_199_254_740_992.0; // 2^53
    let mut zones: BTreeMap<i64, Vec<u32>> = BTreeMap::new();
    for (index, &value) in samples.iter().enumerate() {
        if value.is_nan() || value == 0.0 || Some(value) == nodata {
            continue;
        }
        if value.fract() != 0.0 || value.abs() > MAX_LABEL || !value.is_finite() {
            return Err(GeoError::LabelNotInteger { index, value });
        }
        let Ok(cell) = u32::try_from(index) else {
            return Err(GeoError::LabelLength {
                found: samples.len(),
                expected: u32::MAX as usize,
            });
        };
        zones.entry(value as i64).or_default().push(cell);
    }
    Ok(zones.into_iter().collect())
}

// ---------------------------------------------------------------------------------------------
// Rasterisation. The rules are GDAL's (alg/llrasterize.cpp, alg/gdalrasterize.cpp), as
// `rasterio.features.rasterize` applies them, worked with the same floating-point operations
// so that ties on cell centres and edges resolve identically:
//  * rings are turned clockwise in map coordinates, then mapped to cell coordinates with the
//    inverse geotransform, each term computed as GDAL inverts a north-up transform;
//  * centre rule: on the scanline through row centre `row + 0.5`, a non-horizontal edge from
//    `y1 < y2` counts when `y1 <= row + 0.5 < y2`; its crossing `x` is rounded to
//    `floor(x + 0.5)`; sorted crossings pair up, each pair `(a, b)` burning columns `a..b`.
//    A horizontal edge lying exactly on a centre row and running towards smaller x burns the
//    columns `floor(x_end + 0.5)..floor(x_start + 0.5)` of that row on its own;
//  * all touched: the centre cells plus every cell an edge passes through, stepping cell by
//    cell; edges lying on cell boundaries burn nothing of their own.
// All rings of a zone are filled together with the even-odd rule, as GDAL fills one geometry.
// ---------------------------------------------------------------------------------------------

/// Edges with both ends this close (in cells) to one cell boundary lie on it: they burn no
/// cell of their own in all-touched mode. GDAL's value.
const ON_BOUNDARY: f64 = 1e-4;
/// Edges closer than this (in cells) to vertical or horizontal are walked as one column or
/// row. GDAL's value.
const AXIS_ALIGNED: f64 = 0.01;
/// Smallest step across a row boundary while walking an edge, so the walk always advances.
/// GDAL's value.
const MIN_ROW_STEP: f64 = 1e-9;

/// Row-major cell indices (sorted, unique) burned by the polygons of one zone.
///
/// `all_touched == false` gives the cells GDAL burns by centre; `true` adds every cell the
/// boundary touches. Parts outside the grid are clipped. Without a transform on `grid`, the
/// coordinates are taken as cell coordinates (x = column, y = row). Cost is proportional to
/// the rows each edge crosses plus the cells burned, not to the grid size. Cells past index
/// `u32::MAX` (grids over 2^32 cells) are not reported.
pub fn rasterize(polygons: &[Polygon], grid: &Grid, all_touched: bool) -> Vec<u32> {
    let shape = CellShape::new(polygons, grid);
    if shape.xs.is_empty() || grid.width == 0 || grid.height == 0 {
        return Vec::new();
    }
    let mut spans = Vec::new();
    shape.fill_centres(grid, &mut spans);
    if all_touched {
        shape.walk_edges(grid, &mut spans);
    }
    spans_to_cells(spans, grid)
}

/// Row `row`, columns `first..=last` (already clipped to the grid).
type Span = (u32, u32, u32);

/// All rings of one zone in cell coordinates, each ring closed.
struct CellShape {
    xs: Vec<f64>,
    ys: Vec<f64>,
    ring_ends: Vec<usize>,
}

impl CellShape {
    fn new(polygons: &[Polygon], grid: &Grid) -> Self {
        // Inverse of a north-up geotransform, term by term as GDAL computes it.
        let (x0, dx, y0, dy) = match grid.transform {
            Some(t) => {
                let gt = t.to_gdal();
                (-gt[0] / gt[1], 1.0 / gt[1], -gt[3] / gt[5], 1.0 / gt[5])
            }
            None => (0.0, 1.0, 0.0, 1.0),
        };
        let mut shape = CellShape {
            xs: Vec::new(),
            ys: Vec::new(),
            ring_ends: Vec::new(),
        };
        for ring in polygons.iter().flat_map(|p| p.rings.iter()) {
            if ring.is_empty() {
                continue;
            }
            let clockwise = is_clockwise(ring);
            let mut push = |p: &[f64; 2]| {
                shape.xs.push(x0 + p[0] * dx);
                shape.ys.push(y0 + p[1] * dy);
            };
            if clockwise {
                ring.iter().for_each(&mut push);
            } else {
                ring.iter().rev().for_each(&mut push);
            }
            if ring.first() != ring.last() {
                let first = if clockwise {
                    ring[0]
                } else {
                    ring[ring.len() - 1]
                };
                push(&first);
            }
            shape.ring_ends.push(shape.xs.len());
        }
        shape
    }

    /// Edges `(from, to)` per GDAL's fill loop: each ring's last point to its first, then the
    /// consecutive pairs.
    fn fill_edges(&self) -> impl Iterator<Item = (usize, usize)> + '_ {
        let starts = std::iter::once(0).chain(self.ring_ends.iter().copied());
        starts
            .zip(self.ring_ends.iter().copied())
            .flat_map(|(start, end)| {
                std::iter::once((end - 1, start)).chain((start + 1..end).map(|i| (i - 1, i)))
            })
    }

    fn fill_centres(&self, grid: &Grid, spans: &mut Vec<Span>) {
        let height = i64::from(grid.height);
        let max_col = i64::from(grid.width) - 1;
        let mut crossings: Vec<(u32, i64)> = Vec::new();
        for (a, b) in self.fill_edges() {
            let (ya, yb) = (self.ys[a], self.ys[b]);
            let (xa, xb) = (self.xs[a], self.xs[b]);
            if ya == yb {
                if xa > xb {
                    // A horizontal edge burns its own row when it lies on the row's centre.
                    let row = (ya - 0.5).floor();
                    if row + 0.5 == ya && row >= 0.0 && row < height as f64 {
                        let start = round_half_up(xb);
                        let end = round_half_up(xa);
                        if start <= max_col && end > 0 {
                            push_span(spans, row as i64, start, end - 1, max_col);
                        }
                    }
                }
                continue;
            }
            let (y1, x1, y2, x2) = if ya < yb {
                (ya, xa, yb, xb)
            } else {
                (yb, xb, ya, xa)
            };
            let first = first_row_at_or_after(y1, height);
            let end = first_row_at_or_after(y2, height);
            for row in first..end {
                let y = row as f64 + 0.5;
                let x = (y - y1) * (x2 - x1) / (y2 - y1) + x1;
                crossings.push((row as u32, round_half_up(x)));
            }
        }
        crossings.sort_unstable();
        for row_crossings in crossings.chunk_by(|p, q| p.0 == q.0) {
            for pair in row_crossings.chunks_exact(2) {
                let (a, b) = (pair[0].1, pair[1].1);
                if a <= max_col && b > 0 {
                    push_span(spans, i64::from(pair[0].0), a, b - 1, max_col);
                }
            }
        }
    }

    fn walk_edges(&self, grid: &Grid, spans: &mut Vec<Span>) {
        let mut start = 0;
        for &end in &self.ring_ends {
            for i in start + 1..end {
                walk_edge(
                    (self.xs[i - 1], self.ys[i - 1]),
                    (self.xs[i], self.ys[i]),
                    grid,
                    spans,
                );
            }
            start = end;
        }
    }
}

/// `floor(x + 0.5)` as an integer, clamped to a range wide enough that clamping never changes
/// which cells are burned.
fn round_half_up(x: f64) -> i64 {
    const FAR: f64 = 1.0e15;
    (x + 0.5).floor().clamp(-FAR, FAR) as i64
}

/// The first row in `0..=height` whose centre `row + 0.5` is at or after `y`.
fn first_row_at_or_after(y: f64, height: i64) -> i64 {
    let guess = (y - 0.5).ceil().clamp(0.0, height as f64) as i64;
    let mut row = guess;
    // The guess may be one off where `y - 0.5` rounds; settle it with the exact test.
    while row > 0 && (row - 1) as f64 + 0.5 >= y {
        row -= 1;
    }
    while row < height && (row as f64 + 0.5) < y {
        row += 1;
    }
    row
}

fn push_span(spans: &mut Vec<Span>, row: i64, first: i64, last: i64, max_col: i64) {
    let first = first.max(0);
    let last = last.min(max_col);
    if first <= last && row >= 0 && row <= i64::from(u32::MAX) {
        spans.push((row as u32, first as u32, last as u32));
    }
}

/// Burn the cells one ring edge passes through (all-touched mode), walking left to right.
fn walk_edge(from: (f64, f64), to: (f64, f64), grid: &Grid, spans: &mut Vec<Span>) {
    let width = f64::from(grid.width);
    let height = f64::from(grid.height);
    let max_col = i64::from(grid.width) - 1;
    let max_row = i64::from(grid.height) - 1;
    let (mut x, mut y) = from;
    let (mut x_end, mut y_end) = to;
    if (y < 0.0 && y_end < 0.0)
        || (y > height && y_end > height)
        || (x < 0.0 && x_end < 0.0)
        || (x > width && x_end > width)
    {
        return;
    }
    if x > x_end {
        std::mem::swap(&mut x, &mut x_end);
        std::mem::swap(&mut y, &mut y_end);
    }
    let on_boundary = |v: f64| (v - v.round()).abs() < ON_BOUNDARY;

    // Within one column (or nearly vertical): a run of rows.
    if x.floor() == x_end.floor() || (x - x_end).abs() < AXIS_ALIGNED {
        if on_boundary(x) && on_boundary(x_end) {
            return;
        }
        if y_end < y {
            std::mem::swap(&mut y, &mut y_end);
        }
        let col = x_end.floor();
        if col < 0.0 || col > max_col as f64 {
            return;
        }
        let first = y.floor().max(0.0);
        let last = (y_end - ON_BOUNDARY).floor().min(max_row as f64);
        let mut row = first;
        while row <= last {
            push_span(spans, row as i64, col as i64, col as i64, max_col);
            row += 1.0;
        }
        return;
    }

    // Within one row (or nearly horizontal): a run of columns.
    if y.floor() == y_end.floor() || (y - y_end).abs() < AXIS_ALIGNED {
        if on_boundary(y) && on_boundary(y_end) {
            return;
        }
        let row = y.floor();
        if row < 0.0 || row > max_row as f64 {
            return;
        }
        let first = x.floor().max(0.0) as i64;
        let last = (x_end - ON_BOUNDARY).floor().min(max_col as f64) as i64;
        push_span(spans, row as i64, first, last, max_col);
        return;
    }

    // General case: clip to the grid, then step from cell to cell.
    let slope = (y_end - y) / (x_end - x);
    if x_end > width {
        y_end -= (x_end - width) * slope;
        x_end = width;
    }
    if x < 0.0 {
        y += (0.0 - x) * slope;
        x = 0.0;
    }
    if y_end > y {
        if y < 0.0 {
            x += (0.0 - y) / slope;
            y = 0.0;
        }
        if y_end >= height {
            x_end += (y_end - height) / slope;
        }
    } else {
        if y >= height {
            x += (height - y) / slope;
            y = height;
        }
        if y_end < 0.0 {
            x_end -= (y_end - 0.0) / slope;
        }
    }
    // Cells right of the grid are not cells; GDAL's walk may step there, ours stops.
    x_end = x_end.min(width);
    // Each step enters a new column or row of the grid, so this many steps always suffice;
    // the cap only guards against a walk that float rounding could stall.
    let mut steps_left = 2 * (u64::from(grid.width) + u64::from(grid.height)) + 4;
    while x >= 0.0 && x < x_end && steps_left > 0 {
        steps_left -= 1;
        let col = x.floor();
        let row = y.floor();
        if row >= 0.0 && row <= max_row as f64 {
            push_span(spans, row as i64, col as i64, col as i64, max_col);
        } else if (slope > 0.0 && row > max_row as f64) || (slope < 0.0 && row < 0.0) {
            break; // moving away from the grid from here on
        }
        let mut step_x = (x + 1.0).floor() - x;
        let mut step_y = step_x * slope;
        if (y + step_y).floor() == row {
            x += step_x;
            y += step_y;
        } else if slope < 0.0 {
            step_y = row - y;
            if step_y > -MIN_ROW_STEP {
                step_y = -MIN_ROW_STEP;
            }
            step_x = step_y / slope;
            x += step_x;
            y += step_y;
        } else {
            step_y = (row + 1.0) - y;
            if step_y < MIN_ROW_STEP {
                step_y = MIN_ROW_STEP;
            }
            step_x = step_y / slope;
            x += step_x;
            y += step_y;
        }
    }
}

/// Ring orientation in map coordinates (y up): the turn at the lowest, then rightmost, vertex,
/// or the shoelace sum where that vertex is degenerate.
fn is_clockwise(ring: &[[f64; 2]]) -> bool {
    // Rings are closed, so the last position repeats the first and is left out.
    let n = if ring.len() > 1 && ring.first() == ring.last() {
        ring.len() - 1
    } else {
        ring.len()
    };
    if n < 3 {
        return true;
    }
    let mut pivot = 0;
    for i in 1..n {
        let (p, q) = (ring[i], ring[pivot]);
        if p[1] < q[1] || (p[1] == q[1] && p[0] > q[0]) {
            pivot = i;
        }
    }
    let prev = ring[(pivot + n - 1) % n];
    let next = ring[(pivot + 1) % n];
    let v = ring[pivot];
    let cross = (next[0] - v[0]) * (prev[1] - v[1]) - (prev[0] - v[0]) * (next[1] - v[1]);
    if prev != v && next != v {
        if cross > 0.0 {
            return false;
        }
        if cross < 0.0 {
            return true;
        }
    }
    let mut twice_area = 0.0;
    for i in 0..n {
        let (p, q) = (ring[i], ring[(i + 1) % n]);
        twice_area += p[0] * q[1] - q[0] * p[1];
    }
    twice_area < 0.0
}

fn spans_to_cells(mut spans: Vec<Span>, grid: &Grid) -> Vec<u32> {
    spans.sort_unstable();
    let width = u64::from(grid.width);
    let mut cells = Vec::new();
    let mut current: Option<Span> = None;
    let emit = |(row, first, last): Span, cells: &mut Vec<u32>| {
        let base = u64::from(row) * width;
        for col in first..=last {
            if let Ok(index) = u32::try_from(base + u64::from(col)) {
                cells.push(index);
            }
        }
    };
    for span in spans {
        current = match current {
            Some((row, first, last)) if row == span.0 && span.1 <= last.saturating_add(1) => {
                Some((row, first, last.max(span.2)))
            }
            Some(done) => {
                emit(done, &mut cells);
                Some(span)
            }
            None => Some(span),
        };
    }
    if let Some(done) = current {
        emit(done, &mut cells);
    }
    cells
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::geo::GeoTransform;

    fn square(x0: f64, y0: f64, x1: f64, y1: f64) -> Polygon {
        Polygon {
            rings: vec![vec![[x0, y0], [x1, y0], [x1, y1], [x0, y1], [x0, y0]]],
        }
    }

    fn unit_grid(width: u32, height: u32) -> Grid {
        // Map y grows north, so row r spans y in [height - r - 1, height - r].
        Grid {
            width,
            height,
            transform: Some(GeoTransform::new(0.0, f64::from(height), 1.0, 1.0).unwrap()),
            crs: None,
        }
    }

    #[test]
    fn aligned_square_burns_its_cells_in_both_modes() {
        // reference: closed form: a square on cell edges covers exactly its cells (GDAL agrees:
        // edges on boundaries burn nothing of their own).
        let g = unit_grid(5, 5);
        let p = square(1.0, 1.0, 3.0, 3.0);
        let expected = vec![2 * 5 + 1, 2 * 5 + 2, 3 * 5 + 1, 3 * 5 + 2];
        assert_eq!(rasterize(std::slice::from_ref(&p), &g, false), expected);
        assert_eq!(rasterize(&[p], &g, true), expected);
    }

    #[test]
    fn hole_is_left_out() {
        // reference: closed form: 4x4 square minus its central 2x2.
        let g = unit_grid(4, 4);
        let mut p = square(0.0, 0.0, 4.0, 4.0);
        p.rings.push(square(1.0, 1.0, 3.0, 3.0).rings.remove(0));
        let cells = rasterize(&[p], &g, false);
        assert_eq!(cells.len(), 12);
        assert!(!cells.contains(&5) && !cells.contains(&10));
    }

    #[test]
    fn far_outside_is_empty() {
        let g = unit_grid(4, 4);
        assert!(rasterize(&[square(1e9, 1e9, 1e9 + 5.0, 1e9 + 5.0)], &g, true).is_empty());
    }

    #[test]
    fn labels_become_zones() {
        let cells = [0.0, 2.0, 2.0, -9999.0, 1.0, f64::NAN];
        let zones = zones_from_labels(&cells, Some(-9999.0)).unwrap();
        assert_eq!(zones, vec![(1, vec![4]), (2, vec![1, 2])]);
        let err = zones_from_labels(&[1.5], None).unwrap_err();
        assert_eq!(
            err,
            GeoError::LabelNotInteger {
                index: 0,
                value: 1.5
            }
        );
    }
}

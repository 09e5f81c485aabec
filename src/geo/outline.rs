//! Outlines of cell sets: the cell-edge boundary of a set of cells as GeoJSON polygons.
//!
//! Owns tracing only: given row-major cell indices on a [`Grid`] with a transform, it returns
//! one polygon per 4-connected group of cells, outer rings counter-clockwise and holes
//! clockwise (RFC 7946), every ring simple. Where two cells meet only at a corner the rings
//! are split there, so no ring touches itself (the result is valid under the OGC simple
//! features rules). Memory grows with the number of cells given, never with the grid.

use std::collections::{BTreeMap, HashMap};

use serde_json::{json, Value};

use super::zones::Polygon;
use super::{GeoError, Grid};

/// Trace the outline of `cells` (row-major indices, any order, duplicates allowed).
pub fn trace(cells: &[u32], grid: &Grid) -> Result<Vec<Polygon>, GeoError> {
    let transform = grid.transform.ok_or(GeoError::NoTransform {
        what: "tracing an outline",
    })?;
    let total = grid.cell_count();
    let mut sorted: Vec<u32> = cells.to_vec();
    sorted.sort_unstable();
    sorted.dedup();
    if let Some(&bad) = sorted.iter().find(|&&c| u64::from(c) >= total) {
        return Err(GeoError::CellOutOfGrid {
            index: bad.into(),
            width: grid.width,
            height: grid.height,
            cells: total,
        });
    }
    let width = grid.width;
    let position = |row: u32, col: u32| -> Option<usize> {
        let index = u64::from(row) * u64::from(width) + u64::from(col);
        u32::try_from(index)
            .ok()
            .and_then(|i| sorted.binary_search(&i).ok())
    };

    // Group cells 4-connected (union-find over positions in `sorted`).
    let mut parent: Vec<usize> = (0..sorted.len()).collect();
    fn root(parent: &mut [usize], mut i: usize) -> usize {
        while parent[i] != i {
            parent[i] = parent[parent[i]];
            i = parent[i];
        }
        i
    }
    for (i, &cell) in sorted.iter().enumerate() {
        let (row, col) = (cell / width, cell % width);
        let right = (col + 1 < width).then(|| position(row, col + 1)).flatten();
        let below = (row + 1 < grid.height)
            .then(|| position(row + 1, col))
            .flatten();
        for j in [right, below].into_iter().flatten() {
            let (a, b) = (root(&mut parent, i), root(&mut parent, j));
            if a != b {
                parent[a.max(b)] = a.min(b);
            }
        }
    }

    // Boundary edges between lattice corners (col, row), directed so the cell lies on the
    // left in map coordinates (y up): outer rings come out counter-clockwise, holes clockwise.
    struct Edge {
        from: (u32, u32),
        to: (u32, u32),
        cell: usize,
    }
    let mut edges: Vec<Edge> = Vec::new();
    for (i, &cell) in sorted.iter().enumerate() {
        let (row, col) = (cell / width, cell % width);
        let inside = |r: Option<u32>, c: Option<u32>| match (r, c) {
            (Some(r), Some(c)) if r < grid.height && c < width => position(r, c).is_some(),
            _ => false,
        };
        let (c0, c1, r0, r1) = (col, col + 1, row, row + 1);
        if !inside(row.checked_sub(1), Some(col)) {
            edges.push(Edge {
                from: (c1, r0),
                to: (c0, r0),
                cell: i,
            });
        }
        if !inside(Some(row), col.checked_sub(1)) {
            edges.push(Edge {
                from: (c0, r0),
                to: (c0, r1),
                cell: i,
            });
        }
        if !inside(Some(row + 1), Some(col)) {
            edges.push(Edge {
                from: (c0, r1),
                to: (c1, r1),
                cell: i,
            });
        }
        if !inside(Some(row), Some(col + 1)) {
            edges.push(Edge {
                from: (c1, r1),
                to: (c1, r0),
                cell: i,
            });
        }
    }
    // At most two edges leave a corner (two when cells meet there only diagonally).
    let mut leaving: HashMap<(u32, u32), [Option<usize>; 2]> = HashMap::new();
    for (e, edge) in edges.iter().enumerate() {
        let slot = leaving.entry(edge.from).or_insert([None, None]);
        if slot[0].is_none() {
            slot[0] = Some(e);
        } else {
            slot[1] = Some(e);
        }
    }

    let mut used = vec![false; edges.len()];
    // Rings per group: (group root, ring in lattice corners, is outer).
    let mut rings: Vec<(usize, Vec<(u32, u32)>)> = Vec::new();
    for start in 0..edges.len() {
        if used[start] {
            continue;
        }
        let mut corners = Vec::new();
        let mut e = start;
        loop {
            used[e] = true;
            corners.push(edges[e].from);
            // Where two edges leave a corner, cells meet there only diagonally: stay with
            // the same cell, which splits the rings at that corner.
            let next = leaving.get(&edges[e].to).and_then(|slot| match slot {
                [Some(a), Some(b)] => Some(if edges[*b].cell == edges[e].cell {
                    *b
                } else {
                    *a
                }),
                [Some(a), None] => Some(*a),
                _ => None,
            });
            match next {
                Some(n) if n != start && !used[n] => e = n,
                _ => break,
            }
        }
        let group = root(&mut parent, edges[start].cell);
        for simple in split_at_repeats(corners) {
            rings.push((group, drop_collinear(simple)));
        }
    }

    let to_map = |(c, r): (u32, u32)| -> [f64; 2] {
        [
            transform.origin_x + f64::from(c) * transform.cell_width,
            transform.origin_y - f64::from(r) * transform.cell_height,
        ]
    };
    // Per group: its outer rings (one, unless a pinch split it) and holes, in lattice corners.
    let mut by_group: BTreeMap<usize, GroupRings> = BTreeMap::new();
    for (group, corners) in rings {
        let entry = by_group.entry(group).or_default();
        if lattice_area(&corners) > 0 {
            entry.outers.push(corners);
        } else {
            entry.holes.push(corners);
        }
    }
    let mut polygons = Vec::new();
    for group in by_group.into_values() {
        let mut parts: Vec<Vec<Vec<(u32, u32)>>> =
            group.outers.into_iter().map(|o| vec![o]).collect();
        for hole in group.holes {
            let probe = inside_point(&hole);
            // The smallest outer ring around the hole holds it.
            let owner = parts
                .iter()
                .enumerate()
                .filter(|(_, p)| contains(&p[0], probe))
                .min_by_key(|(_, p)| lattice_area(&p[0]))
                .map(|(i, _)| i);
            if let Some(i) = owner {
                parts[i].push(hole);
            }
        }
        for rings in parts {
            polygons.push(Polygon {
                rings: rings
                    .into_iter()
                    .map(|r| r.into_iter().map(to_map).collect())
                    .collect(),
            });
        }
    }
    Ok(polygons)
}

#[derive(Default)]
struct GroupRings {
    outers: Vec<Vec<(u32, u32)>>,
    holes: Vec<Vec<(u32, u32)>>,
}

/// Split a closed walk of corners (first not repeated) into simple closed rings wherever it
/// revisits a corner; the loop pinched off there becomes a ring of its own.
fn split_at_repeats(walk: Vec<(u32, u32)>) -> Vec<Vec<(u32, u32)>> {
    let mut out = Vec::new();
    let mut stack: Vec<(u32, u32)> = Vec::with_capacity(walk.len());
    let mut seen: HashMap<(u32, u32), usize> = HashMap::new();
    for corner in walk {
        if let Some(&at) = seen.get(&corner) {
            let mut ring: Vec<(u32, u32)> = stack.drain(at..).collect();
            for c in &ring[1..] {
                seen.remove(c);
            }
            ring.push(corner);
            out.push(ring);
        }
        seen.insert(corner, stack.len());
        stack.push(corner);
    }
    if let Some(&first) = stack.first() {
        stack.push(first);
        out.push(stack);
    }
    out
}

/// Twice the signed area of a closed lattice ring, in map orientation (positive is
/// counter-clockwise in map coordinates, whose y runs against the row index).
fn lattice_area(ring: &[(u32, u32)]) -> i64 {
    -ring
        .windows(2)
        .map(|w| {
            let (a, b) = (w[0], w[1]);
            i64::from(a.0) * i64::from(b.1) - i64::from(b.0) * i64::from(a.1)
        })
        .sum::<i64>()
}

/// Twice the lattice coordinates of a cell centre just inside a hole: beside the middle of
/// its first edge, on the side the hole encloses. Never on a lattice line, so containment
/// tests on it have no ties.
fn inside_point(hole: &[(u32, u32)]) -> (i64, i64) {
    let (a, b) = (hole[0], hole[1]);
    let (ax, ay, bx, by) = (
        i64::from(a.0),
        i64::from(a.1),
        i64::from(b.0),
        i64::from(b.1),
    );
    let (dx, dy) = ((bx - ax).signum(), (by - ay).signum());
    // The first unit step of the edge, then half a cell to its left in (column, row): holes
    // run clockwise in map coordinates, which is counter-clockwise in (column, row), so the
    // hole lies on the left.
    let (mx, my) = (2 * ax + dx, 2 * ay + dy);
    (mx - dy, my + dx)
}

/// Even-odd containment of a point given in doubled lattice coordinates.
fn contains(ring: &[(u32, u32)], (px, py): (i64, i64)) -> bool {
    let mut inside = false;
    for w in ring.windows(2) {
        let (x0, y0) = (2 * i64::from(w[0].0), 2 * i64::from(w[0].1));
        let (x1, y1) = (2 * i64::from(w[1].0), 2 * i64::from(w[1].1));
        // Vertical edges only can cross a horizontal ray to the right.
        if x0 == x1 && x0 > px && (y0 > py) != (y1 > py) {
            inside = !inside;
        }
    }
    inside
}

/// The outline of `cells` as a GeoJSON MultiPolygon geometry.
pub fn to_geojson(cells: &[u32], grid: &Grid) -> Result<Value, GeoError> {
    let polygons = trace(cells, grid)?;
    let coordinates: Vec<&Vec<Vec<[f64; 2]>>> = polygons.iter().map(|p| &p.rings).collect();
    Ok(json!({ "type": "MultiPolygon", "coordinates": coordinates }))
}

/// Keep only the corners where a closed lattice ring turns.
fn drop_collinear(ring: Vec<(u32, u32)>) -> Vec<(u32, u32)> {
    let n = ring.len() - 1; // last repeats first
    let dir = |a: (u32, u32), b: (u32, u32)| {
        (
            i64::from(b.0) - i64::from(a.0),
            i64::from(b.1) - i64::from(a.1),
        )
    };
    let mut out: Vec<(u32, u32)> = Vec::with_capacity(n + 1);
    for i in 0..n {
        let prev = ring[(i + n - 1) % n];
        let here = ring[i];
        let next = ring[(i + 1) % n];
        let (a, b) = (dir(prev, here), dir(here, next));
        // Unit steps: collinear exactly when the step directions have equal signs.
        if (a.0.signum(), a.1.signum()) != (b.0.signum(), b.1.signum()) {
            out.push(here);
        }
    }
    if let Some(&first) = out.first() {
        out.push(first);
    }
    out
}

/// Twice the signed area (positive for counter-clockwise, y up).
#[cfg(test)]
fn signed_area(ring: &[[f64; 2]]) -> f64 {
    ring.windows(2)
        .map(|w| w[0][0] * w[1][1] - w[1][0] * w[0][1])
        .sum()
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::geo::GeoTransform;

    fn grid(width: u32, height: u32) -> Grid {
        Grid {
            width,
            height,
            transform: Some(GeoTransform::new(0.0, f64::from(height), 1.0, 1.0).unwrap()),
            crs: None,
        }
    }

    #[test]
    fn one_cell_is_a_counter_clockwise_square() {
        // reference: closed form: cell (0, 0) of a 2x2 unit grid spans x 0..1, y 1..2.
        let polygons = trace(&[0], &grid(2, 2)).unwrap();
        assert_eq!(polygons.len(), 1);
        let ring = &polygons[0].rings[0];
        assert_eq!(ring.len(), 5);
        assert!(signed_area(ring) > 0.0);
        assert_eq!(signed_area(ring), 2.0);
    }

    #[test]
    fn diagonal_cells_are_two_polygons() {
        // Cells (0,0) and (1,1) meet only at a corner: two simple squares.
        let polygons = trace(&[0, 3], &grid(2, 2)).unwrap();
        assert_eq!(polygons.len(), 2);
        assert!(polygons
            .iter()
            .all(|p| p.rings.len() == 1 && p.rings[0].len() == 5));
    }

    #[test]
    fn ring_of_cells_has_a_clockwise_hole() {
        let cells: Vec<u32> = (0..9).filter(|&c| c != 4).collect();
        let polygons = trace(&cells, &grid(3, 3)).unwrap();
        assert_eq!(polygons.len(), 1);
        assert_eq!(polygons[0].rings.len(), 2);
        assert!(signed_area(&polygons[0].rings[1]) < 0.0);
    }

    #[test]
    fn out_of_grid_cell_is_an_error() {
        let err = trace(&[9], &grid(3, 3)).unwrap_err();
        assert!(matches!(err, GeoError::CellOutOfGrid { index: 9, .. }));
    }
}

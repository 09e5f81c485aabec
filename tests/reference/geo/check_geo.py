#!/usr/bin/env python3
"""Outside reference for src/geo: GDAL (through rasterio) and shapely judge our format layer.

Writes fixtures (polygons with rasterio's burned cells, GeoTIFFs written by rasterio, cell sets
to outline), runs `cargo test --test geo_reference` with ZONETALLY_GEO_FIXTURES pointing at
them (the Rust side compares its answers and writes its own GeoTIFFs and outlines), then reads
the Rust side's output back with rasterio and shapely.

    pip install rasterio shapely
    python3 tests/reference/geo/check_geo.py [--keep DIR] [--cargo PATH]

Prints `geo reference: N passed, M failed` and exits non-zero on any failure. All data here is
invented; grids sit at made-up coordinates.
"""

import argparse
import json
import os
import random
import re
import subprocess
import sys
import tempfile

import numpy as np
import rasterio
from affine import Affine
from rasterio.crs import CRS
from rasterio.features import rasterize
import shapely
from shapely.geometry import box, shape
from shapely.ops import unary_union

ROOT = os.path.dirname(os.path.dirname(os.path.dirname(os.path.dirname(os.path.abspath(__file__)))))

# Grids: (width, height, origin x, origin y, cell width, cell height). Cell sizes and origins are
# dyadic so that every world coordinate below is exact in decimal JSON and in f64.
GRIDS = [
    (12, 10, 0.0, 10.0, 1.0, 1.0),
    (12, 10, 500000.0, 4100000.0, 30.0, 30.0),
    (12, 10, -3.5, 12.25, 0.25, 0.5),
]


def ring_px_to_world(ring, g):
    _, _, ox, oy, cw, ch = g
    return [[ox + x * cw, oy - y * ch] for x, y in ring]


def rect(x0, y0, x1, y1):
    return [(x0, y0), (x1, y0), (x1, y1), (x0, y1), (x0, y0)]


def rev(ring):
    return list(reversed(ring))


def q(v):
    """Snap to a multiple of 1/64: exact in decimal and binary."""
    return round(v * 64) / 64


def star(cx, cy, r_in, r_out, n, seed):
    rng = random.Random(seed)
    pts = []
    for k in range(n):
        a = 2 * np.pi * k / n
        r = rng.uniform(r_in, r_out)
        pts.append((q(cx + r * np.cos(a)), q(cy + r * np.sin(a))))
    pts.append(pts[0])
    return pts


def polygon_cases():
    """(name, list of polygons, each a list of rings in cell coordinates x=col, y=row)."""
    W, H = 12, 10
    c = []
    c.append(("one cell on edges", [[rect(2, 3, 3, 4)]]))
    c.append(("whole raster", [[rect(0, 0, W, H)]]))
    c.append(("beyond raster on all sides", [[rect(-5, -5, W + 5, H + 5)]]))
    c.append(("partly outside top left", [[rect(-3, -2, 4, 5)]]))
    c.append(("partly outside bottom right", [[rect(8.25, 6.75, 15, 14)]]))
    c.append(("vertices on cell centres", [[rect(2.5, 2.5, 6.5, 5.5)]]))
    c.append(("vertices on cell centres reversed", [[rev(rect(2.5, 2.5, 6.5, 5.5))]]))
    c.append(("hole, edges on centres", [[rect(0.5, 0.5, 10.5, 8.5), rect(3.5, 2.5, 7.5, 6.5)]]))
    c.append(("hole, both windings flipped",
              [[rev(rect(0.5, 0.5, 10.5, 8.5)), rev(rect(3.5, 2.5, 7.5, 6.5))]]))
    c.append(("hole on cell edges", [[rect(1, 1, 11, 9), rect(4, 3, 8, 7)]]))
    c.append(("multipolygon disjoint", [[rect(0, 0, 3, 3)], [rect(6.5, 5.5, 11.5, 9.5)]]))
    c.append(("multipolygon sharing an edge", [[rect(1, 1, 4, 4)], [rect(4, 1, 7, 4)]]))
    c.append(("multipolygon, hole in one part",
              [[rect(0, 0, 5, 5), rect(1.5, 1.5, 3.5, 3.5)], [rect(6, 6, 10.75, 9.25)]]))
    c.append(("diagonal sliver", [[[(0, 0), (12, 10), (12, 9.875), (0, 0)]]]))
    c.append(("horizontal sliver on a centre row", [[rect(1.25, 3.5, 9.75, 3.515625)]]))
    c.append(("vertical sliver on a cell boundary", [[rect(4, 0.5, 4.015625, 8.5)]]))
    c.append(("vertical sliver inside a column", [[rect(4.5, 0.5, 4.515625, 8)]]))
    c.append(("triangle, vertex on a centre", [[[(1.5, 1.5), (9, 2), (5, 8.5), (1.5, 1.5)]]]))
    c.append(("diamond, vertices on centres",
              [[[(5.5, 0.5), (10.5, 4.5), (5.5, 8.5), (0.5, 4.5), (5.5, 0.5)]]]))
    c.append(("diamond, vertices on corners",
              [[[(6, 0), (11, 5), (6, 10), (1, 5), (6, 0)]]]))
    c.append(("45 degree edges through corners", [[[(0, 0), (8, 8), (0, 8), (0, 0)]]]))
    c.append(("inside one cell, centre excluded", [[rect(3.125, 4.125, 3.375, 4.375)]]))
    c.append(("inside one cell, centre included", [[rect(3.25, 4.25, 3.75, 4.75)]]))
    c.append(("entirely right of raster", [[rect(13, 2, 15, 5)]]))
    c.append(("touching the right edge from outside", [[rect(12, 2, 14, 5)]]))
    c.append(("L shape on edges", [[[(1, 1), (6, 1), (6, 3), (3, 3), (3, 8), (1, 8), (1, 1)]]]))
    c.append(("zigzag, horizontal edges on centre rows",
              [[[(0.5, 0.5), (3.5, 0.5), (3.5, 2.5), (6.5, 2.5), (6.5, 0.5), (9.5, 0.5),
                 (9.5, 6.5), (6.5, 6.5), (6.5, 4.5), (3.5, 4.5), (3.5, 6.5), (0.5, 6.5),
                 (0.5, 0.5)]]]))
    c.append(("collinear and repeated vertices",
              [[[(1, 1), (1, 1), (4, 1), (7.5, 1), (7.5, 1), (7.5, 4.5), (7.5, 6), (1, 6),
                 (1, 3.5), (1, 1)]]]))
    c.append(("hole touching the shell at a vertex",
              [[rect(0, 0, 8, 8), [(0, 0), (3, 2), (2, 3), (0, 0)]]]))
    c.append(("U shape, vertical edges on centres",
              [[[(1.5, 1), (3.5, 1), (3.5, 6), (7.5, 6), (7.5, 1), (9.5, 1), (9.5, 8),
                 (1.5, 8), (1.5, 1)]]]))
    c.append(("big polygon partly outside", [[star(6, 5, 4, 9, 23, 7)]]))
    for k in range(16):
        rng = random.Random(100 + k)
        cx, cy = q(rng.uniform(0, W)), q(rng.uniform(0, H))
        c.append((f"random star {k}", [[star(cx, cy, 0.5, rng.uniform(1, 7), rng.randint(3, 17), k)]]))
    for k in range(6):
        rng = random.Random(300 + k)
        pts = [(q(rng.uniform(-2, W + 2)), q(rng.uniform(-2, H + 2))) for _ in range(3)]
        pts.append(pts[0])
        c.append((f"random triangle {k}", [[pts]]))
    return c


def write_polygon_fixtures(folder):
    cases = []
    for gi, g in enumerate(GRIDS):
        w, h, ox, oy, cw, ch = g
        transform = Affine(cw, 0.0, ox, 0.0, -ch, oy)
        for name, polys in polygon_cases():
            world = [[ring_px_to_world(r, g) for r in poly] for poly in polys]
            if len(world) == 1:
                geom = {"type": "Polygon", "coordinates": world[0]}
            else:
                geom = {"type": "MultiPolygon", "coordinates": world}
            for all_touched in (False, True):
                # reference: rasterio.features.rasterize (GDAL), all_touched=False / True
                burned = rasterize([(geom, 1)], out_shape=(h, w), transform=transform,
                                   all_touched=all_touched, fill=0, dtype="uint8")
                cells = np.flatnonzero(burned.ravel()).tolist()
                cases.append({"name": f"grid {gi}: {name}", "grid": gi, "geometry": geom,
                              "all_touched": all_touched, "cells": cells})
    grids = [{"width": g[0], "height": g[1], "gdal": list(Affine(g[4], 0, g[2], 0, -g[5], g[3]).to_gdal())}
             for g in GRIDS]
    with open(os.path.join(folder, "polygons.json"), "w") as f:
        json.dump({"grids": grids, "cases": cases}, f)
    return len(cases)


def write_tiff_fixtures(folder):
    rng = np.random.default_rng(11)
    entries = []
    width, height = 37, 23
    transform = Affine(30.0, 0.0, 421000.0, 0.0, -30.0, 3905000.0)
    combos = []
    for dtype in ("float32", "float64", "uint8", "uint16"):
        predictors = (1, 2, 3) if dtype.startswith("float") else (1, 2)
        for tiled in (False, True):
            for compress in (None, "deflate", "lzw"):
                for predictor in predictors:
                    if compress is None and predictor != 1:
                        continue  # predictors only apply to compressed data
                    combos.append((dtype, tiled, compress, predictor))
    for k, (dtype, tiled, compress, predictor) in enumerate(combos):
        if dtype.startswith("float"):
            values = rng.uniform(-1, 1, size=(height, width)).astype(dtype)
            nodata = -9999.0
        else:
            top = 255 if dtype == "uint8" else 65535
            values = rng.integers(0, top, size=(height, width)).astype(dtype)
            nodata = float(top)
        values[3, 4] = nodata
        epsg = 4326 if k % 5 == 0 else 32617
        t = Affine(0.001, 0, -81.5, 0, -0.001, 35.25) if epsg == 4326 else transform
        profile = dict(driver="GTiff", width=width, height=height, count=1, dtype=dtype,
                       crs=CRS.from_epsg(epsg), transform=t, nodata=nodata)
        if tiled:
            profile.update(tiled=True, blockxsize=16, blockysize=16)
        else:
            profile.update(tiled=False, blockysize=5)
        if compress:
            profile.update(compress=compress, predictor=predictor)
        name = f"r{k:02d}_{dtype}_{'tiled' if tiled else 'striped'}_{compress or 'none'}_p{predictor}.tif"
        point = k % 7 == 3
        with rasterio.open(os.path.join(folder, name), "w", **profile) as dst:
            if point:
                dst.update_tags(AREA_OR_POINT="Point")
            dst.write(values, 1)
        # reference: rasterio (GDAL) reading its own file back
        with rasterio.open(os.path.join(folder, name)) as src:
            read_back = src.read(1).astype("float64")
            gdal = list(src.transform.to_gdal())
            crs = src.crs.to_epsg()
            nod = src.nodata
        read_back.tofile(os.path.join(folder, name + ".f64"))
        entries.append({"file": name, "dtype": dtype, "gdal": gdal, "epsg": crs, "nodata": nod,
                        "width": width, "height": height, "pixel_is_point": point})
    # Two bands: refused on input.
    name = "two_bands.tif"
    with rasterio.open(os.path.join(folder, name), "w", driver="GTiff", width=5, height=4, count=2,
                       dtype="float32", crs=CRS.from_epsg(32617), transform=transform) as dst:
        dst.write(np.ones((2, 4, 5), dtype="float32"))
    entries.append({"file": name, "expect_error": "bands"})
    with open(os.path.join(folder, "tiffs.json"), "w") as f:
        json.dump({"tiffs": entries}, f)
    return len(entries)


def write_cellset_fixtures(folder):
    """Cell sets to outline: blobs with holes, corner-only contacts, raster edges."""
    sets = []
    w, h = 14, 11
    rng = np.random.default_rng(5)
    for k in range(12):
        grid = rng.random((h, w)) < (0.3 + 0.04 * k)
        sets.append({"name": f"random {k}", "cells": np.flatnonzero(grid.ravel()).tolist()})
    checker = (np.add.outer(np.arange(h), np.arange(w)) % 2 == 0)
    sets.append({"name": "checkerboard", "cells": np.flatnonzero(checker.ravel()).tolist()})
    ring = np.zeros((h, w), bool)
    ring[2:7, 2:7] = True
    ring[3:6, 3:6] = False
    ring[4, 4] = True  # island in the hole
    sets.append({"name": "ring with island", "cells": np.flatnonzero(ring.ravel()).tolist()})
    pinch = np.zeros((h, w), bool)
    pinch[1:4, 1:4] = True
    pinch[4:7, 4:7] = True
    pinch[2, 5] = pinch[5, 2] = True
    sets.append({"name": "corner contacts", "cells": np.flatnonzero(pinch.ravel()).tolist()})
    sets.append({"name": "whole grid", "cells": list(range(w * h))})
    sets.append({"name": "one cell", "cells": [w * h - 1]})
    # A loop closed only through a corner contact: hole touching the shell at one point.
    loop = np.zeros((h, w), bool)
    loop[1, 1:5] = loop[1:5, 1] = loop[4, 1:4] = loop[1:4, 4] = True
    loop[4, 4] = False
    loop[5, 5] = True
    loop[4, 5] = False
    sets.append({"name": "loop through a corner", "cells": np.flatnonzero(loop.ravel()).tolist()})
    g = {"width": w, "height": h, "gdal": [200.0, 10.0, 0.0, 900.0, 0.0, -10.0]}
    with open(os.path.join(folder, "cellsets.json"), "w") as f:
        json.dump({"grid": g, "sets": sets}, f)
    return sets, g


def check_our_tiffs(folder, results):
    with open(os.path.join(folder, "ours", "manifest.json")) as f:
        manifest = json.load(f)
    for entry in manifest["tiffs"]:
        path = os.path.join(folder, "ours", entry["file"])
        ok = True
        why = []
        # reference: rasterio (GDAL) reading the GeoTIFF we wrote
        with rasterio.open(path) as src:
            expected = np.fromfile(path + ".f64", dtype="float64").reshape(
                src.count, src.height, src.width)
            got = src.read().astype("float64")
            if src.count != entry["bands"]:
                ok = False; why.append(f"bands {src.count}")
            nod = entry["nodata"]
            if isinstance(nod, str):
                nod = float(nod)
            if nod is not None and not np.isnan(nod):
                expected = np.where(np.isnan(expected), nod, expected)
            if not np.array_equal(got, expected, equal_nan=True):
                ok = False; why.append("values differ")
            if list(src.transform.to_gdal()) != entry["gdal"]:
                ok = False; why.append(f"transform {src.transform.to_gdal()} vs {entry['gdal']}")
            epsg = src.crs.to_epsg() if src.crs else None
            if epsg != entry["epsg"]:
                ok = False; why.append(f"crs {epsg} vs {entry['epsg']}")
            if not (src.nodata == nod or (nod is not None and src.nodata is not None
                                          and np.isnan(nod) and np.isnan(src.nodata))):
                ok = False; why.append(f"nodata {src.nodata} vs {nod}")
            if src.dtypes[0] != "float64" or src.compression is None or src.compression.value != "DEFLATE":
                ok = False; why.append(f"dtype {src.dtypes[0]} compression {src.compression}")
        results.append((f"our tiff {entry['file']} read by rasterio", ok, "; ".join(why)))


def check_outlines(folder, sets, g, results):
    with open(os.path.join(folder, "ours", "outlines.json")) as f:
        outlines = json.load(f)
    x0, cw, _, y0, _, dy = g["gdal"]
    ch = -dy
    for s, got in zip(sets, outlines["outlines"]):
        geom = shape(got)
        why = []
        squares = [box(x0 + (c % g["width"]) * cw, y0 - (c // g["width"] + 1) * ch,
                       x0 + (c % g["width"] + 1) * cw, y0 - (c // g["width"]) * ch)
                   for c in s["cells"]]
        truth = unary_union(squares)
        # reference: shapely (GEOS) is_valid
        if not geom.is_valid:
            why.append(shapely.is_valid_reason(geom))
        # reference: shapely union of the cells' squares, symmetric difference of zero area
        if geom.symmetric_difference(truth).area != 0.0:
            why.append(f"area differs: ours {geom.area} cells {truth.area}")
        # reference: RFC 7946 winding via shapely LinearRing.is_ccw
        for poly in getattr(geom, "geoms", [geom]):
            if not poly.exterior.is_ccw:
                why.append("exterior not counter-clockwise")
            if any(r.is_ccw for r in poly.interiors):
                why.append("hole not clockwise")
        results.append((f"outline {s['name']}", not why, "; ".join(why)))


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--keep", help="write fixtures into this folder and keep them")
    ap.add_argument("--cargo", default="cargo", help="cargo executable")
    ap.add_argument("--bin", help="unused alias kept for the documented call form")
    args = ap.parse_args()
    folder = args.keep or tempfile.mkdtemp(prefix="zonetally-geo-")
    os.makedirs(folder, exist_ok=True)
    n_poly = write_polygon_fixtures(folder)
    n_tiff = write_tiff_fixtures(folder)
    sets, g = write_cellset_fixtures(folder)
    print(f"fixtures in {folder}: {n_poly} rasterize cases, {n_tiff} GeoTIFFs, {len(sets)} cell sets")

    env = dict(os.environ, ZONETALLY_GEO_FIXTURES=folder)
    proc = subprocess.run([args.cargo, "test", "--test", "geo_reference", "--", "--nocapture"],
                          cwd=ROOT, env=env, capture_output=True, text=True)
    out = proc.stdout + proc.stderr
    results = []
    rust_lines = [l for l in out.splitlines() if l.startswith("geo reference (rust): ")]
    known = 0
    for line in out.splitlines():
        if line.startswith("geo reference (rust) known limitations:"):
            known = int(line.rsplit(":", 1)[1])
        if line.startswith("MISMATCH") or line.startswith("KNOWN"):
            print(line)
    m = None
    for line in rust_lines:
        print(line)
        m = re.search(r"(\d+) passed, (\d+) failed", line)
    if proc.returncode != 0 or m is None:
        print(out[-4000:])
        results.append(("rust side ran", False, f"exit {proc.returncode}"))
        rust_pass, rust_fail = 0, 0
    else:
        rust_pass, rust_fail = int(m.group(1)), int(m.group(2))
    if os.path.exists(os.path.join(folder, "ours", "manifest.json")):
        check_our_tiffs(folder, results)
        check_outlines(folder, sets, g, results)
    else:
        results.append(("rust side wrote its outputs", False, "no ours/manifest.json"))

    for name, ok, why in results:
        if not ok:
            print(f"FAILED {name}: {why}")
    passed = rust_pass + sum(1 for r in results if r[1])
    failed = rust_fail + sum(1 for r in results if not r[1])
    if known:
        print(f"known limitations (specific error, not wrong data): {known}")
    print(f"geo reference: {passed} passed, {failed} failed")
    sys.exit(1 if failed else 0)


if __name__ == "__main__":
    main()

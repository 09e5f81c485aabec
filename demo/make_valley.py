#!/usr/bin/env python3
"""Writes the demo files: an invented valley after a storm, as a zonetally request document
(demo/valley.json) and as the files an analyst would hold: a GeoTIFF of the raster
(demo/valley.tif) and GeoJSON polygons of the zones (demo/valley-zones.geojson).

Everything here is made up: the valley, its terrain, its hamlets and roads, and the count of
landslides. The raster is 120 columns x 80 rows of per-cell landslide probabilities (row 0 at
the top, north). A river runs from north to south down the middle; the valley floor is low-risk,
the steep sides high, the ridge tops moderate. A lake on the floor and the north-east corner
(outside the study area) are nodata. Zones are named after invented features of the valley.

The script is deterministic (a fixed seed, stdlib only), so running it again reproduces the
committed file byte for byte:

    python3 demo/make_valley.py            # writes the three files beside this script
    python3 demo/make_valley.py --check    # exits 1 if a committed file differs

The GeoTIFF and GeoJSON place the valley on invented coordinates in a projected CRS (EPSG:32631,
metres; no real place lies under them): 25 m cells, the top-left corner at (512000, 5204000).
The GeoTIFF is float32, one uncompressed strip, nodata -9999, written here with the standard
library only. The GeoJSON zones trace the same cells as valley.json's zones along cell edges,
except `lakeside-cabins`, drawn as a 32-sided ellipse around the lake: the lake's nodata cells
inside it are dropped by the service and counted in the zone's `nodata_cells`.
"""

import argparse
import json
import math
import os
import random
import struct
import sys

WIDTH, HEIGHT = 120, 80
SEED = 20261201
# The count of landslides the (invented) survey found over the study area after the storm.
OBSERVED_TOTAL = 371
INTERVAL = 0.9
EXCEEDANCE = [1, 5, 10, 20]


def river_col(row):
    """Column of the river's centre line in `row`: a gentle meander down the valley."""
    return 58.0 + 7.0 * math.sin(row / 13.0) + 3.0 * math.sin(row / 5.0 + 1.0)


def in_lake(row, col):
    """The lake on the valley floor, south of centre."""
    return ((row - 58.0) / 6.0) ** 2 + ((col - river_col(58) - 2.0) / 9.0) ** 2 <= 1.0


def outside_study_area(row, col):
    """The north-east corner lies beyond the area the raster was calibrated for."""
    return row + (WIDTH - 1 - col) < 22


def elevation(row, col, bumps):
    """Invented terrain height in metres: a V-shaped valley with a flat floor and rounded ridges."""
    d = abs(col - river_col(row))
    floor = 9.0
    if d <= floor:
        h = 0.6 * d
    else:
        # Steep sides that flatten towards the ridge tops near the raster's edges.
        x = d - floor
        h = 0.6 * floor + 520.0 * (1.0 - math.exp(-x / 22.0))
    for (br, bc, amp, rad) in bumps:
        h += amp * math.exp(-((row - br) ** 2 + (col - bc) ** 2) / (2.0 * rad * rad))
    return h


def probabilities(rng):
    """Per-cell landslide probabilities (None for nodata), row-major."""
    bumps = [
        (rng.uniform(0, HEIGHT), rng.uniform(0, WIDTH), rng.uniform(-40, 60), rng.uniform(3, 9))
        for _ in range(24)
    ]
    heights = [[elevation(r, c, bumps) for c in range(WIDTH)] for r in range(HEIGHT)]
    values = []
    for r in range(HEIGHT):
        for c in range(WIDTH):
            if in_lake(r, c) or outside_study_area(r, c):
                values.append(None)
                continue
            # Slope in metres per cell from central differences (one-sided at the edges).
            r0, r1 = max(r - 1, 0), min(r + 1, HEIGHT - 1)
            c0, c1 = max(c - 1, 0), min(c + 1, WIDTH - 1)
            dy = (heights[r1][c] - heights[r0][c]) / max(r1 - r0, 1)
            dx = (heights[r][c1] - heights[r][c0]) / max(c1 - c0, 1)
            slope = math.hypot(dx, dy)
            # Logistic in slope with some cell-to-cell variation (soil, drainage, vegetation).
            logit = -6.4 + 0.2 * slope + rng.gauss(0.0, 0.45)
            p = 1.0 / (1.0 + math.exp(-logit))
            values.append(round(min(max(p, 0.0005), 0.6), 4))
    return values


def cells_where(values, pred):
    """Valid cells (row-major indices) whose (row, col) satisfies `pred`."""
    return [
        r * WIDTH + c
        for r in range(HEIGHT)
        for c in range(WIDTH)
        if values[r * WIDTH + c] is not None and pred(r, c)
    ]


def zones(values):
    """The valley's zones, disjoint, none touching a nodata cell. Rectangles where the feature is
    square, cell lists where it follows the river or the slope."""
    rc = river_col
    out = [
        # West side, from north to south.
        {"id": "upper-terraces", "rect": {"row": 4, "col": 8, "rows": 14, "cols": 20}},
        {"id": "west-forest", "rect": {"row": 24, "col": 4, "rows": 18, "cols": 16}},
        {"id": "quarry-slope", "cells": cells_where(values, lambda r, c: 44 <= r < 56 and rc(r) - 30 <= c < rc(r) - 14)},
        {"id": "orchard-bench", "rect": {"row": 62, "col": 10, "rows": 12, "cols": 18}},
        # The valley floor, from north to south.
        {"id": "mill-hamlet", "cells": cells_where(values, lambda r, c: 6 <= r < 16 and rc(r) - 8 <= c < rc(r) - 1)},
        {"id": "north-road", "cells": cells_where(values, lambda r, c: 0 <= r < 30 and rc(r) + 3 <= c < rc(r) + 6)},
        {"id": "school-lane", "cells": cells_where(values, lambda r, c: 20 <= r < 28 and rc(r) - 8 <= c < rc(r) - 1)},
        {"id": "footbridge-crossing", "cells": cells_where(values, lambda r, c: 34 <= r < 40 and rc(r) - 6 <= c < rc(r) + 6)},
        {"id": "river-flats", "cells": cells_where(values, lambda r, c: 40 <= r < 50 and rc(r) - 7 <= c < rc(r) + 7)},
        {"id": "lakeside-cabins", "cells": cells_where(
            values, lambda r, c: 50 <= r < 67 and not in_lake(r, c) and abs(c - rc(58) - 2) <= 14 and (
                ((r - 58.0) / 8.0) ** 2 + ((c - rc(58) - 2.0) / 12.0) ** 2 <= 1.0))},
        {"id": "south-bridge", "cells": cells_where(values, lambda r, c: 70 <= r < 78 and rc(r) - 5 <= c < rc(r) + 5)},
        # East side, from north to south.
        {"id": "chapel-spur", "cells": cells_where(values, lambda r, c: 12 <= r < 24 and rc(r) + 14 <= c < rc(r) + 28)},
        {"id": "east-ridge-pasture", "rect": {"row": 30, "col": 100, "rows": 16, "cols": 16}},
        {"id": "high-meadow", "cells": cells_where(values, lambda r, c: 50 <= r < 62 and rc(r) + 24 <= c < rc(r) + 40)},
        {"id": "sawpit-gully", "cells": cells_where(values, lambda r, c: 66 <= r < 78 and rc(r) + 12 <= c < rc(r) + 24)},
    ]
    return out


def rect_cells(rect):
    return [
        (rect["row"] + i) * WIDTH + rect["col"] + j
        for i in range(rect["rows"])
        for j in range(rect["cols"])
    ]


def check_zones(values, zs):
    """Refuses to write a scenario the service would reject: empty, overlapping or nodata zones."""
    seen = {}
    for z in zs:
        cells = z["cells"] if "cells" in z else rect_cells(z["rect"])
        if not cells:
            raise SystemExit(f"zone `{z['id']}` is empty: widen its shape")
        for cell in cells:
            if values[cell] is None:
                raise SystemExit(f"zone `{z['id']}` covers nodata cell {cell}: move it")
            if cell in seen:
                raise SystemExit(f"zones `{seen[cell]}` and `{z['id']}` share cell {cell}: keep them apart")
            seen[cell] = z["id"]


def build():
    rng = random.Random(SEED)
    values = probabilities(rng)
    zs = zones(values)
    check_zones(values, zs)
    return {
        "raster": {"width": WIDTH, "height": HEIGHT, "values": values},
        "zones": zs,
        "evidence": {"total": OBSERVED_TOTAL},
        "summaries": {"interval": INTERVAL, "exceedance": EXCEEDANCE},
    }


def encode(doc):
    """Compact JSON with one line per part, so diffs of the committed file stay readable."""
    lines = ["{"]
    lines.append('"raster": ' + json.dumps(doc["raster"], separators=(",", ":")) + ",")
    lines.append('"zones": [')
    lines.append(",\n".join(json.dumps(z, separators=(",", ":")) for z in doc["zones"]))
    lines.append("],")
    lines.append('"evidence": ' + json.dumps(doc["evidence"], separators=(",", ":")) + ",")
    lines.append('"summaries": ' + json.dumps(doc["summaries"], separators=(",", ":")))
    lines.append("}")
    return "\n".join(lines) + "\n"


# Where the invented valley lies: EPSG code, top-left corner and cell size in metres.
EPSG = 32631
ORIGIN_X, ORIGIN_Y = 512000.0, 5204000.0
CELL = 25.0
NODATA = -9999.0


def geotiff(values):
    """A little-endian float32 GeoTIFF, one strip, with pixel scale, tiepoint, GeoKeys and the
    GDAL nodata tag (TIFF 6.0 and GeoTIFF 1.1; tags in ascending order)."""
    pixels = b"".join(struct.pack("<f", NODATA if v is None else v) for v in values)
    nodata_text = b"-9999\0"
    geokeys = [1, 1, 0, 3, 1024, 0, 1, 1, 1025, 0, 1, 1, 3072, 0, 1, EPSG]
    extra = [
        ("scale", struct.pack("<3d", CELL, CELL, 0.0)),
        ("tie", struct.pack("<6d", 0.0, 0.0, 0.0, ORIGIN_X, ORIGIN_Y, 0.0)),
        ("keys", struct.pack(f"<{len(geokeys)}H", *geokeys)),
        ("nodata", nodata_text),
    ]
    entries = 14
    ifd_at = 8
    data_at = ifd_at + 2 + entries * 12 + 4
    offsets = {}
    blob = b""
    for name, data in extra:
        offsets[name] = data_at + len(blob)
        blob += data + (b"\0" if len(data) % 2 else b"")
    strip_at = data_at + len(blob)
    SHORT, LONG, DOUBLE, ASCII = 3, 4, 12, 2

    def entry(tag, kind, count, value):
        if kind == SHORT and count == 1:
            return struct.pack("<HHIHH", tag, kind, count, value, 0)
        return struct.pack("<HHII", tag, kind, count, value)

    ifd = [
        entry(256, SHORT, 1, WIDTH),
        entry(257, SHORT, 1, HEIGHT),
        entry(258, SHORT, 1, 32),
        entry(259, SHORT, 1, 1),
        entry(262, SHORT, 1, 1),
        entry(273, LONG, 1, strip_at),
        entry(277, SHORT, 1, 1),
        entry(278, SHORT, 1, HEIGHT),
        entry(279, LONG, 1, len(pixels)),
        entry(339, SHORT, 1, 3),
        entry(33550, DOUBLE, 3, offsets["scale"]),
        entry(33922, DOUBLE, 6, offsets["tie"]),
        entry(34735, SHORT, len(geokeys), offsets["keys"]),
        entry(42113, ASCII, len(nodata_text), offsets["nodata"]),
    ]
    assert len(ifd) == entries
    head = b"II" + struct.pack("<HI", 42, ifd_at)
    return head + struct.pack("<H", entries) + b"".join(ifd) + struct.pack("<I", 0) + blob + pixels


def world(col, row):
    return [ORIGIN_X + col * CELL, ORIGIN_Y - row * CELL]


def band_ring(rows, left, right):
    """The outline along cell edges of the cells `left(r) <= c < right(r)` for r in `rows`,
    counter-clockwise in map coordinates (RFC 7946)."""
    rows = list(rows)
    down = []
    for r in rows:
        down += [world(left(r), r), world(left(r), r + 1)]
    up = []
    for r in reversed(rows):
        up += [world(right(r), r + 1), world(right(r), r)]
    ring = down + up
    ring.append(ring[0])
    # Drop repeated points (neighbouring rows with the same edge column).
    out = [ring[0]]
    for p in ring[1:]:
        if p != out[-1]:
            out.append(p)
    return out


def geo_zones(values):
    """valley.json's zones as polygons on the map: the same cells, traced along cell edges."""
    features = []
    for z in zones(values):
        zid = z["id"]
        if "rect" in z:
            r = z["rect"]
            ring = [world(r["col"], r["row"] + r["rows"]), world(r["col"] + r["cols"], r["row"] + r["rows"]),
                    world(r["col"] + r["cols"], r["row"]), world(r["col"], r["row"])]
            ring.append(ring[0])
        elif zid == "lakeside-cabins":
            cr, cc = 58.5, river_col(58) + 2.5
            ring = [world(cc + 12.0 * math.cos(2 * math.pi * i / 32), cr - 8.0 * math.sin(2 * math.pi * i / 32))
                    for i in range(32)]
            ring = [[round(x, 3), round(y, 3)] for x, y in ring]
            ring.append(ring[0])
        else:
            ring = band_ring(*BANDS[zid])
        features.append({"type": "Feature", "id": zid, "properties": {"name": zid}, "geometry": {"type": "Polygon", "coordinates": [ring]}})
    return {"type": "FeatureCollection", "features": features}


def _band(r0, r1, a, b):
    """Rows r0..r1, columns from int(rc(r)) + a (ceil of the float bound) to before rc(r) + b,
    as valley.json's `cells_where` selects them."""
    def lo(r):
        return math.ceil(river_col(r) + a)

    def hi(r):
        return math.ceil(river_col(r) + b)
    return (range(r0, r1), lo, hi)


BANDS = {
    "quarry-slope": _band(44, 56, -30, -14),
    "mill-hamlet": _band(6, 16, -8, -1),
    "north-road": _band(0, 30, 3, 6),
    "school-lane": _band(20, 28, -8, -1),
    "footbridge-crossing": _band(34, 40, -6, 6),
    "river-flats": _band(40, 50, -7, 7),
    "south-bridge": _band(70, 78, -5, 5),
    "chapel-spur": _band(12, 24, 14, 28),
    "high-meadow": _band(50, 62, 24, 40),
    "sawpit-gully": _band(66, 78, 12, 24),
}


def encode_geojson(doc):
    """One feature per line, so diffs stay readable."""
    lines = ['{"type":"FeatureCollection","features":[']
    lines.append(",\n".join(json.dumps(f, separators=(",", ":")) for f in doc["features"]))
    lines.append("]}")
    return "\n".join(lines) + "\n"


def main():
    here = os.path.dirname(os.path.abspath(__file__))
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--out", default=os.path.join(here, "valley.json"))
    ap.add_argument("--tif", default=os.path.join(here, "valley.tif"))
    ap.add_argument("--geojson", default=os.path.join(here, "valley-zones.geojson"))
    ap.add_argument("--check", action="store_true", help="compare with the files instead of writing them")
    args = ap.parse_args()
    doc = build()
    text = encode(doc)
    files = [
        (args.out, text.encode("utf-8")),
        (args.tif, geotiff(doc["raster"]["values"])),
        (args.geojson, encode_geojson(geo_zones(doc["raster"]["values"])).encode("utf-8")),
    ]
    if args.check:
        stale = []
        for path, data in files:
            try:
                with open(path, "rb") as f:
                    if f.read() != data:
                        stale.append(path)
            except OSError:
                stale.append(path)
        for path in stale:
            print(f"{os.path.basename(path)} differs from make_valley.py's output")
        if not stale:
            print("valley.json, valley.tif and valley-zones.geojson are up to date")
        return 1 if stale else 0
    for path, data in files[1:]:
        with open(path, "wb") as f:
            f.write(data)
    with open(args.out, "w", encoding="utf-8") as f:
        f.write(text)
    valid = [v for v in build()["raster"]["values"] if v is not None]
    print(
        f"wrote {args.out}: {len(text)} bytes, {WIDTH}x{HEIGHT} cells, {len(valid)} valid, "
        f"prior mean {sum(valid):.1f}, observed {OBSERVED_TOTAL}",
        file=sys.stderr,
    )
    return 0


if __name__ == "__main__":
    sys.exit(main())

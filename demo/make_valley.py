#!/usr/bin/env python3
"""Writes demo/valley.json: an invented valley after a storm, as a zonetally request document.

Everything here is made up: the valley, its terrain, its hamlets and roads, and the count of
landslides. The raster is 120 columns x 80 rows of per-cell landslide probabilities (row 0 at
the top, north). A river runs from north to south down the middle; the valley floor is low-risk,
the steep sides high, the ridge tops moderate. A lake on the floor and the north-east corner
(outside the study area) are nodata. Zones are named after invented features of the valley.

The script is deterministic (a fixed seed, stdlib only), so running it again reproduces the
committed file byte for byte:

    python3 demo/make_valley.py            # writes demo/valley.json beside this script
    python3 demo/make_valley.py --check    # exits 1 if the committed file differs
"""

import argparse
import json
import math
import os
import random
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


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--out", default=os.path.join(os.path.dirname(os.path.abspath(__file__)), "valley.json"))
    ap.add_argument("--check", action="store_true", help="compare with --out instead of writing it")
    args = ap.parse_args()
    text = encode(build())
    if args.check:
        with open(args.out, encoding="utf-8") as f:
            same = f.read() == text
        print("valley.json is up to date" if same else "valley.json differs from make_valley.py's output")
        return 0 if same else 1
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

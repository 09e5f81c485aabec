#!/usr/bin/env python3
"""The rasterio baseline of `zonetally bench`'s GIS rows: times GDAL (through rasterio) on the
files the benchmark wrote, and prints one JSON object with the best of `--repeat` wall times.

    python3 src/bench/rasterio_times.py read RASTER.tif [--repeat 3]
    python3 src/bench/rasterio_times.py rasterize POLYGONS.json [--repeat 3]

`read` opens the GeoTIFF and reads band 1 into a numpy array. `rasterize` burns every polygon of
the JSON file ({"width", "height", "gdal": six geotransform terms, "polygons": [rings...]}) into
one array with `rasterio.features.rasterize`, cell-centre rule (all_touched=False), each polygon
its own value. Exit status 3 when rasterio is not installed, so the benchmark can say so.
"""

import argparse
import json
import sys
import time

try:
    import rasterio
    from affine import Affine
    from rasterio.features import rasterize
except ImportError:
    print(json.dumps({"error": "rasterio is not installed (pip install rasterio)"}))
    sys.exit(3)


def best(repeat, run):
    times = []
    for _ in range(repeat):
        t0 = time.perf_counter()
        run()
        times.append(time.perf_counter() - t0)
    return min(times)


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("task", choices=["read", "rasterize"])
    ap.add_argument("path")
    ap.add_argument("--repeat", type=int, default=3)
    args = ap.parse_args()
    if args.task == "read":
        def run():
            with rasterio.open(args.path) as src:
                src.read(1)
        seconds = best(args.repeat, run)
    else:
        with open(args.path, encoding="utf-8") as f:
            doc = json.load(f)
        transform = Affine.from_gdal(*doc["gdal"])
        shapes = [({"type": "Polygon", "coordinates": rings}, i + 1) for i, rings in enumerate(doc["polygons"])]

        def run():
            rasterize(shapes, out_shape=(doc["height"], doc["width"]), transform=transform,
                      all_touched=False, fill=0, dtype="uint32")
        seconds = best(args.repeat, run)
    print(json.dumps({"seconds": seconds, "rasterio": rasterio.__version__, "gdal": rasterio.__gdal_version__}))


if __name__ == "__main__":
    main()

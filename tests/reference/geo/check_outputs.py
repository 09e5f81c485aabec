#!/usr/bin/env python3
"""Outside reference for zonetally's GIS outputs: shapely, Python's csv module and rasterio judge
what a running service and `zonetally eval` send back for the invented demo valley.

Starts `zonetally serve` on a free loopback port, posts demo/valley.tif to /rasters, then asks
zone-counts for JSON, GeoJSON and CSV (with demo/valley-zones.geojson as zones) and
cell-posterior for a GeoTIFF, and checks:
  - every GeoJSON geometry loads with shapely.geometry.shape and is_valid; each feature's
    properties equal the JSON results;
  - the CSV loads with the csv module, one row per zone, numbers equal to the JSON results;
  - the GeoTIFF opens with rasterio: same size, transform, CRS and nodata as the input, band 1
    the JSON posterior and band 2 the prior of every cell;
  - strata chosen by demo polygons hold the valid cells rasterio.features.rasterize burns;
  - `zonetally eval --raster ... --zones ... --format geojson` gives the service's GeoJSON;
  - malformed files (a truncated GeoTIFF, one declaring 10^12 pixels, a GeoJSON ring of 10^7
    positions) each get a specific 4xx, and the server still serves.

    pip install rasterio shapely
    python3 tests/reference/geo/check_outputs.py --bin target/release/zonetally

Prints `geo outputs: N passed, M failed` and exits non-zero on any failure.
"""

import argparse
import csv
import io
import json
import math
import os
import socket
import struct
import subprocess
import sys
import tempfile
import time
import urllib.error
import urllib.request

import numpy as np
import rasterio
from rasterio.features import rasterize
from shapely.geometry import shape

ROOT = os.path.dirname(os.path.dirname(os.path.dirname(os.path.dirname(os.path.abspath(__file__)))))
TIF = os.path.join(ROOT, "demo", "valley.tif")
ZONES = os.path.join(ROOT, "demo", "valley-zones.geojson")
TOTAL = 371


class Tally:
    def __init__(self):
        self.passed = 0
        self.failed = 0

    def check(self, ok, what):
        if ok:
            self.passed += 1
        else:
            self.failed += 1
            print(f"MISMATCH {what}")


def free_port():
    s = socket.socket()
    s.bind(("127.0.0.1", 0))
    port = s.getsockname()[1]
    s.close()
    return port


def call(url, body=None, content_type="application/json", accept=None):
    req = urllib.request.Request(url, data=body, method="POST" if body is not None else "GET")
    if body is not None:
        req.add_header("Content-Type", content_type)
    if accept:
        req.add_header("Accept", accept)
    with urllib.request.urlopen(req, timeout=120) as resp:
        return resp.headers.get("Content-Type"), resp.read()


def status_of(url, body, content_type):
    """The HTTP status and problem document of a request expected to fail."""
    try:
        call(url, body, content_type)
        return 200, {}
    except urllib.error.HTTPError as e:
        return e.code, json.loads(e.read() or b"{}")


def claiming_tiff(width, height):
    """A little-endian TIFF header declaring width x height float32 pixels and holding none."""
    entries = [(256, 4, 1, width), (257, 4, 1, height), (258, 3, 1, 32), (259, 3, 1, 1), (262, 3, 1, 1),
               (273, 4, 1, 200), (277, 3, 1, 1), (279, 4, 1, 4), (339, 3, 1, 3)]
    out = b"II*\0" + struct.pack("<I", 8) + struct.pack("<H", len(entries))
    for tag, kind, count, value in entries:
        out += struct.pack("<HHII", tag, kind, count, value)
    return (out + struct.pack("<I", 0)).ljust(204, b"\0")


def malformed(base, tif_bytes, t):
    """Malformed files over a real socket: each a specific 4xx, and the server keeps serving."""
    code, p = status_of(base + "/rasters", tif_bytes[: len(tif_bytes) // 2], "image/tiff")
    t.check(400 <= code < 500 and p.get("type", "").startswith("/problems/"), f"truncated GeoTIFF: {code} {p}")
    code, p = status_of(base + "/rasters", claiming_tiff(1_000_000, 1_000_000), "image/tiff")
    t.check(code == 413 and "cells" in p.get("detail", ""), f"10^12-pixel GeoTIFF: {code} {p}")
    # A ring of 10^7 positions, written compactly so the body stays under the body limit.
    ring = "[" + ",".join(["[0,0]", "[1,0]", "[1,1]"] * 3_333_333) + ",[0,0]]"
    zones = '{"type":"Feature","id":"huge","properties":{},"geometry":{"type":"Polygon","coordinates":[' + ring + "]}}"
    body = ('{"inputs":{"raster":{"width":2,"height":2,"values":[0.5,0.5,0.5,0.5],"geotransform":[0,1,0,2,0,-1]},'
            '"zones":' + zones + ',"evidence":{"total":1}}}').encode()
    code, p = status_of(base + "/processes/zone-counts/execution", body, "application/json")
    t.check(code == 413 and "vert" in p.get("detail", "") + p.get("title", ""),
            f"10^7-vertex ring ({len(body) >> 20} MiB): {code} {p}")
    _, health = call(base + "/healthz")
    t.check(bool(health), "the server still serves /healthz")


def strata_by_geometry(execute, ref, zones, t):
    """Strata chosen by the demo zones' polygons hold the valid cells rasterio burns for them."""
    with rasterio.open(TIF) as src:
        valid = src.read(1) != src.nodata
        shape_hw, transform = (src.height, src.width), src.transform
    taken = np.zeros(shape_hw, dtype=bool)
    strata = []
    for feature in zones["features"]:
        if feature["geometry"]["type"] not in ("Polygon", "MultiPolygon"):
            continue
        # reference: rasterio.features.rasterize with its default rule (a cell is burned when
        # its centre lies inside), keeping only cells no earlier stratum took, so strata are
        # disjoint as the service requires
        burned = rasterize([(feature["geometry"], 1)], out_shape=shape_hw, transform=transform,
                           fill=0, all_touched=False, dtype="uint8").astype(bool)
        inside = burned & valid
        if not inside.any() or (inside & taken).any():
            continue
        taken |= inside
        strata.append((f"s-{feature['id']}", feature["geometry"], int(np.count_nonzero(inside))))
        if len(strata) == 3:
            break
    t.check(len(strata) >= 2, f"{len(strata)} disjoint demo polygons to use as strata")
    evidence = {"strata": [{"id": sid, "geometry": g, "total": {"min": 0, "max": 1}} for sid, g, _ in strata]}
    body = {"inputs": {"raster": {"ref": ref}, "zones": zones, "evidence": evidence}}
    _, raw = call(execute, json.dumps(body).encode())
    got = {s["id"]: s["cells"] for s in json.loads(raw)["total"]["strata"]}
    for sid, _, want in strata:
        t.check(got.get(sid) == want, f"stratum {sid}: {got.get(sid)} cells, rasterio burns {want} valid cells")


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--bin", default=os.path.join(ROOT, "target", "release", "zonetally"))
    args = ap.parse_args()
    t = Tally()
    port = free_port()
    base = f"http://127.0.0.1:{port}"
    log = tempfile.TemporaryFile()
    server = subprocess.Popen([args.bin, "serve", "--bind", f"127.0.0.1:{port}"], stdout=log, stderr=log)
    try:
        for _ in range(200):
            try:
                call(base + "/healthz")
                break
            except OSError:
                time.sleep(0.05)
        with open(TIF, "rb") as f:
            tif_bytes = f.read()
        malformed(base, tif_bytes, t)
        _, posted = call(base + "/rasters", tif_bytes, "image/tiff; application=geotiff")
        info = json.loads(posted)
        with rasterio.open(TIF) as src:
            t.check(info["crs"] == src.crs.to_epsg(), f"crs {info['crs']} vs {src.crs}")
            t.check(tuple(info["geotransform"]) == tuple(src.transform.to_gdal()), "geotransform")
            t.check(info["valid_cells"] == int(np.count_nonzero(src.read(1) != src.nodata)), "valid cells")
        with open(ZONES, encoding="utf-8") as f:
            zones = json.load(f)
        inputs = {"raster": {"ref": info["ref"]}, "zones": zones, "evidence": {"total": TOTAL},
                  "summaries": {"exceedance": [1, 5, 10]}}
        execute = base + "/processes/zone-counts/execution"
        body = json.dumps({"inputs": inputs}).encode()
        _, raw = call(execute, body)
        doc = json.loads(raw)
        results = {z["id"]: z for z in doc["zones"]}

        kind, geo = call(execute, body, accept="application/geo+json")
        t.check(kind == "application/geo+json", f"GeoJSON content type {kind}")
        fc = json.loads(geo)
        t.check(len(fc["features"]) == len(doc["zones"]), "one feature per zone")
        for feature in fc["features"]:
            g = shape(feature["geometry"])
            t.check(g.is_valid and not g.is_empty, f"{feature['id']}: geometry valid (shapely)")
            z = results[feature["id"]]
            p = feature["properties"]
            same = (p["mean"] == z["mean"] and p["sd"] == z["sd"] and p["cells"] == z["cells"]
                    and p["interval_lower"] == z["interval"]["lower"]
                    and all(p[f"p_at_least_{e['k']}"] == e["p"] for e in z["exceedance"]))
            t.check(same, f"{feature['id']}: properties equal the JSON results")
        t.check("NaN" not in geo.decode() and "Infinity" not in geo.decode(), "no NaN or Infinity")

        csv_body = json.dumps({"inputs": inputs, "outputs": {"counts": {"format": {"mediaType": "text/csv"}}}}).encode()
        kind, table = call(execute, csv_body)
        t.check(kind.startswith("text/csv"), f"CSV content type {kind}")
        rows = list(csv.DictReader(io.StringIO(table.decode("utf-8"))))
        t.check(len(rows) == len(doc["zones"]), "one CSV row per zone")
        for row in rows:
            z = results[row["id"]]
            same = (float(row["mean"]) == z["mean"] and float(row["prior_mean"]) == z["prior"]["mean"]
                    and int(row["nodata_cells"]) == z["nodata_cells"]
                    and float(row["error_bound"]) == z["error_bound"])
            t.check(same, f"{row['id']}: CSV row equals the JSON results")

        posterior = base + "/processes/cell-posterior/execution"
        pbody = json.dumps({"inputs": {"raster": {"ref": info["ref"]}, "evidence": {"total": TOTAL}}}).encode()
        _, praw = call(posterior, pbody)
        cells = json.loads(praw)["cells"]
        kind, out_tif = call(posterior, pbody, accept="image/tiff; application=geotiff")
        t.check(kind == "image/tiff; application=geotiff", f"GeoTIFF content type {kind}")
        with tempfile.NamedTemporaryFile(suffix=".tif") as f:
            f.write(out_tif)
            f.flush()
            with rasterio.open(f.name) as out, rasterio.open(TIF) as src:
                t.check(out.count == 2 and out.dtypes[0] == "float64", f"bands {out.count} {out.dtypes}")
                t.check(out.width == src.width and out.height == src.height, "size")
                t.check(out.transform == src.transform, f"transform {out.transform}")
                t.check(out.crs == src.crs, f"crs {out.crs}")
                t.check(out.nodata == src.nodata, f"nodata {out.nodata}")
                post, prior = out.read(1).ravel(), out.read(2).ravel()
                bad = [c for c in cells if post[c["cell"]] != c["posterior"] or prior[c["cell"]] != c["prior"]]
                t.check(not bad, f"{len(bad)} cells differ from the JSON posterior")
                valid = src.read(1).ravel() != src.nodata
                t.check(bool(np.all(post[~valid] == src.nodata)), "nodata cells stay nodata")

        strata_by_geometry(execute, info["ref"], zones, t)

        run = subprocess.run([args.bin, "eval", "--raster", TIF, "--zones", ZONES, "--total", str(TOTAL),
                              "--exceedance", "1,5,10", "--format", "geojson"], capture_output=True, check=False)
        t.check(run.returncode == 0, f"eval exit {run.returncode}: {run.stderr.decode()[:200]}")
        if run.returncode == 0:
            cli = json.loads(run.stdout)
            t.check(cli["features"] == fc["features"], "eval --format geojson equals the service's GeoJSON")
    finally:
        server.terminate()
        server.wait(timeout=10)
    print(f"geo outputs: {t.passed} passed, {t.failed} failed")
    return 1 if t.failed else 0


if __name__ == "__main__":
    sys.exit(main())

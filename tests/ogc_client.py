"""A real OGC API - Processes client (OWSLib) against a running `zonetally serve`.

Lists the processes, describes zone-counts, executes it sync and async, and checks the numbers
against `zonetally eval` on the same document (and the tea example against its closed form).

    pip install owslib
    cargo build --release
    PORT=$(python3 -c 'import socket; s=socket.socket(); s.bind(("127.0.0.1", 0)); print(s.getsockname()[1])')
    ZONETALLY_BIND=127.0.0.1:$PORT target/release/zonetally serve & PID=$!
    python3 tests/ogc_client.py http://127.0.0.1:$PORT target/release/zonetally; STATUS=$?
    kill -TERM $PID; wait $PID; exit $STATUS

OWSLib's habits exercised here: it keeps `Prefer` in its shared headers, so later GETs carry
it; it sends `Prefer: respond-sync` for sync; it sends no JSON Accept header.
"""

import json
import math
import subprocess
import sys
import tempfile
import time
import urllib.request

from owslib.ogcapi.processes import Processes


def wait_ready(base, seconds=15.0):
    end = time.time() + seconds
    while True:
        try:
            with urllib.request.urlopen(base + "/healthz", timeout=1) as r:
                if r.status == 200:
                    return
        except OSError:
            if time.time() > end:
                raise SystemExit(f"no service at {base}")
            time.sleep(0.1)


def request_document():
    w, h = 12, 10
    values = [round(0.05 + 0.55 * (((i * 7919) % 101) / 100.0), 6) for i in range(w * h)]
    values[118] = None  # nodata outside every zone
    return {
        "raster": {"width": w, "height": h, "values": values},
        "zones": [
            {"id": "west-slope", "rect": {"row": 0, "col": 0, "rows": 10, "cols": 4}},
            {"id": "stream-bank", "cells": [5, 17, 29, 41, 53, 65]},
            {"id": "ridge", "rect": {"row": 0, "col": 8, "rows": 3, "cols": 4}},
        ],
        "evidence": {"total": 30},
        "summaries": {"exceedance": [5, 10], "interval": 0.8},
    }


def tea_document():
    return {
        "raster": {"width": 4, "height": 2, "values": [0.5] * 8},
        "zones": [{"id": "cups", "rect": {"row": 0, "col": 0, "rows": 1, "cols": 4}}],
        "evidence": {"total": 4},
    }


def eval_document(binary, doc):
    with tempfile.NamedTemporaryFile("w", suffix=".json", delete=False) as f:
        json.dump(doc, f)
        path = f.name
    out = subprocess.run([binary, "eval", path], capture_output=True, text=True)
    if out.returncode != 0:
        raise SystemExit(f"zonetally eval failed: {out.stderr}")
    return json.loads(out.stdout)


failures = []


def close(a, b, where):
    """Numbers agree to 1e-12 relative (both come from one engine; only summation order may differ)."""
    if isinstance(a, dict):
        if set(a) != set(b):
            failures.append(f"{where}: keys {sorted(a)} vs {sorted(b)}")
            return
        for k in a:
            close(a[k], b[k], f"{where}/{k}")
    elif isinstance(a, list):
        if len(a) != len(b):
            failures.append(f"{where}: lengths {len(a)} vs {len(b)}")
            return
        for i, (x, y) in enumerate(zip(a, b)):
            close(x, y, f"{where}/{i}")
    elif isinstance(a, float) or isinstance(b, float):
        if not math.isclose(a, b, rel_tol=1e-12, abs_tol=1e-15):
            failures.append(f"{where}: {a!r} vs {b!r}")
    elif a != b:
        failures.append(f"{where}: {a!r} vs {b!r}")


def main():
    base, binary = sys.argv[1].rstrip("/"), sys.argv[2]
    wait_ready(base)
    api = Processes(base)

    ids = [p["id"] for p in api.processes()]
    assert "zone-counts" in ids and "cell-posterior" in ids, ids

    desc = api.process("zone-counts")
    assert desc["id"] == "zone-counts"
    assert {"raster", "zones", "evidence", "summaries"} <= set(desc["inputs"]), desc["inputs"].keys()
    assert "counts" in desc["outputs"]
    assert "async-execute" in desc["jobControlOptions"]

    doc = request_document()
    expected = eval_document(binary, doc)

    sync = api.execute("zone-counts", inputs=doc)  # OWSLib asks for response=document
    close(sync["counts"], expected, "sync")

    raw = api.execute("zone-counts", inputs=doc, response="raw")
    close(raw, expected, "sync raw")

    status = api.execute("zone-counts", inputs=doc, async_=True)
    job = status["jobID"]
    assert status["status"] in ("accepted", "running", "successful"), status
    for _ in range(1000):
        # OWSLib still sends `Prefer: respond-async` here: a GET must ignore it.
        status = api._request(path=f"jobs/{job}")
        if status["status"] in ("successful", "failed", "dismissed"):
            break
        time.sleep(0.02)
    assert status["status"] == "successful", status
    results = api._request(path=f"jobs/{job}/results")
    close(results["counts"], expected, "async")

    # reference: closed form, hypergeometric C(4,k) C(4,4-k) / C(8,4) for 8 cells at p = 1/2
    tea = api.execute("zone-counts", inputs=tea_document(), response="raw")
    pmf = tea["zones"][0]["pmf"]["values"]
    for k, p in enumerate(pmf):
        want = math.comb(4, k) * math.comb(4, 4 - k) / math.comb(8, 4)
        if abs(p - want) > 1e-14:
            failures.append(f"tea pmf[{k}]: {p} vs {want}")

    if failures:
        print("\n".join(failures))
        print(f"0 passed, {len(failures)} failed")
        sys.exit(1)
    print("ogc_client: processes listed, zone-counts described, sync/raw/async executions agree with zonetally eval")
    print("1 passed, 0 failed")


if __name__ == "__main__":
    main()

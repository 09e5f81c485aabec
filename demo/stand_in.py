#!/usr/bin/env python3
"""A stand-in for the service's two demo routes, for trying the demo page without the service.

It is not the service. It binds to 127.0.0.1 only and answers:

    GET  /demo                               demo/page/index.html
    GET  /demo/NAME                          demo/NAME (valley.json, or any file beside it)
    POST /processes/zone-counts/execution    runs `zonetally eval` on the body's `inputs` and returns
                                             the results document, or a problem document (status 400)
                                             carrying eval's message when eval rejects the inputs;
                                             with `Prefer: respond-async`, 201 and a job to poll
    GET  /jobs/ID, GET /jobs/ID/results      the job's status and, once it is done, its results

With --sync-cells N, a synchronous request whose raster has more than N cells gets 413, the way
the service refuses synchronous work above its budget, so the page's asynchronous path can be tried.

    python3 demo/stand_in.py [--port 8000] [--zonetally PATH] [--sync-cells N]

The binary is --zonetally, else $ZONETALLY, else `zonetally` on PATH, else target/release/zonetally.
"""

import argparse
import json
import os
import shutil
import subprocess
import sys
import tempfile
import threading
import uuid
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer

DEMO = os.path.dirname(os.path.abspath(__file__))
ROOT = os.path.dirname(DEMO)


def find_zonetally(explicit=None):
    for cand in (explicit, os.environ.get("ZONETALLY"), shutil.which("zonetally"),
                 os.path.join(ROOT, "target", "release", "zonetally")):
        if cand and os.path.isfile(cand) and os.access(cand, os.X_OK):
            return cand
    raise SystemExit("no zonetally binary: build it with `cargo build --release` or pass --zonetally PATH")


def problem(status, title, detail):
    return status, {"type": "about:blank", "title": title, "status": status, "detail": detail}


def execute(zonetally, body):
    """Runs eval on the execute body's inputs; returns (status, JSON document)."""
    try:
        doc = json.loads(body)
    except ValueError as e:
        return problem(400, "malformed JSON", f"the body is not JSON: {e}")
    if not isinstance(doc, dict) or not isinstance(doc.get("inputs"), dict):
        return problem(400, "invalid execute request", "the body must be an object with `inputs`: the request document")
    with tempfile.NamedTemporaryFile("w", suffix=".json", delete=False) as f:
        json.dump(doc["inputs"], f)
        path = f.name
    try:
        run = subprocess.run([zonetally, "eval", path], capture_output=True, text=True, timeout=300)
    finally:
        os.unlink(path)
    if run.returncode != 0:
        detail = run.stderr.strip().removeprefix("zonetally: ").replace(path, "inputs")
        return problem(400, "invalid inputs", detail)
    return 200, json.loads(run.stdout)


def raster_cells(body):
    try:
        r = json.loads(body)["inputs"]["raster"]
        return int(r["width"]) * int(r["height"])
    except (ValueError, KeyError, TypeError):
        return 0


def make_handler(zonetally, page_dir=os.path.join(DEMO, "page"), data_dir=DEMO, sync_cells=None):
    jobs = {}
    lock = threading.Lock()
    # A status poll is held until its job ends or this many seconds pass. Headless browsers under a
    # virtual clock (the rendered tests) pause that clock only while a fetch is pending: answered at
    # once, their polls would spend the whole time budget while the job still runs in real time.
    hold_seconds = 30

    def run_job(job_id, body):
        status, doc = execute(zonetally, body)
        with lock:
            job = jobs[job_id]
            job["status"] = "successful" if status == 200 else "failed"
            job["message"] = "done" if status == 200 else doc.get("detail", "")
            job["result"] = (status, doc)
        job["ended"].set()

    def status_info(job_id):
        job = jobs[job_id]
        return {"jobID": job_id, "processID": "zone-counts", "type": "process", "status": job["status"],
                "message": job["message"], "progress": 100 if job["status"] != "running" else 0,
                "links": [{"href": f"/jobs/{job_id}/results", "rel": "results"}]}

    class Handler(BaseHTTPRequestHandler):
        posted = []  # bodies received, for tests
        headers_seen = []  # (path, Prefer header) of every POST, for tests

        def log_message(self, fmt, *args):  # keep test output quiet
            pass

        def send(self, status, payload, ctype, extra=()):
            self.send_response(status)
            for name, value in extra:
                self.send_header(name, value)
            self.send_header("Content-Type", ctype)
            self.send_header("Content-Length", str(len(payload)))
            self.end_headers()
            self.wfile.write(payload)

        def send_json(self, status, doc, extra=()):
            ctype = "application/problem+json" if status >= 400 else "application/json"
            self.send(status, json.dumps(doc).encode(), ctype, extra)

        def do_GET(self):
            path = self.path.split("?", 1)[0]
            parts = path.strip("/").split("/")
            if parts[0] == "jobs" and len(parts) in (2, 3):
                with lock:
                    ended = jobs[parts[1]]["ended"] if parts[1] in jobs else None
                if ended is not None and len(parts) == 2:
                    ended.wait(hold_seconds)
                with lock:
                    if parts[1] not in jobs:
                        return self.send_json(*problem(404, "no such job", f"no job `{parts[1]}`"))
                    if len(parts) == 2:
                        running = jobs[parts[1]]["status"] == "running"
                        return self.send_json(200, status_info(parts[1]), [("Retry-After", "1")] if running else [])
                    if parts[2] == "results":
                        result = jobs[parts[1]].get("result")
                        if result is None:
                            return self.send_json(*problem(404, "result not ready", f"job `{parts[1]}` is still running"))
                        return self.send_json(*result)
            if path in ("/demo", "/demo/"):
                with open(os.path.join(page_dir, "index.html"), "rb") as f:
                    return self.send(200, f.read(), "text/html; charset=utf-8")
            name = path.removeprefix("/demo/")
            if path.startswith("/demo/") and "/" not in name and not name.startswith("."):
                full = os.path.join(data_dir, name)
                if os.path.isfile(full):
                    with open(full, "rb") as f:
                        return self.send(200, f.read(), "application/json")
            self.send_json(*problem(404, "not found", f"no route for GET {path}"))

        def do_POST(self):
            body = self.rfile.read(int(self.headers.get("Content-Length") or 0))
            Handler.posted.append(body)
            prefer = self.headers.get("Prefer") or ""
            Handler.headers_seen.append((self.path, prefer))
            if self.path.split("?", 1)[0] != "/processes/zone-counts/execution":
                return self.send_json(*problem(404, "not found", f"no route for POST {self.path}"))
            if "respond-async" in prefer:
                job_id = uuid.uuid4().hex
                with lock:
                    jobs[job_id] = {"status": "running", "message": "queued", "ended": threading.Event()}
                    info = status_info(job_id)
                threading.Thread(target=run_job, args=(job_id, body), daemon=True).start()
                return self.send_json(201, info, [("Location", f"/jobs/{job_id}"), ("Preference-Applied", "respond-async")])
            if sync_cells is not None and raster_cells(body) > sync_cells:
                return self.send_json(*problem(
                    413, "too large for a synchronous answer",
                    f"the raster has {raster_cells(body)} cells, above the {sync_cells} answered synchronously: "
                    "retry with `Prefer: respond-async`"))
            self.send_json(*execute(zonetally, body))

    return Handler


def start(zonetally, port=0, **options):
    """Starts the stand-in on 127.0.0.1 in a thread; returns (server, base URL). `options` are
    make_handler's (page_dir, data_dir, sync_cells)."""
    server = ThreadingHTTPServer(("127.0.0.1", port), make_handler(zonetally, **options))
    threading.Thread(target=server.serve_forever, daemon=True).start()
    return server, f"http://127.0.0.1:{server.server_address[1]}"


def main():
    ap = argparse.ArgumentParser(description="stand-in for the service's /demo routes (127.0.0.1 only)")
    ap.add_argument("--port", type=int, default=8000)
    ap.add_argument("--zonetally")
    ap.add_argument("--sync-cells", type=int, help="answer 413 to synchronous requests above this many raster cells")
    args = ap.parse_args()
    server, url = start(find_zonetally(args.zonetally), args.port, sync_cells=args.sync_cells)
    print(f"demo page at {url}/demo (Ctrl-C to stop)", file=sys.stderr)
    try:
        threading.Event().wait()
    except KeyboardInterrupt:
        server.shutdown()


if __name__ == "__main__":
    main()

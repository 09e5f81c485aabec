#!/usr/bin/env python3
"""A stand-in for the service's two demo routes, for trying the demo page without the service.

It is not the service. It binds to 127.0.0.1 only and answers:

    GET  /demo                               demo/page/index.html
    GET  /demo/NAME                          demo/NAME (valley.json, or any file beside it)
    POST /processes/zone-counts/execution    runs `zonetally eval` on the body's `inputs` and returns
                                             the results document, or a problem document (status 400)
                                             carrying eval's message when eval rejects the inputs

    python3 demo/stand_in.py [--port 8000] [--zonetally PATH]

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


def make_handler(zonetally, page_dir=os.path.join(DEMO, "page"), data_dir=DEMO):
    class Handler(BaseHTTPRequestHandler):
        posted = []  # bodies received, for tests

        def log_message(self, fmt, *args):  # keep test output quiet
            pass

        def send(self, status, payload, ctype):
            self.send_response(status)
            self.send_header("Content-Type", ctype)
            self.send_header("Content-Length", str(len(payload)))
            self.end_headers()
            self.wfile.write(payload)

        def send_json(self, status, doc):
            ctype = "application/problem+json" if status >= 400 else "application/json"
            self.send(status, json.dumps(doc).encode(), ctype)

        def do_GET(self):
            path = self.path.split("?", 1)[0]
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
            if self.path.split("?", 1)[0] != "/processes/zone-counts/execution":
                return self.send_json(*problem(404, "not found", f"no route for POST {self.path}"))
            self.send_json(*execute(zonetally, body))

    return Handler


def start(zonetally, port=0, **dirs):
    """Starts the stand-in on 127.0.0.1 in a thread; returns (server, base URL)."""
    server = ThreadingHTTPServer(("127.0.0.1", port), make_handler(zonetally, **dirs))
    threading.Thread(target=server.serve_forever, daemon=True).start()
    return server, f"http://127.0.0.1:{server.server_address[1]}"


def main():
    ap = argparse.ArgumentParser(description="stand-in for the service's /demo routes (127.0.0.1 only)")
    ap.add_argument("--port", type=int, default=8000)
    ap.add_argument("--zonetally")
    args = ap.parse_args()
    server, url = start(find_zonetally(args.zonetally), args.port)
    print(f"demo page at {url}/demo (Ctrl-C to stop)", file=sys.stderr)
    try:
        threading.Event().wait()
    except KeyboardInterrupt:
        server.shutdown()


if __name__ == "__main__":
    main()

#!/usr/bin/env python3
"""Hostile clients against a real zonetally process on 127.0.0.1, scaled to a small machine.

Starts the binary with a 1 GiB memory budget and API keys, then, one after another:
  1. queued async jobs whose zones expand to about 80 MB of cell lists each, 40 at once;
  2. exceedance thresholds asking for 10^8 probabilities in a 2.5 MB body;
  3. a 60 MB JSON body, then eight of 12 MB sent at once;
  4. another key's job id;
  5. jobs with large results until the results' part of the budget is full;
  6. small jobs created as fast as 8 clients can for 8 s;
  7. 2,000 idle connections, with health checks sent behind them;
  8. a body trickled a byte a second.
After each, the server must still answer /healthz; the refusals must be the deliberate ones
(503 with Retry-After, 413, 408, 404); and at the end its peak resident memory (VmHWM) must be
under the budget. Prints what each flood got and the memory figures.

Usage: flood.py --bin target/release/zonetally
"""

import argparse
import base64
import hashlib
import http.client
import json
import os
import resource
import socket
import struct
import subprocess
import sys
import tempfile
import threading
import time
from collections import Counter

BUDGET = 1 << 30
KEY_A, KEY_B = "flood-key-alpha", "flood-key-beta"
failures = []


def check(ok, what):
    print(("  ok    " if ok else "  FAIL  ") + what, flush=True)
    if not ok:
        failures.append(what)


def free_port():
    s = socket.socket()
    s.bind(("127.0.0.1", 0))
    port = s.getsockname()[1]
    s.close()
    return port


class Client:
    def __init__(self, port, key=KEY_A, timeout=60):
        self.port, self.key, self.timeout = port, key, timeout
        self.conn = None

    def request(self, method, path, body=None, headers=None):
        h = {"Authorization": f"Bearer {self.key}"}
        if body is not None:
            h["Content-Type"] = "application/json"
        h.update(headers or {})
        for attempt in range(2):
            if self.conn is None:
                self.conn = http.client.HTTPConnection("127.0.0.1", self.port, timeout=self.timeout)
            try:
                self.conn.request(method, path, body=body, headers=h)
                r = self.conn.getresponse()
                data = r.read()
                if r.getheader("Connection", "").lower() == "close":
                    self.conn.close()
                    self.conn = None
                return r.status, dict((k.lower(), v) for k, v in r.getheaders()), data
            except (ConnectionError, http.client.HTTPException, socket.timeout, OSError) as e:
                self.conn.close()
                self.conn = None
                if attempt == 1:
                    return 0, {}, str(e).encode()
        return 0, {}, b""


def raw_post(port, path, body, key=KEY_A):
    """Sends a whole body on a fresh socket, then reads the answer even when the server
    answered early and stopped reading (a refusal before the body)."""
    s = socket.create_connection(("127.0.0.1", port), timeout=60)
    head = (f"POST {path} HTTP/1.1\r\nHost: x\r\nAuthorization: Bearer {key}\r\n"
            f"Content-Type: application/json\r\nContent-Length: {len(body)}\r\n\r\n").encode()
    try:
        s.sendall(head + body)
    except OSError:
        pass
    answer = b""
    try:
        while b"\r\n\r\n" not in answer:
            chunk = s.recv(65536)
            if not chunk:
                break
            answer += chunk
    except OSError:
        pass
    s.close()
    try:
        return int(answer.split(b" ", 2)[1])
    except (IndexError, ValueError):
        return 0


def memory(pid):
    fields = {}
    with open(f"/proc/{pid}/status") as f:
        for line in f:
            name, _, rest = line.partition(":")
            if name in ("VmRSS", "VmHWM"):
                fields[name] = int(rest.split()[0]) * 1024
    return fields["VmRSS"], fields["VmHWM"]


def mib(b):
    return f"{b / (1 << 20):.0f} MiB"


def alive(port):
    status, _, _ = Client(port, timeout=5).request("GET", "/healthz")
    return status == 200


def in_parallel(n, fn):
    out = [None] * n

    def run(i):
        out[i] = fn(i)

    threads = [threading.Thread(target=run, args=(i,)) for i in range(n)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    return out


def raster_b64(width, height, value=0.02):
    return {"width": width, "height": height,
            "values_base64": base64.b64encode(struct.pack(f"<{width * height}d", *([value] * (width * height)))).decode()}


def charged_bytes(port):
    status, _, body = Client(port, timeout=5).request("GET", "/readyz")
    return json.loads(body)["request_bytes_used"] if status == 200 else None


def charged(port):
    used = charged_bytes(port)
    return mib(used) if used is not None else "(not ready)"


def deliberate(statuses, allowed):
    return all(s in allowed for s in statuses)


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--bin", required=True)
    args = ap.parse_args()
    soft, hard = resource.getrlimit(resource.RLIMIT_NOFILE)
    resource.setrlimit(resource.RLIMIT_NOFILE, (min(hard, 16384), hard))

    work = tempfile.mkdtemp()
    keys = os.path.join(work, "keys")
    with open(keys, "w") as f:
        for k in (KEY_A, KEY_B):
            f.write(hashlib.sha256(k.encode()).hexdigest() + "\n")
    port = free_port()
    log = open(os.path.join(work, "server.log"), "w")
    server = subprocess.Popen(
        [args.bin, "serve", "--bind", f"127.0.0.1:{port}", "--memory-budget", str(BUDGET),
         "--api-keys", keys, "--threads", "1", "--sync-threads", "1", "--queue", "64",
         "--body-timeout", "6", "--header-timeout", "3", "--job-ttl", "600"],
        stdout=log, stderr=subprocess.STDOUT)
    try:
        for _ in range(100):
            if alive(port):
                break
            time.sleep(0.1)
        status, _, body = Client(port).request("GET", "/readyz")
        ready = json.loads(body)
        print(f"server pid {server.pid}: budget {mib(ready['memory_budget'])}, "
              f"request data part {mib(ready['request_bytes'])}; idle RSS {mib(memory(server.pid)[0])}")
        run_floods(port, server.pid)
        rss, hwm = memory(server.pid)
        print(f"memory: RSS now {mib(rss)}, peak {mib(hwm)}, budget {mib(BUDGET)} "
              f"(peak {hwm / BUDGET:.2f}x the budget)")
        check(hwm < BUDGET, f"peak RSS {mib(hwm)} under the {mib(BUDGET)} budget")
        check(server.poll() is None and alive(port), "the server is still serving")
    finally:
        server.terminate()
        try:
            server.wait(10)
        except subprocess.TimeoutExpired:
            server.kill()
        log.close()
        if failures:
            print("server log (tail):")
            with open(os.path.join(work, "server.log")) as f:
                print("".join(f.readlines()[-15:]))
    print(f"hostile floods: {len(failures)} failed")
    return 1 if failures else 0


def run_floods(port, pid):
    c = Client(port)
    # A held raster for the job floods: 1000 x 1000 cells.
    status, _, body = c.request("POST", "/rasters", json.dumps(raster_b64(1000, 1000)))
    check(status == 201, f"raster upload: {status}")
    ref = json.loads(body)["ref"] if status == 201 else ""

    print("1. 40 queued jobs at once, each 2,000 rects of 100x100 (80 MB of cell lists)")
    zones = [{"id": f"z{i}", "rect": {"row": (i // 45) * 20, "col": (i % 45) * 20, "rows": 100, "cols": 100}}
             for i in range(2000)]
    heavy = json.dumps({"inputs": {"raster": {"ref": ref}, "zones": zones, "evidence": {"total": 20000}}})
    got = in_parallel(40, lambda i: Client(port).request(
        "POST", "/processes/zone-counts/execution", heavy, {"Prefer": "respond-async"}))
    statuses = Counter(s for s, _, _ in got)
    print(f"  answers {dict(statuses)} (body {len(heavy) / 1e3:.0f} kB); RSS peak so far {mib(memory(pid)[1])}")
    check(deliberate(statuses, {201, 503, 413}), "only 201, 503 or 413")
    check(all("retry-after" in h for s, h, _ in got if s == 503), "every 503 has Retry-After")
    for s, h, b in got:
        if s == 201:
            c.request("DELETE", h["location"])
    t0 = time.monotonic()
    while charged_bytes(port) != 0 and time.monotonic() - t0 < 30:
        time.sleep(0.05)
    print(f"  dismissed; their charges were given back within {time.monotonic() - t0:.2f} s")
    check(charged_bytes(port) == 0, "every charge given back")
    check(alive(port), "alive after the job flood")

    print("2. 100 zones x 1,000,000 thresholds")
    thresholds = list(range(1, 1_000_001))
    body = json.dumps({"inputs": {"raster": {"ref": ref}, "zones": zones[:100], "evidence": {"total": 20000},
                                  "summaries": {"exceedance": thresholds}}})
    status, _, answer = c.request("POST", "/processes/zone-counts/execution", body)
    print(f"  answer {status} for a {len(body) / 1e6:.1f} MB body")
    check(status == 413, "refused up front with 413")

    print(f"3. a 60 MB JSON body, then eight of 12 MB at once ({charged(port)} of request data charged before)")
    huge = b'{"inputs": {"raster": {"width": 1, "height": 1, "values": [' + b"0.5, " * 12_000_000 + b'0.5]}}}'
    status = raw_post(port, "/processes/zone-counts/execution", huge)
    print(f"  the 60 MB body: {status}")
    check(status == 413, "a body that could never fit the budget is a 413")
    big = b'{"inputs": {"raster": {"width": 1, "height": 1, "values": [' + b"0.5, " * 2_400_000 + b'0.5]}}}'
    got = in_parallel(8, lambda i: raw_post(port, "/processes/zone-counts/execution", big))
    statuses = Counter(got)
    print(f"  the eight: {dict(statuses)}; RSS peak so far {mib(memory(pid)[1])}")
    check(deliberate(statuses, {400, 503}), "only 400 (values for a 1x1 raster) or 503")
    check(503 in statuses and 400 in statuses, "some decoded and refused, some refused by the budget")
    check(alive(port), "alive after the large bodies")

    small = json.dumps({"inputs": {"raster": {"width": 2, "height": 1, "values": [0.5, 0.5]},
                                   "zones": [{"id": "a", "cells": [0]}], "evidence": {"total": 1}}})
    print("4. another key's job")
    status, h, _ = c.request("POST", "/processes/zone-counts/execution", small, {"Prefer": "respond-async"})
    other = Client(port, key=KEY_B)
    s_other = other.request("GET", h.get("location", "/jobs/none"))[0] if status == 201 else 0
    s_delete = other.request("DELETE", h.get("location", "/jobs/none"))[0] if status == 201 else 0
    s_own = c.request("GET", h.get("location", "/jobs/none"))[0] if status == 201 else 0
    print(f"  created {status}; the other key reads {s_other}, deletes {s_delete}; the owner reads {s_own}")
    check((status, s_other, s_delete, s_own) == (201, 404, 404, 200), "another key's job is a 404")


    print("5. jobs with large results until the results' part is full")
    wide = json.dumps({"inputs": {"raster": {"ref": ref},
                                  "zones": [{"id": f"r{i}", "rect": {"row": 0, "col": i, "rows": 1000, "cols": 1}}
                                            for i in range(1000)],
                                  "evidence": {"total": 20000}, "summaries": {"pmf": True}}})
    finished, refused, start = 0, Counter(), time.monotonic()
    while time.monotonic() - start < 40:
        status, h, b = c.request("POST", "/processes/zone-counts/execution", wide, {"Prefer": "respond-async"})
        if status != 201:
            refused[status] += 1
            if refused[status] >= 3:
                break
            time.sleep(0.5)
            continue
        for _ in range(600):
            s, _, info = c.request("GET", h["location"])
            if s == 200 and json.loads(info)["status"] in ("successful", "failed", "dismissed"):
                break
            time.sleep(0.05)
        finished += 1
    s, _, r = c.request("GET", "/readyz")
    print(f"  {finished} jobs finished, then {dict(refused)}; RSS peak so far {mib(memory(pid)[1])}")
    check(deliberate(refused, {503}) and refused, "refused with 503 once full")
    status, _, body = c.request("GET", "/jobs?limit=1000")
    for j in json.loads(body)["jobs"] if status == 200 else []:
        c.request("DELETE", f"/jobs/{j['jobID']}")

    print("6. small jobs from 8 clients for 8 s")

    def creator(i):
        cl, seen, stop = Client(port), Counter(), time.monotonic() + 8
        while time.monotonic() < stop:
            seen[cl.request("POST", "/processes/zone-counts/execution", small, {"Prefer": "respond-async"})[0]] += 1
        return seen

    total = sum(in_parallel(8, creator), Counter())
    t0 = time.monotonic()
    status, _, _ = c.request("GET", "/jobs?limit=10")
    listing = time.monotonic() - t0
    print(f"  answers {dict(total)}; a listing took {listing * 1e3:.1f} ms; RSS peak so far {mib(memory(pid)[1])}")
    check(deliberate(total, {201, 503}), "only 201 or 503")
    check(status == 200 and listing < 1.0, "jobs still listed within a second")

    print("7. 2,000 idle connections, then health checks")
    idle = []
    for _ in range(2000):
        s = socket.create_connection(("127.0.0.1", port))
        idle.append(s)
    t0 = time.monotonic()
    ok = alive(port)
    print(f"  /healthz behind them: {'200' if ok else 'no answer'} in {(time.monotonic() - t0) * 1e3:.0f} ms")
    check(ok, "/healthz answered behind 2,000 idle connections")
    for s in idle:
        s.close()

    print("8. a body trickled a byte a second")
    s = socket.create_connection(("127.0.0.1", port), timeout=15)
    s.sendall(f"POST /processes/zone-counts/execution HTTP/1.1\r\nHost: x\r\nAuthorization: Bearer {KEY_A}\r\n"
              f"Content-Type: application/json\r\nContent-Length: 1000\r\n\r\n".encode())
    t0, answer = time.monotonic(), b""
    try:
        for _ in range(10):
            s.sendall(b" ")
            time.sleep(1)
    except OSError:
        pass
    try:
        answer = s.recv(4096)
    except OSError:
        pass
    s.close()
    line = answer.split(b"\r\n", 1)[0].decode(errors="replace")
    print(f"  answer `{line}` after {time.monotonic() - t0:.1f} s")
    check(line.startswith("HTTP/1.1 408"), "cut off with 408")


if __name__ == "__main__":
    sys.exit(main())

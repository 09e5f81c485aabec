#!/usr/bin/env python3
"""A mixed load against a real zonetally process on 127.0.0.1, from 32 connections at once.

Each of 32 clients keeps one connection and, in a loop, picks one of:
  - a small synchronous zone-counts request (8 cells),                         55%
  - an async W250k-partition job (500x500 held raster, 2,500 zones of 10x10):
    submit, poll until finished, read the results, dismiss the job,            10%
  - a raster upload (one of 8 rasters of 100x100, so most are already held),  10%
  - a listing (GET /jobs, GET /processes),                                     25%
for a warm-up (default 20 s), then the measured run (default 60 s). Reports requests, answers by
status, p50/p99 latency per kind (as this client saw them, Python threads included), and the
server's resident memory after the warm-up and after the run, each read with every client
paused between requests, beside what the server reports holding then (cache bytes, job
records and the allocator's figures from /metrics), so a drift can be told apart from held data.

Passes when every answer is 2xx or a deliberate 429/503 and every async job that was accepted
finished successfully. RSS after the run within 10% of RSS after the warm-up is printed as met
or MISS; --require-rss (as CI runs it) makes a miss fail the run.

Usage: mixed.py --bin target/release/zonetally [--seconds 60] [--warmup 10]
"""

import argparse
import base64
import http.client
import json
import random
import socket
import struct
import subprocess
import sys
import threading
import time
from collections import Counter, defaultdict

CLIENTS = 32
# Seconds every client stays paused before RSS is read: past two of the server's idle sweeps (5 s)
# and the keep-alive timeout (5 s) that closes the paused connections.
QUIET_S = 12


def free_port():
    s = socket.socket()
    s.bind(("127.0.0.1", 0))
    port = s.getsockname()[1]
    s.close()
    return port


def rss(pid):
    with open(f"/proc/{pid}/status") as f:
        for line in f:
            if line.startswith("VmRSS:"):
                return int(line.split()[1]) * 1024
    return 0


def raster(width, height, seed, low=0.001, high=0.05):
    r = random.Random(seed)
    values = [r.uniform(low, high) for _ in range(width * height)]
    return {"width": width, "height": height,
            "values_base64": base64.b64encode(struct.pack(f"<{len(values)}d", *values)).decode()}, sum(values)


class Client:
    def __init__(self, port):
        self.port = port
        self.conn = http.client.HTTPConnection("127.0.0.1", port, timeout=120)

    def reconnect(self):
        self.conn.close()
        self.conn = http.client.HTTPConnection("127.0.0.1", self.port, timeout=120)

    def request(self, method, path, body=None, headers=None):
        h = {"Content-Type": "application/json"} if body is not None else {}
        h.update(headers or {})
        try:
            self.conn.request(method, path, body=body, headers=h)
            r = self.conn.getresponse()
            data = r.read()
            if r.getheader("Connection", "").lower() == "close":
                self.conn.close()
                self.conn = http.client.HTTPConnection("127.0.0.1", self.port, timeout=120)
            return r.status, r, data
        except (ConnectionError, http.client.HTTPException, OSError) as e:
            self.conn.close()
            self.conn = http.client.HTTPConnection("127.0.0.1", self.port, timeout=120)
            return 0, None, str(e).encode()


class Tally:
    def __init__(self):
        self.lock = threading.Lock()
        self.reset()

    def reset(self):
        self.latency = defaultdict(list)
        self.statuses = Counter()
        self.unexpected = []
        self.jobs = Counter()

    def add(self, kind, status, seconds, detail=b""):
        with self.lock:
            self.latency[kind].append(seconds)
            self.statuses[status] += 1
            if not (200 <= status < 300 or status in (429, 503)):
                self.unexpected.append((kind, status, detail[:200]))


def percentile(values, q):
    values = sorted(values)
    return values[min(len(values) - 1, int(q * len(values)))] if values else float("nan")


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--bin", required=True)
    ap.add_argument("--seconds", type=float, default=60)
    ap.add_argument("--warmup", type=float, default=20)
    ap.add_argument("--require-rss", action="store_true", help="fail when RSS drifts over 10%%")
    args = ap.parse_args()

    port = free_port()
    server = subprocess.Popen([args.bin, "serve", "--bind", f"127.0.0.1:{port}"],
                              stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    try:
        for _ in range(100):
            try:
                if Client(port).request("GET", "/healthz")[0] == 200:
                    break
            except OSError:
                pass
            time.sleep(0.1)
        return run(port, server.pid, args)
    finally:
        server.terminate()
        try:
            server.wait(10)
        except subprocess.TimeoutExpired:
            server.kill()


def run(port, pid, args):
    setup = Client(port)
    big, big_sum = raster(500, 500, seed=1)
    status, _, body = setup.request("POST", "/rasters", json.dumps(big))
    if status != 201:
        print(f"raster upload failed: {status} {body[:200]}")
        return 1
    ref = json.loads(body)["ref"]
    partition = json.dumps({"inputs": {
        "raster": {"ref": ref},
        "zones": [{"id": f"b{r}-{c}", "rect": {"row": r * 10, "col": c * 10, "rows": 10, "cols": 10}}
                  for r in range(50) for c in range(50)],
        "evidence": {"total": round(big_sum)},
        "summaries": {"exceedance": [3]}}})
    uploads = [json.dumps(raster(100, 100, seed=100 + i)[0]) for i in range(8)]
    small = json.dumps({"inputs": {
        "raster": {"width": 4, "height": 2, "values": [0.5, 0.2, 0.3, 0.5, 0.1, 0.6, 0.5, 0.4]},
        "zones": [{"id": "east", "rect": {"row": 0, "col": 2, "rows": 2, "cols": 2}}, {"id": "pair", "cells": [0, 1]}],
        "evidence": {"total": 3}}})

    tally = Tally()
    stop = threading.Event()
    # RSS is read with every client paused between requests, so both readings see the same
    # (quiet) state rather than whatever happened to be in flight.
    running = threading.Event()
    running.set()
    idle = threading.Semaphore(0)

    def client(i):
        c, rng = Client(port), random.Random(i)
        while not stop.is_set():
            if not running.is_set():
                idle.release()
                running.wait()
                # The pause outlasts the server's keep-alive idle timeout (5 s), which closes
                # the connection: start a new one, as any client does after sitting idle.
                c.reconnect()
                continue
            pick = rng.random()
            t0 = time.monotonic()
            if pick < 0.55:
                status, _, body = c.request("POST", "/processes/zone-counts/execution", small)
                tally.add("sync-small", status, time.monotonic() - t0, body)
            elif pick < 0.65:
                status, r, body = c.request("POST", "/processes/zone-counts/execution", partition,
                                            {"Prefer": "respond-async"})
                tally.add("async-submit", status, time.monotonic() - t0, body)
                if status != 201:
                    continue
                location = r.getheader("Location")
                ended = None
                while ended is None:
                    t1 = time.monotonic()
                    status, _, body = c.request("GET", location)
                    tally.add("poll", status, time.monotonic() - t1, body)
                    if status != 200:
                        break
                    state = json.loads(body)["status"]
                    if state in ("successful", "failed", "dismissed"):
                        ended = state
                    else:
                        time.sleep(0.05)
                with tally.lock:
                    tally.jobs[ended or "lost"] += 1
                t1 = time.monotonic()
                status, _, body = c.request("GET", location + "/results")
                tally.add("results", status, time.monotonic() - t1, body)
                if status == 200 and len(json.loads(body)["zones"]) != 2500:
                    tally.add("results", 999, 0, b"not 2,500 zones")
                t1 = time.monotonic()
                status, _, body = c.request("DELETE", location)
                tally.add("dismiss", status, time.monotonic() - t1, body)
                tally.add("async-job", 200 if ended == "successful" else 999, time.monotonic() - t0,
                          (ended or "lost").encode())
            elif pick < 0.75:
                status, _, body = c.request("POST", "/rasters", rng.choice(uploads))
                tally.add("upload", status, time.monotonic() - t0, body)
            else:
                path = "/jobs?limit=10" if rng.random() < 0.5 else "/processes"
                status, _, body = c.request("GET", path)
                tally.add("listing", status, time.monotonic() - t0, body)

    threads = [threading.Thread(target=client, args=(i,), daemon=True) for i in range(CLIENTS)]
    for t in threads:
        t.start()
    def held():
        # What the server says it holds, read beside RSS: cache bytes and job records.
        status, _, body = Client(port).request("GET", "/metrics")
        if status != 200:
            return {}
        out = {"raster cache": 0, "normaliser cache": 0, "job records": 0}
        for line in body.decode().splitlines():
            name, _, value = line.rpartition(" ")
            if name == 'zonetally_cache_bytes{cache="raster"}':
                out["raster cache"] = int(float(value))
            elif name == 'zonetally_cache_bytes{cache="normaliser"}':
                out["normaliser cache"] = int(float(value))
            elif name.startswith('zonetally_allocator_bytes{kind="'):
                out["allocator " + name.split('"')[1]] = int(float(value))
            elif name.startswith("zonetally_jobs{"):
                out["job records"] += int(float(value))
        return out

    def quiet_rss():
        running.clear()
        for _ in threads:
            idle.acquire()
        # Let the server hand back what the last requests freed: its idle sweep (every 5 s)
        # purges the allocator's freed pages, so the reading comes after two sweeps (with a 3 s
        # wait and no purge the readings swung by -26% to +12% around the same state).
        time.sleep(QUIET_S)
        value = rss(pid)
        holding = held()
        running.set()
        return value, holding

    time.sleep(args.warmup)
    warm, warm_held = quiet_rss()
    with tally.lock:
        tally.reset()
    start = time.monotonic()
    time.sleep(args.seconds)
    elapsed = time.monotonic() - start
    after, after_held = quiet_rss()
    stop.set()
    for t in threads:
        t.join(120)

    total = sum(tally.statuses.values())
    print(f"mixed load: {CLIENTS} connections, {elapsed:.0f} s after a {args.warmup:.0f} s warm-up: "
          f"{total} requests ({total / elapsed:.0f}/s), answers {dict(sorted(tally.statuses.items()))}")
    print(f"  async jobs: {dict(tally.jobs)}")
    print(f"  {'kind':<13} {'count':>7} {'p50 ms':>9} {'p99 ms':>9}")
    for kind in ("sync-small", "async-submit", "poll", "results", "dismiss", "async-job", "upload", "listing"):
        lat = tally.latency.get(kind, [])
        print(f"  {kind:<13} {len(lat):>7} {percentile(lat, 0.5) * 1e3:>9.1f} {percentile(lat, 0.99) * 1e3:>9.1f}")
    drift = (after - warm) / warm
    print(f"  RSS after warm-up {warm / 2**20:.0f} MiB, after the run {after / 2**20:.0f} MiB ({drift:+.1%})")
    print(f"  held after warm-up {warm_held}, after the run {after_held}")
    failed = []
    if tally.unexpected:
        failed.append(f"{len(tally.unexpected)} unexpected answers, e.g. {tally.unexpected[:3]}")
    if tally.jobs.get("successful", 0) == 0:
        failed.append("no async job finished")
    if abs(drift) > 0.10:
        # Printed as a miss; it fails the run with --require-rss.
        print(f"  MISS  RSS drifted {drift:+.1%} (target within 10%)")
        if args.require_rss:
            failed.append(f"RSS drifted {drift:+.1%} (allowed 10%)")
    else:
        print(f"  met   RSS drift {drift:+.1%} (target within 10%)")
    if any(tally.latency.get(k) == [] for k in ("sync-small", "upload", "listing")):
        failed.append("a kind of request was never sent")
    for f in failed:
        print(f"  FAIL  {f}")
    print(f"mixed load: {'ok' if not failed else 'FAILED'}")
    return 1 if failed else 0


if __name__ == "__main__":
    sys.exit(main())

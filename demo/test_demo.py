#!/usr/bin/env python3
"""Tests of the demo: the generator, the scenario, `zonetally eval` on it against a direct
computation, run.sh in both modes, and the page (static checks; rendering when Chromium is there).

    cargo build --release
    python3 demo/test_demo.py -v

Needs python3 (stdlib only) and bash; the page-rendering tests also need `chromium` on PATH
(apt-get install -y chromium) and are skipped without it. The binary is $ZONETALLY, else
target/release/zonetally.
"""

import json
import os
import re
import shutil
import subprocess
import sys
import tempfile
import time
import unittest
from html.parser import HTMLParser

DEMO = os.path.dirname(os.path.abspath(__file__))
ROOT = os.path.dirname(DEMO)
sys.path.insert(0, DEMO)

import stand_in  # noqa: E402

VALLEY = os.path.join(DEMO, "valley.json")
PAGE = os.path.join(DEMO, "page", "index.html")


def zonetally():
    return stand_in.find_zonetally()


def load_valley():
    with open(VALLEY, encoding="utf-8") as f:
        return json.load(f)


def zone_cells(spec, width):
    if "cells" in spec:
        return list(spec["cells"])
    r = spec["rect"]
    return [(r["row"] + i) * width + r["col"] + j for i in range(r["rows"]) for j in range(r["cols"])]


_EVAL = None


def eval_valley():
    global _EVAL
    if _EVAL is None:
        out = subprocess.run([zonetally(), "eval", VALLEY], capture_output=True, text=True, check=True)
        _EVAL = json.loads(out.stdout)
    return _EVAL


def law(ps, cap):
    """Poisson-binomial pmf of independent Bernoulli(p) cells, truncated to k <= cap: folded one
    cell at a time in probability space. Truncation is exact for the kept entries."""
    pmf = [1.0]
    for p in ps:
        n = min(len(pmf) + 1, cap + 1)
        nxt = [0.0] * n
        q = 1.0 - p
        for k, x in enumerate(pmf):
            nxt[k] += x * q
            if k + 1 < n:
                nxt[k + 1] += x * p
        pmf = nxt
    return pmf


def conditional(values, cells, total):
    """P(N_S = k | N_T = total) by Bayes' rule from the two directly convolved laws."""
    inside = set(cells)
    zone_law = law([values[c] for c in cells], total)
    rest_law = law([v for i, v in enumerate(values) if v is not None and i not in inside], total)
    joint = [zone_law[k] * (rest_law[total - k] if total - k < len(rest_law) else 0.0) for k in range(len(zone_law))]
    norm = sum(joint)
    return [x / norm for x in joint]


class Generator(unittest.TestCase):
    def test_regenerating_reproduces_the_committed_file(self):
        run = subprocess.run([sys.executable, os.path.join(DEMO, "make_valley.py"), "--check"], capture_output=True, text=True)
        self.assertEqual(run.returncode, 0, run.stdout + run.stderr)

    def test_generator_writes_the_same_bytes_twice(self):
        with tempfile.TemporaryDirectory() as d:
            texts = []
            for name in ("a.json", "b.json"):
                out = os.path.join(d, name)
                subprocess.run([sys.executable, os.path.join(DEMO, "make_valley.py"), "--out", out,
                                "--tif", out + ".tif", "--geojson", out + ".geojson"], check=True, capture_output=True)
                with open(out, encoding="utf-8") as f:
                    texts.append(f.read())
            self.assertEqual(texts[0], texts[1])


class Scenario(unittest.TestCase):
    def test_shape_and_size(self):
        doc = load_valley()
        r = doc["raster"]
        self.assertEqual((r["width"], r["height"]), (120, 80))
        self.assertEqual(len(r["values"]), 120 * 80)
        self.assertLess(os.path.getsize(VALLEY), 200_000)
        nodata = sum(v is None for v in r["values"])
        self.assertGreater(nodata, 100, "the lake and the corner outside the study area are nodata")
        for v in r["values"]:
            if v is not None:
                self.assertTrue(0.0 < v < 1.0, v)
        self.assertEqual(doc["summaries"]["interval"], 0.9)
        self.assertTrue(doc["summaries"]["exceedance"])
        self.assertIsInstance(doc["evidence"]["total"], int)

    def test_zones_are_labelled_disjoint_and_avoid_nodata(self):
        doc = load_valley()
        values = doc["raster"]["values"]
        self.assertTrue(10 <= len(doc["zones"]) <= 20)
        seen = set()
        for z in doc["zones"]:
            self.assertRegex(z["id"], r"^[a-z]+(-[a-z]+)+$", "descriptive hyphenated labels")
            cells = zone_cells(z, 120)
            self.assertTrue(cells)
            for c in cells:
                self.assertIsNotNone(values[c], f"{z['id']} covers nodata cell {c}")
                self.assertNotIn(c, seen, f"{z['id']} overlaps another zone at {c}")
                seen.add(c)


class Eval(unittest.TestCase):
    def test_zone_pmfs_match_a_direct_convolution(self):
        # reference: direct Poisson-binomial convolution in probability space, truncated at the
        # observed total, conditioned by Bayes' rule (no tilting, no code shared with the engine).
        doc = load_valley()
        values, total = doc["raster"]["values"], doc["evidence"]["total"]
        results = {z["id"]: z for z in eval_valley()["zones"]}
        for spec in doc["zones"]:
            if spec["id"] not in ("quarry-slope", "lakeside-cabins", "upper-terraces", "footbridge-crossing"):
                continue
            want = conditional(values, zone_cells(spec, 120), total)
            got = results[spec["id"]]
            pmf = got["pmf"]["values"]
            off = got["pmf"]["offset"]
            bound = got["error_bound"]
            self.assertLessEqual(off + len(pmf), len(want), spec["id"])
            full = [0.0] * off + pmf + [0.0] * (len(want) - off - len(pmf))
            # The reported pmf may drop negligible tails; its certified error bound covers them:
            # the L1 distance to the exact law must not exceed it. The reference itself is a sum
            # of products of ~9,000 factors, relative error of order 1e4 * eps ~ 2e-12, so 1e-12
            # of slack on a total mass of one.
            l1 = sum(abs(a - b) for a, b in zip(full, want))
            self.assertLessEqual(l1, bound + 1e-12, f"{spec['id']}: L1 {l1:.3e} above the bound {bound:.3e}")
            for k, (a, b) in enumerate(zip(full, want)):
                if b > 1e-10:
                    # Where the mass is not negligible the two must agree closely, not just in L1.
                    self.assertLessEqual(abs(a - b), 1e-9 * b, f"{spec['id']} k={k}: {a} vs {b}")
            mean = sum(k * p for k, p in enumerate(want))
            self.assertAlmostEqual(got["mean"], mean, delta=1e-9 * max(1.0, mean) + bound * len(want))
            for e in got["exceedance"]:
                tail = sum(want[e["k"]:])
                self.assertLessEqual(abs(e["p"] - tail), 1e-9 * tail + bound, (spec["id"], e))
            cdf, acc = [], 0.0
            for p in want:
                acc += p
                cdf.append(acc)
            level = got["interval"]["level"]
            lower = next(k for k, c in enumerate(cdf) if c >= (1 - level) / 2)
            upper = next(k for k, c in enumerate(cdf) if c >= (1 + level) / 2)
            self.assertEqual((got["interval"]["lower"], got["interval"]["upper"]), (lower, upper), spec["id"])

    def test_prior_means_and_total_check(self):
        # reference: closed form, E N = sum p and Var N = sum p(1-p) for independent cells.
        doc = load_valley()
        values = doc["raster"]["values"]
        res = eval_valley()
        valid = [v for v in values if v is not None]
        self.assertAlmostEqual(res["total"]["prior_mean"], sum(valid), delta=1e-9)
        self.assertAlmostEqual(res["total"]["prior_sd"], sum(v * (1 - v) for v in valid) ** 0.5, delta=1e-9)
        self.assertEqual(res["total"]["observed"], doc["evidence"]["total"])
        for spec, z in zip(doc["zones"], res["zones"]):
            self.assertEqual(spec["id"], z["id"])
            self.assertAlmostEqual(z["prior"]["mean"], sum(values[c] for c in zone_cells(spec, 120)), delta=1e-9)


class RunScript(unittest.TestCase):
    def run_sh(self, *args):
        env = dict(os.environ, ZONETALLY=zonetally())
        return subprocess.run(["bash", os.path.join(DEMO, "run.sh"), *args], capture_output=True, text=True, env=env, timeout=300)

    def rows(self, text):
        return {line.split()[0]: line.split() for line in text.splitlines() if re.match(r"^[a-z]+-[a-z-]+\s+\d", line)}

    def test_table_has_a_row_per_zone_with_eval_numbers(self):
        run = self.run_sh()
        self.assertEqual(run.returncode, 0, run.stderr)
        rows = self.rows(run.stdout)
        res = eval_valley()
        self.assertEqual(set(rows), {z["id"] for z in res["zones"]})
        for z in res["zones"]:
            r = rows[z["id"]]
            self.assertEqual(r[2], f"{z['prior']['mean']:.2f}")
            self.assertEqual(r[3], f"{z['mean']:.2f}")
            self.assertEqual(r[4], f"{z['interval']['lower']}-{z['interval']['upper']}")
        self.assertIn("independent cells", run.stdout)
        self.assertIn(f"observed {res['total']['observed']}", run.stdout)

    def test_service_mode_posts_the_inputs_and_prints_the_same_table(self):
        server, url = stand_in.start(zonetally())
        try:
            handler = server.RequestHandlerClass
            handler.posted.clear()
            run = self.run_sh("--service", url)
            self.assertEqual(run.returncode, 0, run.stderr)
            self.assertEqual(self.rows(run.stdout), self.rows(self.run_sh().stdout))
            self.assertEqual(len(handler.posted), 1)
            body = json.loads(handler.posted[0])
            self.assertEqual(body["inputs"], load_valley())
        finally:
            server.shutdown()
            server.server_close()

    def test_service_mode_falls_back_to_a_polled_job_on_413(self):
        server, url = stand_in.start(zonetally(), sync_cells=1000)
        try:
            seen = server.RequestHandlerClass.headers_seen
            run = self.run_sh("--service", url)
            self.assertEqual(run.returncode, 0, run.stderr)
            self.assertIn("asynchronous job", run.stderr)
            self.assertEqual([prefer for _, prefer in seen], ["", "respond-async"])
            self.assertEqual(self.rows(run.stdout), self.rows(self.run_sh().stdout))
        finally:
            server.shutdown()
            server.server_close()

    def test_service_mode_reports_a_problem_document(self):
        bad = load_valley()
        bad["evidence"]["total"] = 10**6
        with tempfile.NamedTemporaryFile("w", suffix=".json", delete=False) as f:
            json.dump(bad, f)
        server, url = stand_in.start(zonetally())
        try:
            run = self.run_sh("--service", url, "--request", f.name)
            self.assertEqual(run.returncode, 1)
            self.assertIn("answered 400", run.stderr)
            self.assertIn("invalid inputs", run.stderr)
            self.assertIn("/evidence/total", run.stderr)
        finally:
            server.shutdown()
            server.server_close()
            os.unlink(f.name)


class _Visible(HTMLParser):
    """Collects the page's visible text and every URL-bearing attribute."""

    def __init__(self):
        super().__init__()
        self.text, self.urls, self._skip = [], [], 0

    def handle_starttag(self, tag, attrs):
        if tag in ("script", "style"):
            self._skip += 1
        for name, value in attrs:
            if name in ("src", "href", "action", "poster", "srcset") and value:
                self.urls.append(value)

    def handle_endtag(self, tag):
        if tag in ("script", "style"):
            self._skip -= 1

    def handle_data(self, data):
        if not self._skip:
            self.text.append(data)


class PageStatic(unittest.TestCase):
    def setUp(self):
        with open(PAGE, encoding="utf-8") as f:
            self.html = f.read()

    def test_no_external_resources(self):
        p = _Visible()
        p.feed(self.html)
        self.assertEqual(p.urls, [])
        self.assertNotRegex(self.html, r"(?i)https?://|@import|url\(|<link\b|\bimport\s*\(")

    def test_cautions_are_visible_text(self):
        p = _Visible()
        p.feed(self.html)
        text = " ".join(" ".join(p.text).split())
        for phrase in ("cells are independent", "raster is calibrated", "no substitute for field assessment",
                       "local procedures and qualified professionals decide", "invented scenario"):
            self.assertIn(phrase, text.lower())

    def test_talks_to_the_service_routes(self):
        self.assertIn('"/demo/valley.json"', self.html)
        self.assertIn('"/processes/zone-counts/execution"', self.html)
        self.assertIn('"Content-Type": "application/json"', self.html)


CHROMIUM = shutil.which("chromium") or shutil.which("chromium-browser")


@unittest.skipUnless(CHROMIUM, "chromium not installed (apt-get install -y chromium)")
class PageRendered(unittest.TestCase):
    """Loads the page in headless Chromium against the stand-in and reads the DOM it builds."""

    @classmethod
    def setUpClass(cls):
        cls.data = tempfile.mkdtemp()
        doc = load_valley()
        for name, change in (("valley.json", None), ("valley-high.json", ("total", 460)), ("valley-bad.json", ("cell", 99999))):
            d = json.loads(json.dumps(doc))
            if change and change[0] == "total":
                d["evidence"]["total"] = change[1]
            if change and change[0] == "cell":
                d["zones"][2]["cells"][3] = change[1]
            with open(os.path.join(cls.data, name), "w", encoding="utf-8") as f:
                json.dump(d, f)
        with open(os.path.join(cls.data, "results.json"), "w", encoding="utf-8") as f:
            json.dump(eval_valley(), f)
        cls.server, cls.url = stand_in.start(zonetally(), data_dir=cls.data)

    @classmethod
    def tearDownClass(cls):
        cls.server.shutdown()
        cls.server.server_close()
        shutil.rmtree(cls.data)

    def dom(self, query="", base=None):
        with tempfile.TemporaryDirectory() as profile:
            run = subprocess.run(
                [CHROMIUM, "--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking",
                 "--disable-component-update", "--disable-sync", "--no-first-run", f"--user-data-dir={profile}",
                 "--virtual-time-budget=8000", "--dump-dom", f"{base or self.url}/demo{query}"],
                capture_output=True, text=True, timeout=120)
        self.assertEqual(run.returncode, 0, run.stderr[-2000:])
        return run.stdout

    def test_live_results_fill_the_table_and_total(self):
        html = self.dom()
        self.assertEqual(len(re.findall(r'<tr[^>]*data-index="\d+"', html)), len(load_valley()["zones"]))
        self.assertIn("observed total <b>371</b>", html)
        self.assertRegex(html, r'<div id="problem" class="problem" hidden')
        self.assertIn("Results: POST /processes/zone-counts/execution, synchronous", html)

    def test_saved_results_via_query_parameter(self):
        html = self.dom("?results=/demo/results.json&zone=sawpit-gully")
        self.assertIn('<span id="chart-zone">sawpit-gully</span>', html)
        self.assertIn("a saved results document", html)

    def test_implausible_total_shows_the_warning(self):
        html = self.dom("?request=/demo/valley-high.json")
        self.assertIn("Warning: the observed total is implausible", html)

    def test_too_large_for_sync_falls_back_to_a_polled_job(self):
        server, url = stand_in.start(zonetally(), data_dir=self.data, sync_cells=1000)
        try:
            seen = server.RequestHandlerClass.headers_seen
            html = self.dom("", base=url)
            self.assertEqual(len(re.findall(r'<tr[^>]*data-index="\d+"', html)), len(load_valley()["zones"]))
            self.assertIn("/processes/zone-counts/execution, asynchronous", html)
            self.assertEqual([prefer for _, prefer in seen], ["", "respond-async"])
            # A job that fails shows the problem document its results carry.
            html = self.dom("?request=/demo/valley-bad.json", base=url)
            self.assertIn("the job failed: invalid inputs", html)
            self.assertIn("/zones/2/cells/3", html)
        finally:
            server.shutdown()
            server.server_close()

    def test_rejected_inputs_show_the_problem_document(self):
        html = self.dom("?request=/demo/valley-bad.json")
        self.assertIn("computing: invalid inputs", html)
        self.assertIn("/zones/2/cells/3", html)
        self.assertIn("status 400", html)


class _Browser:
    """Headless Chromium driven over the DevTools protocol on a pipe (fds 3 and 4), stdlib only."""

    def __init__(self, url):
        r_in, w_in = os.pipe()    # we write, Chromium reads on fd 3
        r_out, w_out = os.pipe()  # Chromium writes on fd 4, we read
        self.profile = tempfile.mkdtemp()
        self.proc = subprocess.Popen(
            ["bash", "-c", f'exec "$0" "$@" 3<&{r_in} 4>&{w_out}', CHROMIUM, "--headless", "--no-sandbox",
             "--disable-gpu", "--disable-background-networking", "--disable-component-update", "--disable-sync",
             "--no-first-run", f"--user-data-dir={self.profile}", "--window-size=1280,900",
             "--remote-debugging-pipe", "about:blank"],
            pass_fds=(r_in, w_out), stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
        os.close(r_in)
        os.close(w_out)
        self.out = os.fdopen(w_in, "wb", buffering=0)
        self.inp = os.fdopen(r_out, "rb", buffering=0)
        self.buf, self.next_id, self.session = b"", 0, None
        target = self.call("Target.createTarget", {"url": url})["targetId"]
        self.session = self.call("Target.attachToTarget", {"targetId": target, "flatten": True})["sessionId"]

    def call(self, method, params=None):
        self.next_id += 1
        msg = {"id": self.next_id, "method": method, "params": params or {}}
        if self.session:
            msg["sessionId"] = self.session
        self.out.write(json.dumps(msg).encode() + b"\0")
        while True:
            while b"\0" not in self.buf:
                chunk = self.inp.read(1 << 16)
                if not chunk:
                    raise RuntimeError("chromium closed the DevTools pipe")
                self.buf += chunk
            raw, self.buf = self.buf.split(b"\0", 1)
            reply = json.loads(raw)
            if reply.get("id") == self.next_id:
                if "error" in reply:
                    raise RuntimeError(f"{method}: {reply['error']}")
                return reply["result"]

    def eval(self, expr):
        return self.call("Runtime.evaluate", {"expression": expr, "returnByValue": True})["result"].get("value")

    def wait_for(self, expr, timeout=30):
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            if self.eval(expr):
                return
            time.sleep(0.1)
        raise AssertionError(f"timed out waiting for {expr}")

    def click(self, x, y):
        for kind in ("mousePressed", "mouseReleased"):
            self.call("Input.dispatchMouseEvent", {"type": kind, "x": x, "y": y, "button": "left", "clickCount": 1})

    def key(self, key, code):
        for kind in ("keyDown", "keyUp"):
            self.call("Input.dispatchKeyEvent", {"type": kind, "key": key, "code": code, "windowsVirtualKeyCode": {"ArrowDown": 40}.get(key, 0)})

    def close(self):
        try:
            self.call("Browser.close")
            self.proc.wait(10)
        except Exception:
            self.proc.kill()
            self.proc.wait(10)
        shutil.rmtree(self.profile, ignore_errors=True)


@unittest.skipUnless(CHROMIUM, "chromium not installed (apt-get install -y chromium)")
class PageInteractive(unittest.TestCase):
    """Clicks the map and the table in headless Chromium and reads which zone the chart shows."""

    @classmethod
    def setUpClass(cls):
        cls.server, url = stand_in.start(zonetally())
        cls.browser = _Browser(url + "/demo")
        cls.browser.wait_for(f"document.querySelectorAll('tr[data-index]').length === {len(load_valley()['zones'])}")

    @classmethod
    def tearDownClass(cls):
        cls.browser.close()
        cls.server.shutdown()
        cls.server.server_close()

    def shown(self):
        return self.browser.eval("document.getElementById('chart-zone').textContent")

    def selected_row(self):
        return self.browser.eval("document.querySelector('tr.selected td').textContent")

    def test_clicking_a_zone_on_the_map_selects_it(self):
        doc = load_valley()
        spec = next(z for z in doc["zones"] if z["id"] == "sawpit-gully")
        cells = zone_cells(spec, 120)
        cell = cells[len(cells) // 2]
        self.browser.eval("document.getElementById('map').scrollIntoView()")
        rect = self.browser.eval("(() => { const r = document.getElementById('map').getBoundingClientRect();"
                                 " return [r.left, r.top, r.width]; })()")
        size = rect[2] / 120
        self.browser.click(rect[0] + (cell % 120 + 0.5) * size, rect[1] + (cell // 120 + 0.5) * size)
        self.assertEqual(self.shown(), "sawpit-gully")
        self.assertEqual(self.selected_row(), "sawpit-gully")
        # A cell in no zone (the nodata corner, row 0, last column) leaves the selection alone.
        self.browser.click(rect[0] + 119.5 * size, rect[1] + 0.5 * size)
        self.assertEqual(self.shown(), "sawpit-gully")

    def test_clicking_a_row_and_arrow_keys_select_zones(self):
        ids = [z["id"] for z in load_valley()["zones"]]
        i = ids.index("north-road")
        self.browser.eval(f"document.querySelector('tr[data-index=\"{i}\"]').scrollIntoView()")
        box = self.browser.eval(f"(() => {{ const r = document.querySelector('tr[data-index=\"{i}\"]').getBoundingClientRect();"
                                " return [r.left + 20, r.top + r.height / 2]; })()")
        self.browser.click(*box)
        self.assertEqual(self.shown(), "north-road")
        self.browser.eval(f"document.querySelector('tr[data-index=\"{i}\"]').focus()")
        self.browser.key("ArrowDown", "ArrowDown")
        self.assertEqual(self.shown(), ids[i + 1])
        self.assertEqual(self.selected_row(), ids[i + 1])
        # The chart's facts are the selected zone's numbers from the results.
        res = {z["id"]: z for z in eval_valley()["zones"]}[ids[i + 1]]
        facts = self.browser.eval("document.getElementById('facts').textContent")
        self.assertIn(f"{res['mean']:.2f} (sd {res['sd']:.2f})", facts)


if __name__ == "__main__":
    unittest.main()

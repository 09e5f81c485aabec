#!/usr/bin/env python3
"""Consistency checks of the deploy files. They do not build an image or start a cluster (nothing
here can); they check that the files agree with each other and with what the service offers.

    python3 deploy/test_deploy.py -v

Needs python3; the YAML checks need PyYAML (pip install pyyaml) and are skipped without it. The
check against `zonetally serve --help` runs when the binary ($ZONETALLY, else
target/release/zonetally) has the `serve` subcommand, and is skipped before it does.
"""

import os
import re
import shutil
import subprocess
import unittest

DEPLOY = os.path.dirname(os.path.abspath(__file__))
ROOT = os.path.dirname(DEPLOY)

try:
    import yaml
except ImportError:  # pragma: no cover - depends on the machine
    yaml = None


def read(name):
    with open(os.path.join(DEPLOY, name), encoding="utf-8") as f:
        return f.read()


def all_text():
    out = []
    for base, _, files in os.walk(DEPLOY):
        for name in files:
            if name.endswith((".yaml", ".md")) or name.startswith("Dockerfile"):
                with open(os.path.join(base, name), encoding="utf-8") as f:
                    out.append(f.read())
    return "\n".join(out)


class Dockerfile(unittest.TestCase):
    def setUp(self):
        self.text = read("Dockerfile")
        self.lines = [line for line in self.text.splitlines() if line.strip() and not line.lstrip().startswith("#")]

    def test_two_stages_release_build_slim_runtime(self):
        froms = [line.split()[1] for line in self.lines if line.startswith("FROM ")]
        self.assertEqual(len(froms), 2, froms)
        self.assertTrue(froms[0].startswith("rust:1"), froms)
        self.assertRegex(froms[1], r"^debian:[a-z]+-slim$")
        # The build image's Debian release must match the runtime's, or glibc may not.
        self.assertEqual(froms[0].split("-", 1)[1], froms[1].split(":")[1].removesuffix("-slim"))
        self.assertIn("cargo build --release", self.text)
        self.assertIn("COPY --from=build", self.text)

    def test_non_root_serve_and_healthcheck(self):
        user = [line.split()[1] for line in self.lines if line.startswith("USER ")]
        self.assertEqual(len(user), 1)
        self.assertNotIn(user[0].split(":")[0], ("0", "root"))
        self.assertRegex(self.text, r'CMD \["serve", "--bind", "0\.0\.0\.0:8080"\]')
        self.assertIn('ENTRYPOINT ["zonetally"]', self.text)
        self.assertIn("EXPOSE 8080", self.text)
        self.assertRegex(self.text, r"HEALTHCHECK .*\n?.*http://127\.0\.0\.1:8080/healthz")
        # The health check runs curl, so the runtime stage must install it.
        runtime = self.text.split("FROM debian", 1)[1]
        self.assertRegex(runtime, r"apt-get install[^\n]*\bcurl\b")


class OnlyTheAgreedSettings(unittest.TestCase):
    def test_only_bind_flag_and_env(self):
        text = all_text()
        self.assertEqual(set(re.findall(r"ZONETALLY_[A-Z_]+", text)) - {"ZONETALLY_"}, {"ZONETALLY_BIND"})
        live = "\n".join(
            line for name in ("Dockerfile", "compose.yaml", "k8s/deployment.yaml")
            for line in read(name).splitlines() if not line.lstrip().startswith("#"))
        flags = set(re.findall(r'"(--[a-z-]+)"', live))
        self.assertEqual(flags, {"--bind"})

    def test_readme_says_ci_does_not_exercise_them(self):
        self.assertIn("not exercised by CI", read("README.md"))


@unittest.skipUnless(yaml, "PyYAML not installed (pip install pyyaml)")
class Manifests(unittest.TestCase):
    def test_compose_runs_the_service_only(self):
        doc = yaml.safe_load(read("compose.yaml"))
        self.assertEqual(list(doc["services"]), ["zonetally"])
        svc = doc["services"]["zonetally"]
        self.assertEqual(svc["build"]["dockerfile"], "deploy/Dockerfile")
        self.assertEqual(svc["command"], ["serve", "--bind", "0.0.0.0:8080"])
        self.assertIn("127.0.0.1:8080:8080", svc["ports"])
        self.assertIn("# redis:", read("compose.yaml"))

    def test_deployment_probes_resources_and_ports(self):
        dep = yaml.safe_load(read("k8s/deployment.yaml"))
        self.assertEqual((dep["apiVersion"], dep["kind"]), ("apps/v1", "Deployment"))
        spec = dep["spec"]
        self.assertEqual(spec["selector"]["matchLabels"], spec["template"]["metadata"]["labels"])
        pod = spec["template"]["spec"]
        self.assertTrue(pod["securityContext"]["runAsNonRoot"])
        (c,) = pod["containers"]
        self.assertEqual(c["args"], ["serve", "--bind", "0.0.0.0:8080"])
        ports = {p["name"]: p["containerPort"] for p in c["ports"]}
        self.assertEqual(ports, {"http": 8080})
        self.assertEqual(c["readinessProbe"]["httpGet"], {"path": "/readyz", "port": "http"})
        self.assertEqual(c["livenessProbe"]["httpGet"], {"path": "/healthz", "port": "http"})
        self.assertEqual(str(c["resources"]["requests"]["cpu"]), "2")
        self.assertEqual(str(c["resources"]["limits"]["cpu"]), "2")
        self.assertIn("memory", c["resources"]["limits"])

    def test_service_selects_the_pods_and_targets_the_named_port(self):
        dep = yaml.safe_load(read("k8s/deployment.yaml"))
        svc = yaml.safe_load(read("k8s/service.yaml"))
        self.assertEqual(svc["kind"], "Service")
        self.assertEqual(svc["spec"]["selector"], dep["spec"]["template"]["metadata"]["labels"])
        (port,) = svc["spec"]["ports"]
        names = {p["name"] for p in dep["spec"]["template"]["spec"]["containers"][0]["ports"]}
        self.assertIn(port["targetPort"], names)


def binary():
    for cand in (os.environ.get("ZONETALLY"), os.path.join(ROOT, "target", "release", "zonetally"), shutil.which("zonetally")):
        if cand and os.access(cand, os.X_OK):
            return cand
    return None


class ServeFlags(unittest.TestCase):
    def test_serve_takes_bind_and_its_env_var(self):
        exe = binary()
        if not exe:
            self.skipTest("no zonetally binary (cargo build --release)")
        run = subprocess.run([exe, "serve", "--help"], capture_output=True, text=True, timeout=30)
        if run.returncode != 0 and "serve" in run.stderr:
            self.skipTest("this build has no `serve` subcommand yet")
        self.assertEqual(run.returncode, 0, run.stderr)
        self.assertIn("--bind", run.stdout)
        self.assertIn("ZONETALLY_BIND", run.stdout)


if __name__ == "__main__":
    unittest.main()

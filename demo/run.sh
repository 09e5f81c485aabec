#!/usr/bin/env bash
# Runs the invented storm-valley scenario and prints one row per zone.
#
#   demo/run.sh                         evaluate demo/valley.json with `zonetally eval`
#   demo/run.sh --service URL           post it to URL/processes/zone-counts/execution instead
#                                       (as a polled job if the service answers 413 to a sync request)
#   demo/run.sh --request FILE          use another request document
#   demo/run.sh --json                  print the results document instead of the table
#
# The binary is $ZONETALLY if set, else `zonetally` on PATH, else `cargo run --release`.
# Needs bash, python3 (stdlib only) and, with --service, curl.
set -euo pipefail

here="$(cd "$(dirname "${BASH_SOURCE[0]}")" && pwd)"
request="$here/valley.json"
service=""
json=0

while [ $# -gt 0 ]; do
  case "$1" in
    --service) service="${2:?--service needs a URL, e.g. http://127.0.0.1:8080}"; shift 2 ;;
    --request) request="${2:?--request needs a file}"; shift 2 ;;
    --json) json=1; shift ;;
    -h|--help) sed -n '2,11p' "${BASH_SOURCE[0]}" | sed 's/^# \{0,1\}//'; exit 0 ;;
    *) echo "run.sh: unknown argument \`$1\` (try --help)" >&2; exit 2 ;;
  esac
done

work="$(mktemp -d)"
trap 'rm -rf "$work"' EXIT
results="$work/results.json"

# Prints a problem document's title, detail and pointer (or the raw body) to stderr.
show_problem() {
  python3 -c '
import json, sys
try:
    p = json.load(open(sys.argv[1]))
    print("  %s: %s%s" % (p.get("title", "error"), p.get("detail", ""), " (at %s)" % p["pointer"] if p.get("pointer") else ""), file=sys.stderr)
except Exception:
    print(open(sys.argv[1]).read(), file=sys.stderr)
' "$1"
}

# A field of a JSON document (empty when absent).
field() { python3 -c 'import json,sys; print(json.load(open(sys.argv[1])).get(sys.argv[2]) or "")' "$1" "$2"; }

if [ -n "$service" ]; then
  base="${service%/}"
  url="$base/processes/zone-counts/execution"
  # The execute body wraps the request document as the process inputs; `raw` returns the
  # results document itself.
  python3 -c 'import json,sys; print(json.dumps({"inputs": json.load(open(sys.argv[1])), "response": "raw"}))' "$request" >"$work/body.json"
  post() {
    curl -sS -o "$results" -D "$work/headers" -w '%{http_code}' -X POST -H 'Content-Type: application/json' \
      -H 'Accept: application/json' "$@" --data-binary @"$work/body.json" "$url" || { echo "run.sh: cannot reach $url" >&2; exit 1; }
  }
  status="$(post)"
  if [ "$status" = "413" ]; then
    # Too large for a synchronous answer: run it as a job and poll the job until it ends.
    echo "run.sh: too large to answer at once; running it as an asynchronous job" >&2
    status="$(post -H 'Prefer: respond-async')"
  fi
  if [ "$status" = "201" ] || [ "$status" = "202" ]; then
    location="$(sed -n 's/^[Ll]ocation: *\([^[:space:]]*\).*/\1/p' "$work/headers" | tail -1)"
    [ -n "$location" ] || location="/jobs/$(field "$results" jobID)"
    case "$location" in http://*|https://*) ;; *) location="$base$location" ;; esac
    cp "$results" "$work/job.json"
    while :; do
      state="$(field "$work/job.json" status)"
      case "$state" in
        successful) break ;;
        failed|dismissed)
          echo "run.sh: the job $state: $(field "$work/job.json" message)" >&2
          curl -sS -o "$results" -H 'Accept: application/json' "$location/results" && show_problem "$results"
          exit 1 ;;
      esac
      sleep 1
      code="$(curl -sS -o "$work/job.json" -w '%{http_code}' -H 'Accept: application/json' "$location")" || { echo "run.sh: cannot reach $location" >&2; exit 1; }
      [ "$code" = "200" ] || { echo "run.sh: $location answered $code" >&2; show_problem "$work/job.json"; exit 1; }
    done
    url="$location/results"
    status="$(curl -sS -o "$results" -w '%{http_code}' -H 'Accept: application/json' "$url")" || { echo "run.sh: cannot reach $url" >&2; exit 1; }
  fi
  if [ "$status" != "200" ]; then
    echo "run.sh: $url answered $status" >&2
    show_problem "$results"
    exit 1
  fi
else
  if [ -n "${ZONETALLY:-}" ]; then
    "$ZONETALLY" eval "$request" >"$results"
  elif command -v zonetally >/dev/null 2>&1; then
    zonetally eval "$request" >"$results"
  else
    (cd "$here/.." && cargo run --release --quiet -- eval "$request") >"$results"
  fi
fi

if [ "$json" = 1 ]; then
  cat "$results"
  exit 0
fi

python3 - "$results" <<'PY'
import json
import sys

doc = json.load(open(sys.argv[1]))
zones = doc["zones"]
thresholds = [e["k"] for e in zones[0]["exceedance"]] if zones else []
level = zones[0]["interval"]["level"] if zones else 0.9
head = ["zone", "cells", "prior mean", "posterior mean", f"{level:.0%} interval"] + [f"P(>={k})" for k in thresholds]
def exc(p, bound):
    # Below the certified error bound, an exceedance is only known to be at most p + bound.
    if bound > 0 and p < bound:
        return f"<={p + bound:.1e}"
    return f"{p:.3f}" if p >= 0.0005 else f"{p:.1e}"


rows = []
for z in zones:
    iv = z["interval"]
    rows.append(
        [z["id"], str(z["cells"]), f"{z['prior']['mean']:.2f}", f"{z['mean']:.2f}", f"{iv['lower']}-{iv['upper']}"]
        + [exc(e["p"], z["error_bound"]) for e in z["exceedance"]]
    )
widths = [max(len(r[i]) for r in [head] + rows) for i in range(len(head))]
line = lambda r: "  ".join(c.ljust(w) if i == 0 else c.rjust(w) for i, (c, w) in enumerate(zip(r, widths)))
print(line(head))
print("  ".join("-" * w for w in widths))
for r in rows:
    print(line(r))
t = doc["total"]
z = t.get("z_score")
print()
print(
    f"total: observed {t['observed']}, prior mean {t['prior_mean']:.1f} (sd {t['prior_sd']:.1f})"
    + (f", z = {z:.2f}" if z is not None else "")
    + f", P(total >= observed) = {t['p_at_least']:.2e}"
)
if t.get("warning"):
    print(f"warning: {t['warning']}")
print("invented scenario: results assume independent cells and a calibrated raster; they are no")
print("substitute for field assessment, and local procedures and qualified professionals decide.")
PY

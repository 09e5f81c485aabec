#!/usr/bin/env bash
# Schema-driven testing of a running zonetally with schemathesis (PyPI): every operation of the
# served /openapi.json is called with generated requests, valid and invalid, and each answer is
# checked: no 5xx, status codes, content types, headers and bodies as the document says.
#
# Usage: tests/schema/run.sh BIN [SECONDS]   (SECONDS per pass, default 60; two passes: keys
# off, then keys on with a valid key sent). Loopback only.
#
# `positive_data_acceptance` is left out: it expects every schema-valid request to be accepted,
# and the document cannot state the cross-field rules the service checks (cells inside the
# raster, as many values as width x height, a total no larger than the valid cells), so those
# requests are rightly refused with 400.
set -uo pipefail
bin=${1:?usage: run.sh BIN [SECONDS]}
seconds=${2:-60}
work=$(mktemp -d)
trap 'kill $(jobs -p) 2>/dev/null; rm -rf "$work"' EXIT

free_port() {
  python3 -c 'import socket; s = socket.socket(); s.bind(("127.0.0.1", 0)); print(s.getsockname()[1])'
}

pass() {
  local name=$1 port pid rc
  shift
  port=$(free_port)
  "$bin" serve --bind "127.0.0.1:$port" "$@" >"$work/$name.log" 2>&1 &
  pid=$!
  for _ in $(seq 1 100); do
    curl -fsS "http://127.0.0.1:$port/healthz" >/dev/null 2>&1 && break
    sleep 0.1
  done
  echo "-- schemathesis, $name, ${seconds}s"
  schemathesis run "http://127.0.0.1:$port/openapi.json" \
    --checks all --exclude-checks positive_data_acceptance \
    --max-time "$seconds" --workers 2 --no-color ${header:+-H "$header"} >"$work/$name.out" 2>&1
  rc=$?
  # The summary: phases, failures, how many cases were generated.
  sed -n '/^=* SUMMARY/,$p' "$work/$name.out" | grep -v '^\s*$'
  if [ "$rc" -ne 0 ]; then
    sed -n '/^=* FAILURES/,/^=* WARNINGS/p' "$work/$name.out" | head -80
    echo "server log:"
    tail -20 "$work/$name.log"
  fi
  if ! kill -0 "$pid" 2>/dev/null; then
    echo "the server died during the pass"
    rc=1
  fi
  kill "$pid" 2>/dev/null
  wait "$pid" 2>/dev/null
  return "$rc"
}

key=schema-pass-key
printf '%s schema\n' "$(printf %s "$key" | sha256sum | cut -d' ' -f1)" >"$work/keys"
failed=0
header='' pass "keys-off" || failed=1
header="Authorization: Bearer $key" pass "keys-on" --api-keys "$work/keys" || failed=1
exit "$failed"

#!/usr/bin/env bash
# Runs every fuzz target for a bounded time and reports executions per target.
#
# Usage (from anywhere): tests/fuzz/run.sh [SECONDS] [TARGET...]   (default 60 s, all targets)
#
# cargo fuzz passes unstable rustc flags (sanitizer, coverage); RUSTC_BOOTSTRAP=1 lets the one
# stable toolchain of the machine accept them, so no nightly is needed. Each target starts from
# its committed seeds (tests/fuzz/seeds/TARGET) and a working corpus (tests/fuzz/corpus, not
# committed). A crash leaves its input under tests/fuzz/artifacts/TARGET; turn it into a
# regression test in tests/ before fixing it.
set -uo pipefail
root=$(cd "$(dirname "$0")/../.." && pwd)
cd "$root"
seconds=${1:-60}
shift || true
targets=("$@")
[ "${#targets[@]}" -gt 0 ] || targets=(request geojson geotiff engine scenarios)
export RUSTC_BOOTSTRAP=1

if ! command -v cargo-fuzz >/dev/null 2>&1; then
  echo "cargo-fuzz is not installed: cargo install cargo-fuzz" >&2
  exit 2
fi
cargo fuzz build --fuzz-dir tests/fuzz -O >/dev/null 2>tests/fuzz/build.log || {
  tail -30 tests/fuzz/build.log
  exit 1
}

failed=0
for t in "${targets[@]}"; do
  mkdir -p "tests/fuzz/corpus/$t" "tests/fuzz/artifacts/$t"
  log=$(mktemp)
  cargo fuzz run --fuzz-dir tests/fuzz -O "$t" "tests/fuzz/corpus/$t" "tests/fuzz/seeds/$t" -- \
    -max_total_time="$seconds" -rss_limit_mb=2048 -timeout=20 -print_final_stats=1 \
    -artifact_prefix="tests/fuzz/artifacts/$t/" >"$log" 2>&1
  rc=$?
  execs=$(sed -n 's/^stat::number_of_executed_units: *//p' "$log" | tail -1)
  per_sec=$(sed -n 's/^stat::average_exec_per_sec: *//p' "$log" | tail -1)
  cov=$(grep -o 'cov: [0-9]*' "$log" | tail -1)
  if [ "$rc" -eq 0 ]; then
    printf 'fuzz %-8s ok      %10s executions in %ss (%s/s), %s\n' "$t" "${execs:-?}" "$seconds" "${per_sec:-?}" "${cov:-cov: ?}"
  else
    failed=1
    printf 'fuzz %-8s FAILED after %s executions\n' "$t" "${execs:-?}"
    grep -A30 -m1 -E '^(==[0-9]+==ERROR|thread .* panicked|.*deadly signal)' "$log" | head -40
    ls -1 "tests/fuzz/artifacts/$t" | sed 's/^/  crash input: tests\/fuzz\/artifacts\/'"$t"'\//'
  fi
  rm -f "$log"
done
exit "$failed"

#!/usr/bin/env bash
# Sets up (tools/setup.sh), then runs every test in three stages and prints how
# long each took:
#   1. the normal build's CTest suite (build/);
#   2. the same suite under AddressSanitizer + UndefinedBehaviorSanitizer
#      (build-asan/, -DHEADROOM_SANITIZE=ON);
#   3. the fuzz targets, FUZZ_SECONDS each (default 20 here; tools/fuzz.sh).
# Usage: tools/test.sh
#   HEADROOM_TEST_STAGES   which stages to run (default "plain asan fuzz")
#   FUZZ_SECONDS           seconds per fuzz target in stage 3
set -euo pipefail
cd "$(dirname "$0")/.."
jobs=$(nproc)
stages=${HEADROOM_TEST_STAGES:-plain asan fuzz}
timings=()

run_stage() {
  local name=$1
  shift
  local start=$SECONDS
  echo "test.sh: stage $name" >&2
  "$@"
  timings+=("$name: $((SECONDS - start)) s")
}

plain() {
  tools/setup.sh
  ctest --test-dir build --output-on-failure -j"$jobs"
}

asan() {
  # -O1 -g1: half the compile time of -O2 -g, and still file:line in every report.
  cmake -S . -B build-asan -G Ninja -DCMAKE_BUILD_TYPE=RelWithDebInfo -DHEADROOM_SANITIZE=ON \
    -DCMAKE_C_FLAGS_RELWITHDEBINFO="-O1 -g1 -DNDEBUG" -DCMAKE_CXX_FLAGS_RELWITHDEBINFO="-O1 -g1 -DNDEBUG" >/dev/null
  cmake --build build-asan -j"$jobs"
  ctest --test-dir build-asan --output-on-failure -j"$jobs"
}

fuzz() {
  FUZZ_SECONDS=${FUZZ_SECONDS:-20} FUZZ_JOBS=$jobs tools/fuzz.sh
}

total=$SECONDS
for s in $stages; do
  case $s in
    plain | asan | fuzz) run_stage "$s" "$s" ;;
    *) echo "test.sh: unknown stage '$s' (plain, asan, fuzz)" >&2; exit 2 ;;
  esac
done
printf 'test.sh: %s\n' "${timings[@]}" "total: $((SECONDS - total)) s"

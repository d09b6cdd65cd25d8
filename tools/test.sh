#!/usr/bin/env bash
# Sets up (tools/setup.sh), then runs every test in three stages and prints how
# long each took:
#   1. the normal build's CTest suite (build/);
#   2. the same suite under AddressSanitizer + UndefinedBehaviorSanitizer,
#      built with clang 16 in build-asan/ (tools/sanitized_build.sh), less the
#      tests labelled python and package: they run Python example programs and
#      a downstream CMake project, whose C++ side (the CLI, the attach modes)
#      the sanitized CLI and attach tests already reach; stage 1 runs them;
#   3. the fuzz targets from that build, FUZZ_SECONDS each (default 20 here),
#      one per core at a time (tools/fuzz.sh).
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
  tools/sanitized_build.sh
  ctest --test-dir build-asan --output-on-failure -j"$jobs" --label-exclude '^(python|package)$'
}

fuzz() {
  FUZZ_SECONDS=${FUZZ_SECONDS:-20} tools/fuzz.sh
}

total=$SECONDS
for s in $stages; do
  case $s in
    plain | asan | fuzz) run_stage "$s" "$s" ;;
    *) echo "test.sh: unknown stage '$s' (plain, asan, fuzz)" >&2; exit 2 ;;
  esac
done
printf 'test.sh: %s\n' "${timings[@]}" "total: $((SECONDS - total)) s"

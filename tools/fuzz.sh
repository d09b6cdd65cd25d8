#!/usr/bin/env bash
# Builds headroom's libFuzzer targets with clang, ASan and UBSan in build-fuzz/ and
# runs each for a bounded time, failing on any finding (crash, hang, leak,
# sanitizer report, uncaught exception).
# Usage: tools/fuzz.sh [target ...]        (default: every fuzz_* target)
#   FUZZ_SECONDS   seconds per target (default 60)
#   FUZZ_JOBS      build jobs (default 2)
# The working corpus grows in build-fuzz/corpus/<target>/ (seeded from
# tests/fuzz/corpus/<target>/); an input that fails is saved as
# build-fuzz/findings/<target>/crash-* (or leak-*, timeout-*, oom-*) and
# replays with: build-fuzz/tests/fuzz/<target> <that file>
set -euo pipefail
cd "$(dirname "$0")/.."
seconds=${FUZZ_SECONDS:-60}
jobs=${FUZZ_JOBS:-2}
build=build-fuzz
targets=("$@")
if ((${#targets[@]} == 0)); then
  targets=(fuzz_npy fuzz_manifest fuzz_record fuzz_declaration)
  [ -f tests/fuzz/fuzz_budget.cpp ] && targets+=(fuzz_budget)
fi

start=$(date +%s)
cmake -S . -B "$build" -G Ninja -DCMAKE_BUILD_TYPE=RelWithDebInfo \
  -DCMAKE_C_COMPILER=clang -DCMAKE_CXX_COMPILER=clang++ -DHEADROOM_FUZZ=ON -DHEADROOM_SANITIZE=ON >/dev/null
cmake --build "$build" --target "${targets[@]}" -j"$jobs"
echo "fuzz: build took $(($(date +%s) - start)) s"

export ASAN_OPTIONS=${ASAN_OPTIONS:-detect_leaks=1:abort_on_error=1}
export UBSAN_OPTIONS=${UBSAN_OPTIONS:-print_stacktrace=1:halt_on_error=1}
failed=()
summary=()
for t in "${targets[@]}"; do
  corpus="$build/corpus/$t"
  findings="$build/findings/$t"
  mkdir -p "$corpus" "$findings"
  log="$build/findings/$t.log"
  echo "fuzz: $t for ${seconds} s"
  rc=0
  "$build/tests/fuzz/$t" -max_total_time="$seconds" -timeout=10 -rss_limit_mb=2048 -print_final_stats=1 \
    -artifact_prefix="$findings/" "$corpus" "tests/fuzz/corpus/$t" >"$log" 2>&1 || rc=$?
  execs=$(sed -n 's/^stat::number_of_executed_units: *//p' "$log" | tail -1)
  if ((rc != 0)); then
    tail -n 60 "$log" >&2
    failed+=("$t")
    summary+=("$t: FINDING (exit $rc) after ${execs:-?} execs; log $log, inputs in $findings/")
  else
    summary+=("$t: ${execs:-?} execs in ${seconds} s, corpus $(ls "$corpus" | wc -l) files, no finding")
  fi
done
printf 'fuzz: %s\n' "${summary[@]}"
if ((${#failed[@]})); then
  echo "fuzz: findings in ${failed[*]}" >&2
  exit 1
fi

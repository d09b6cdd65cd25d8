#!/usr/bin/env bash
# Runs headroom's libFuzzer targets (clang 16, ASan + UBSan, from the sanitized
# build in build-asan/ that tools/sanitized_build.sh makes) for a bounded time
# each, failing on any finding (crash, hang, leak, sanitizer report, uncaught
# exception).
# Usage: tools/fuzz.sh [target ...]        (default: every fuzz_* target)
#   FUZZ_SECONDS   seconds per target (default 60)
#   FUZZ_PARALLEL  targets fuzzed at once (default: nproc), one core each
# The working corpus grows in build-asan/fuzz-corpus/<target>/ (seeded from
# tests/fuzz/corpus/<target>/); an input that fails is saved as
# build-asan/fuzz-findings/<target>/crash-* (or leak-*, timeout-*, oom-*) and
# replays with: build-asan/tests/fuzz/<target> <that file>
set -euo pipefail
cd "$(dirname "$0")/.."
seconds=${FUZZ_SECONDS:-60}
parallel=${FUZZ_PARALLEL:-$(nproc)}
build=build-asan
targets=("$@")
if ((${#targets[@]} == 0)); then
  targets=()
  for f in tests/fuzz/fuzz_*.cpp; do targets+=("$(basename "$f" .cpp)"); done
fi

start=$(date +%s)
tools/sanitized_build.sh "${targets[@]}"
echo "fuzz: build took $(($(date +%s) - start)) s"

export ASAN_OPTIONS=${ASAN_OPTIONS:-detect_leaks=1:abort_on_error=1}
export UBSAN_OPTIONS=${UBSAN_OPTIONS:-print_stacktrace=1:halt_on_error=1}
# One target: its log, its growing corpus, its findings; exit status is libFuzzer's.
fuzz_one() {
  local t=$1
  mkdir -p "$build/fuzz-corpus/$t" "$build/fuzz-findings/$t"
  "$build/tests/fuzz/$t" -max_total_time="$seconds" -timeout=10 -rss_limit_mb=2048 -print_final_stats=1 \
    -artifact_prefix="$build/fuzz-findings/$t/" "$build/fuzz-corpus/$t" "tests/fuzz/corpus/$t" \
    > "$build/fuzz-findings/$t.log" 2>&1
}

echo "fuzz: ${#targets[@]} targets for ${seconds} s each, $parallel at a time"
declare -A rc=()
running=()
for t in "${targets[@]}"; do
  fuzz_one "$t" &
  running+=("$!:$t")
  if ((${#running[@]} >= parallel)); then
    r=0; wait "${running[0]%%:*}" || r=$?; rc[${running[0]#*:}]=$r; running=("${running[@]:1}")
  fi
done
for job in "${running[@]}"; do
  r=0; wait "${job%%:*}" || r=$?; rc[${job#*:}]=$r
done

failed=()
summary=()
for t in "${targets[@]}"; do
  log="$build/fuzz-findings/$t.log"
  execs=$(sed -n 's/^stat::number_of_executed_units: *//p' "$log" | tail -1)
  if ((rc[$t] != 0)); then
    tail -n 60 "$log" >&2
    failed+=("$t")
    summary+=("$t: FINDING (exit ${rc[$t]}) after ${execs:-?} execs; log $log, inputs in $build/fuzz-findings/$t/")
  else
    summary+=("$t: ${execs:-?} execs in ${seconds} s, corpus $(ls "$build/fuzz-corpus/$t" | wc -l) files, no finding")
  fi
done
printf 'fuzz: %s\n' "${summary[@]}"
if ((${#failed[@]})); then
  echo "fuzz: findings in ${failed[*]}" >&2
  exit 1
fi

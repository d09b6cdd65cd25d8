#!/usr/bin/env bash
# Prints the reliability figures README.md quotes, measured now on this machine:
# how many tests provoke kernel faults, how many feed headroom malformed or
# hostile files, and how many inputs each fuzz target ran.
# Usage: tools/reliability_figures.sh      (after tools/setup.sh has built build/)
#   FUZZ_SECONDS   seconds per fuzz target (default 60; 0 skips fuzzing)
set -euo pipefail
cd "$(dirname "$0")/.."

# Test names say what they provoke (<file>.<Suite>.<Test>); these patterns pick
# the tests whose subject is a misbehaving kernel, and those whose subject is a
# malformed, hostile or unwritable file.
faults='attach_hostile_test|attach_isolation_test|attach_external_test\.Programs|cli_run_test\.Cli\.CtrlC'
files='untrusted|full_disk|Refuse|Malformed|Reject|BadInput|BadRequests|InputError|Garbage|BeyondDouble|Mismatch'

count() {  # runs the tests matching $1 and prints "<passed> of <total>"
  local log
  log=$(ctest --test-dir build -R "$1" -j"$(nproc)" 2>&1) || { echo "$log" >&2; return 1; }
  sed -n 's/^.*tests passed, \([0-9]*\) tests failed out of \([0-9]*\)$/\2 \1/p' <<< "$log" |
    { read -r total failed; echo "$((total - failed)) of $total"; }
}

echo "kernel faults provoked: $(count "$faults") tests pass  (ctest --test-dir build -R '$faults')"
echo "malformed or hostile files refused: $(count "$files") tests pass  (ctest --test-dir build -R '$files')"
if [ "${FUZZ_SECONDS:-60}" != 0 ]; then
  FUZZ_SECONDS=${FUZZ_SECONDS:-60} tools/fuzz.sh 2>&1 | grep '^fuzz: fuzz_'
fi

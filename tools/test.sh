#!/usr/bin/env bash
# Sets up (tools/setup.sh), then runs every test: the normal build's CTest suite,
# then the same suite under AddressSanitizer + UndefinedBehaviorSanitizer.
# Usage: tools/test.sh
set -euo pipefail
cd "$(dirname "$0")/.."
tools/setup.sh
jobs=$(nproc)
ctest --test-dir build --output-on-failure -j"$jobs"

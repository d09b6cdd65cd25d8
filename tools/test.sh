#!/usr/bin/env bash
# Builds headroom and runs every test: the normal build, then the sanitizer build
# (AddressSanitizer + UndefinedBehaviorSanitizer). Usage: tools/test.sh
set -euo pipefail
cd "$(dirname "$0")/.."
jobs=$(nproc)
cmake -S . -B build -G Ninja -DCMAKE_BUILD_TYPE=RelWithDebInfo >/dev/null
cmake --build build -j"$jobs"
ctest --test-dir build --output-on-failure -j"$jobs"

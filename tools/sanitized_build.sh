#!/usr/bin/env bash
# Configures and builds build-asan/: every target (the whole test suite and the
# libFuzzer targets) with clang 16, AddressSanitizer and UndefinedBehaviorSanitizer.
# One sanitized build serves both tools/test.sh's second stage and tools/fuzz.sh.
# clang 16, not Debian's default clang 14: clang 14 has no _Float16 on x86-64,
# which tests/external/formats_vs_float16_test.cpp checks against.
# -O1 -g1: about half the compile time of -O2 -g, and still file:line in reports.
# Usage: tools/sanitized_build.sh [target ...]     (default: all)
#   BUILD_JOBS   build jobs (default: nproc)
set -euo pipefail
cd "$(dirname "$0")/.."
for tool in clang-16 clang++-16; do
  if ! command -v "$tool" > /dev/null; then
    echo "sanitized_build.sh: $tool not found; install the Debian packages clang-16 and libclang-rt-16-dev" \
      "(tools/setup.sh installs everything in .ci/packages.txt)" >&2
    exit 2
  fi
done
flags="-O1 -g1 -DNDEBUG"
cmake -S . -B build-asan -G Ninja -DCMAKE_BUILD_TYPE=RelWithDebInfo \
  -DCMAKE_C_COMPILER=clang-16 -DCMAKE_CXX_COMPILER=clang++-16 \
  -DHEADROOM_SANITIZE=ON -DHEADROOM_FUZZ=ON \
  -DCMAKE_C_FLAGS_RELWITHDEBINFO="$flags" -DCMAKE_CXX_FLAGS_RELWITHDEBINFO="$flags" > /dev/null
targets=()
(($# > 0)) && targets=(--target "$@")
cmake --build build-asan -j"${BUILD_JOBS:-$(nproc)}" "${targets[@]}"

#!/bin/sh
# Proves headroom's installed CMake package works for a user: installs from an
# existing build tree into a temporary prefix, configures examples/downstream
# against it (find_package(headroom)), builds it and runs its tests
# (headroom_add_qualification and WithinBudget).
# Usage: tools/check_downstream.sh <headroom build dir>
set -eu
build=${1:?usage: tools/check_downstream.sh <headroom build dir>}
src=$(cd "$(dirname "$0")/.." && pwd)
tmp=$(mktemp -d "${TMPDIR:-/tmp}/headroom-downstream.XXXXXX")
trap 'rm -rf "$tmp"' EXIT INT TERM

cmake --install "$build" --prefix "$tmp/prefix" > "$tmp/install.log"
generator=
if command -v ninja > /dev/null 2>&1; then generator="-G Ninja"; fi
# The consumer is built with headroom's own compilers (one C++ ABI, one
# sanitizer runtime). A sanitized build installs sanitized static libraries:
# their consumer must link the sanitizer runtimes too, so it gets the same flags.
cc=$(sed -n 's/^CMAKE_C_COMPILER:[A-Z]*=//p' "$build/CMakeCache.txt")
cxx=$(sed -n 's/^CMAKE_CXX_COMPILER:[A-Z]*=//p' "$build/CMakeCache.txt")
flags=
if grep -q '^HEADROOM_SANITIZE:BOOL=ON' "$build/CMakeCache.txt" 2>/dev/null; then
  flags="-fsanitize=address,undefined -fno-omit-frame-pointer"
fi
# shellcheck disable=SC2086  # $generator is one or two words on purpose
cmake -S "$src/examples/downstream" -B "$tmp/build" $generator -DCMAKE_BUILD_TYPE=Release \
      ${cc:+"-DCMAKE_C_COMPILER=$cc"} ${cxx:+"-DCMAKE_CXX_COMPILER=$cxx"} \
      -DCMAKE_PREFIX_PATH="$tmp/prefix" -DHEADROOM_SOURCE_DIR="$src" \
      ${flags:+"-DCMAKE_C_FLAGS=$flags"} ${flags:+"-DCMAKE_CXX_FLAGS=$flags"} ${flags:+"-DCMAKE_EXE_LINKER_FLAGS=$flags"} \
      ${flags:+"-DCMAKE_MODULE_LINKER_FLAGS=$flags"}
cmake --build "$tmp/build" -j2
ctest --test-dir "$tmp/build" --output-on-failure

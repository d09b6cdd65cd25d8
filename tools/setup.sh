#!/usr/bin/env bash
# Installs the Debian packages headroom needs (when missing) and builds it in build/
# (Release at -O2: no debug info to write, and clear of GCC 12's -O3 false-positive
# string warnings).
# Usage: tools/setup.sh            (as root, or with sudo available)
set -euo pipefail
cd "$(dirname "$0")/.."
missing=()
for p in $(cat .ci/packages.txt); do
  dpkg-query -W -f='${Status}' "$p" 2>/dev/null | grep -q "install ok installed" || missing+=("$p")
done
if ((${#missing[@]})); then
  echo "headroom setup: installing ${missing[*]}" >&2
  sudo=""
  [ "$(id -u)" -eq 0 ] || sudo="sudo"
  $sudo env DEBIAN_FRONTEND=noninteractive apt-get update
  $sudo env DEBIAN_FRONTEND=noninteractive apt-get install -y --no-install-recommends "${missing[@]}"
fi
cmake -S . -B build -G Ninja -DCMAKE_BUILD_TYPE=Release "-DCMAKE_CXX_FLAGS_RELEASE=-O2 -DNDEBUG" >/dev/null
cmake --build build -j"$(nproc)"

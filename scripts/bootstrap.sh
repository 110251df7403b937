#!/usr/bin/env bash
# Installs what is missing (Debian packages, idempotent), builds galena, then either renders the bundled
# demo pack (`demo`), runs the whole test suite (`test`), or runs it again under ASan + UBSan (`sanitize`). Run from anywhere; needs root or sudo only
# when a package is missing.
set -euo pipefail
mode="${1:-demo}"
here="$(cd "$(dirname "${BASH_SOURCE[0]}")/.." && pwd)"
build="${GALENA_BUILD_DIR:-$here/build}"

build_pkgs=(build-essential cmake pkg-config libboost-dev libeigen3-dev libsndfile1-dev libfmt-dev doctest-dev
            libsamplerate0-dev libfftw3-dev libtomlplusplus-dev libcli11-dev nlohmann-json3-dev gnuplot-nox espeak-ng)
test_pkgs=(ngspice sox python3-numpy python3-scipy python3-pil chromium)
case "$mode" in
  demo) pkgs=("${build_pkgs[@]}") ;;
  test|sanitize) pkgs=("${build_pkgs[@]}" "${test_pkgs[@]}") ;;
  *) echo "usage: $0 demo|test|sanitize" >&2; exit 2 ;;
esac

missing=()
for p in "${pkgs[@]}"; do
  dpkg-query -W -f='${Status}' "$p" 2>/dev/null | grep -q "install ok installed" || missing+=("$p")
done
if ((${#missing[@]})); then
  echo "bootstrap: installing ${missing[*]}"
  sudo_cmd=()
  [ "$(id -u)" -eq 0 ] || sudo_cmd=(sudo)
  "${sudo_cmd[@]}" env DEBIAN_FRONTEND=noninteractive apt-get update -qq
  "${sudo_cmd[@]}" env DEBIAN_FRONTEND=noninteractive apt-get install -y -qq "${missing[@]}"
fi

jobs="$(nproc 2>/dev/null || echo 2)"
if [ "$mode" = sanitize ]; then
  # The whole suite again under AddressSanitizer + UndefinedBehaviorSanitizer (the installed-package
  # consumer test is left out: it would build a consumer without the sanitizer runtime).
  san="${GALENA_SANITIZE_BUILD_DIR:-$here/build-asan}"
  cmake -S "$here" -B "$san" -DCMAKE_BUILD_TYPE=RelWithDebInfo -DGALENA_SANITIZE=ON -DGALENA_BUILD_TESTS=ON
  cmake --build "$san" -j "$jobs"
  ctest --test-dir "$san" --output-on-failure -j "$jobs" -E package_consumer
  exit 0
fi
cmake -S "$here" -B "$build" -DCMAKE_BUILD_TYPE=Release -DGALENA_BUILD_TESTS=$([ "$mode" = test ] && echo ON || echo OFF)
cmake --build "$build" -j "$jobs"

if [ "$mode" = demo ]; then
  "$build/tools/galena" demo --out "$here/demo-out"
  echo "bootstrap: the demo pack is in $here/demo-out (open demo-out/index.html)"
else
  ctest --test-dir "$build" --output-on-failure -j "$jobs"
fi

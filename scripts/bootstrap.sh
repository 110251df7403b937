#!/usr/bin/env bash
# Installs what is missing (Debian packages, idempotent), builds galena, then either renders the bundled
# demo pack (`demo`), runs the whole test suite (`test`), runs it again under ASan + UBSan (`sanitize`), or
# builds the libFuzzer harnesses with clang and runs each deterministically on its seed corpus (`fuzz`, CI:
# fixed seed and execution count) or open-ended (`fuzz-open`, for developers). Run from anywhere; needs root or sudo only when a package
# is missing.
set -euo pipefail
mode="${1:-demo}"
here="$(cd "$(dirname "${BASH_SOURCE[0]}")/.." && pwd)"
build="${GALENA_BUILD_DIR:-$here/build}"

build_pkgs=(build-essential cmake pkg-config libboost-dev libeigen3-dev libsndfile1-dev libfmt-dev doctest-dev
            libsamplerate0-dev libfftw3-dev libtomlplusplus-dev libcli11-dev nlohmann-json3-dev gnuplot-nox espeak-ng
            libcpp-httplib-dev)
test_pkgs=(ngspice sox python3-numpy python3-scipy python3-pil chromium util-linux mount)
fuzz_pkgs=(clang-14 libclang-rt-14-dev)
case "$mode" in
  demo) pkgs=("${build_pkgs[@]}") ;;
  test|sanitize) pkgs=("${build_pkgs[@]}" "${test_pkgs[@]}") ;;
  fuzz|fuzz-open) pkgs=("${build_pkgs[@]}" "${fuzz_pkgs[@]}") ;;
  *) echo "usage: $0 demo|test|sanitize|fuzz|fuzz-open" >&2; exit 2 ;;
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
  # The suite again under AddressSanitizer + UndefinedBehaviorSanitizer, less the tests labelled `slow`
  # (long physics references, run once in the Release pass) and the installed-package consumer test (it
  # would build a consumer without the sanitizer runtime). Built at -O1 with line tables only (-g1: reports
  # still name file and line): about 2.2x quicker to compile than -O2 -g (measured on lib/scenario.cpp under
  # ASan: 24 s against 54 s of CPU), and compiling was most of this step.
  san="${GALENA_SANITIZE_BUILD_DIR:-$here/build-asan}"
  cmake -S "$here" -B "$san" -DCMAKE_BUILD_TYPE=RelWithDebInfo -DCMAKE_CXX_FLAGS_RELWITHDEBINFO="-O1 -g1" -DGALENA_SANITIZE=ON \
        -DGALENA_BUILD_TESTS=ON
  cmake --build "$san" -j "$jobs"
  ctest --test-dir "$san" --output-on-failure -j "$jobs" -E package_consumer -LE slow
  exit 0
fi
if [ "$mode" = fuzz ] || [ "$mode" = fuzz-open ]; then
  # libFuzzer harnesses (tests/fuzz): clang 14 with ASan + UBSan, assertions on (-O1 -g, no NDEBUG); toml++
  # linked as its shared library. New inputs go to a scratch corpus; the seeds in tests/fuzz/corpus stay as
  # they are. A crash, leak, sanitizer report or broken property fails this step and leaves the input in
  # build-fuzz/crash-*.
  #   fuzz       (CI): deterministic. A fixed seed (-seed=1) and a fixed number of executions per harness
  #              (GALENA_FUZZ_RUNS_SCENARIO, default 200000; GALENA_FUZZ_RUNS_WAV, default 10000), starting
  #              from the seed corpus; max_total_time only bounds a very slow machine.
  #   fuzz-open  (developers): open-ended, a random seed, GALENA_FUZZ_SECONDS per harness (default 600).
  #              Copy what it finds (build-fuzz/crash-*) into tests/fuzz/corpus/<harness>/ as a seed named
  #              found-*, and fix it.
  fz="${GALENA_FUZZ_BUILD_DIR:-$here/build-fuzz}"
  cmake -S "$here" -B "$fz" -DCMAKE_CXX_COMPILER=clang++-14 -DCMAKE_BUILD_TYPE=RelWithDebInfo \
        -DCMAKE_CXX_FLAGS_RELWITHDEBINFO="-O1 -g" -DGALENA_FUZZ=ON -DGALENA_BUILD_TESTS=OFF -DGALENA_BUILD_TOOLS=OFF
  cmake --build "$fz" -j "$jobs" --target scenario_fuzz wav_fuzz
  for h in scenario wav; do
    work="$fz/corpus-$h"
    rm -rf "$work"
    mkdir -p "$work"
    max_len=8192
    [ "$h" = wav ] && max_len=65536
    if [ "$mode" = fuzz ]; then
      runs=200000
      [ "$h" = wav ] && runs=10000
      [ "$h" = scenario ] && runs="${GALENA_FUZZ_RUNS_SCENARIO:-$runs}"
      [ "$h" = wav ] && runs="${GALENA_FUZZ_RUNS_WAV:-$runs}"
      limits=(-seed=1 -runs="$runs" -max_total_time=900)
      echo "bootstrap: fuzzing $h deterministically: seed 1, $runs executions"
    else
      secs="${GALENA_FUZZ_SECONDS:-600}"
      limits=(-max_total_time="$secs")
      echo "bootstrap: fuzzing $h open-ended for $secs s"
    fi
    "$fz/tests/fuzz/${h}_fuzz" "${limits[@]}" -timeout=30 -rss_limit_mb=2048 -max_len="$max_len" \
        -print_final_stats=1 -artifact_prefix="$fz/crash-$h-" "$work" "$here/tests/fuzz/corpus/$h" > "$fz/$h.log" 2>&1 \
      || { tail -n 60 "$fz/$h.log"; echo "bootstrap: fuzz $h FAILED (input in $fz/crash-$h-*)" >&2; exit 1; }
    done_runs="$(sed -n 's/^stat::number_of_executed_units: *//p' "$fz/$h.log")"
    echo "fuzz $h: ${done_runs:-?} executions, corpus $(ls "$work" | wc -l) new + $(ls "$here/tests/fuzz/corpus/$h" | wc -l) seeds, no findings"
  done
  exit 0
fi
# `test` builds the suite; `demo` leaves it out of a new build folder, but does not take it out of one that
# `test` configured (its test programs would go stale while ctest still lists them).
tests_flag=(-DGALENA_BUILD_TESTS=ON)
if [ "$mode" != test ]; then
  tests_flag=()
  [ -f "$build/CMakeCache.txt" ] || tests_flag=(-DGALENA_BUILD_TESTS=OFF)
fi
cmake -S "$here" -B "$build" -DCMAKE_BUILD_TYPE=Release "${tests_flag[@]}"
cmake --build "$build" -j "$jobs"

if [ "$mode" = demo ]; then
  # demo-out/ belongs to this command: running the set-up again refreshes it.
  "$build/tools/galena" demo --out "$here/demo-out" --overwrite
  echo "bootstrap: the demo pack is in $here/demo-out (open demo-out/index.html)"
else
  ctest --test-dir "$build" --output-on-failure -j "$jobs"
fi

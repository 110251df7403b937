#!/usr/bin/env bash
# Fresh-clone check: the README's first set-up command (`bash scripts/bootstrap.sh demo`) run twice, as a
# new user would; the second run must succeed too (it refreshes demo-out/). Then: the build printed no
# warning, the demo pack is in place, and the set-up changed no tracked file.
#
#   bash scripts/fresh_clone_check.sh          clones HEAD into a scratch folder and runs it there (a full
#                                              library + tool build: a few minutes on two cores)
#   bash scripts/fresh_clone_check.sh --here   runs it in this checkout, reusing its build folder
#                                              (GALENA_BUILD_DIR, default build/): for CI, whose checkout is a
#                                              clean clone, right after `bootstrap.sh test`; removes
#                                              demo-out/ first so that the first run starts as in a clone
#
# Needs what `bootstrap.sh demo` needs (it installs what is missing). GALENA_FRESH_KEEP=1 keeps the
# scratch folder of the first form.
set -euo pipefail
here="$(cd "$(dirname "${BASH_SOURCE[0]}")/.." && pwd)"
logs="$(mktemp -d "${TMPDIR:-/tmp}/galena-fresh-clone.XXXXXXXX")"
if [ "${1:-}" = --here ]; then
  repo="$here"
  rm -rf "$repo/demo-out"
  [ "${GALENA_FRESH_KEEP:-0}" = 1 ] || trap 'rm -rf "$logs"' EXIT
elif [ -z "${1:-}" ]; then
  [ "${GALENA_FRESH_KEEP:-0}" = 1 ] || trap 'rm -rf "$logs"' EXIT
  repo="$logs/galena"
  git clone --quiet "$here" "$repo"
  unset GALENA_BUILD_DIR # the clone builds in its own build/
else
  echo "usage: $0 [--here]" >&2
  exit 2
fi
cd "$repo"
for run in 1 2; do
  echo "fresh-clone: bash scripts/bootstrap.sh demo (run $run of 2, in $repo)"
  start=$(date +%s)
  if ! bash scripts/bootstrap.sh demo > "$logs/run-$run.log" 2>&1; then
    tail -n 40 "$logs/run-$run.log"
    echo "fresh-clone: run $run of bash scripts/bootstrap.sh demo FAILED (log above)" >&2
    exit 1
  fi
  echo "fresh-clone: run $run passed in $(( $(date +%s) - start )) s"
done
# A newcomer reads a compiler warning as a broken build: the build must print none.
if grep -E ": warning: |CMake Warning" "$logs/run-1.log" "$logs/run-2.log"; then
  echo "fresh-clone: the build printed warnings (above)" >&2
  exit 1
fi
for f in demo-out/index.html demo-out/table.csv demo-out/playlist.wav demo-out/dial/dial-960k-1030k/dial.wav demo-out/dial/dial-960k-1030k/survey.csv; do
  [ -s "$f" ] || { echo "fresh-clone: $f is missing after the set-up" >&2; exit 1; }
done
if [ -n "$(git status --porcelain --untracked-files=no)" ]; then
  git status --short >&2
  echo "fresh-clone: the set-up changed tracked files" >&2
  exit 1
fi
echo "fresh-clone: the first set-up command ran twice"

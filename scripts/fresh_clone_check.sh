#!/usr/bin/env bash
# Fresh-clone check (CI): clones this repository's committed HEAD into a scratch folder and runs the
# README's first set-up command there twice, as a new user would; the second run must succeed too (it
# refreshes demo-out/). Then it checks that the demo pack is in place and that nothing else appeared in
# the clone's tracked tree. Needs what `bootstrap.sh demo` needs (it installs what is missing).
# GALENA_FRESH_BUILD_DIR: where the clone builds (default: its own build/, a full library + tool build);
# point it at a kept folder to make later runs incremental. GALENA_FRESH_KEEP=1 keeps the scratch folder.
set -euo pipefail
here="$(cd "$(dirname "${BASH_SOURCE[0]}")/.." && pwd)"
work="$(mktemp -d "${TMPDIR:-/tmp}/galena-fresh-clone.XXXXXXXX")"
[ "${GALENA_FRESH_KEEP:-0}" = 1 ] || trap 'rm -rf "$work"' EXIT
git clone --quiet "$here" "$work/galena"
cd "$work/galena"
export GALENA_BUILD_DIR="${GALENA_FRESH_BUILD_DIR:-$work/galena/build}"
for run in 1 2; do
  echo "fresh-clone: bash scripts/bootstrap.sh demo (run $run of 2)"
  start=$(date +%s)
  if ! bash scripts/bootstrap.sh demo > "$work/run-$run.log" 2>&1; then
    tail -n 40 "$work/run-$run.log"
    echo "fresh-clone: run $run of bash scripts/bootstrap.sh demo FAILED (log above)" >&2
    exit 1
  fi
  echo "fresh-clone: run $run passed in $(( $(date +%s) - start )) s"
done
for f in demo-out/index.html demo-out/table.csv demo-out/playlist.wav; do
  [ -s "$f" ] || { echo "fresh-clone: $f is missing after the set-up" >&2; exit 1; }
done
if [ -n "$(git status --porcelain --untracked-files=no)" ]; then
  git status --short >&2
  echo "fresh-clone: the set-up changed tracked files" >&2
  exit 1
fi
echo "fresh-clone: the first set-up command ran twice from a fresh clone"

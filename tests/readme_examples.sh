#!/usr/bin/env bash
# Runs the README's example blocks verbatim, in order, so that the README cannot drift from the tool.
# An example block is a fenced block whose info string is exactly `sh example`; each runs with bash -eu
# (pipefail) in a scratch folder that holds copies of the bundled scenarios/ and audio-samples/ and
# build/tools/galena (a link to the tool under test), as a fresh clone would after the set-up command.
# usage: readme_examples.sh SOURCE_DIR GALENA_TOOL SCRATCH_DIR
set -euo pipefail
src="$1"
tool="$(readlink -f "$2")"
work="$3"
rm -rf "$work"
mkdir -p "$work/build/tools" "$work/.blocks"
cp -r "$src/scenarios" "$src/audio-samples" "$work/"
ln -s "$tool" "$work/build/tools/galena"

awk -v dir="$work/.blocks" '
  /^```sh example[ \t]*$/ { n++; file = sprintf("%s/block-%02d.sh", dir, n); inside = 1; next }
  inside && /^```[ \t]*$/ { inside = 0; close(file); next }
  inside { print > file }
  END { if (inside) { print "readme_examples: an example block is not closed" > "/dev/stderr"; exit 1 } }
' "$src/README.md"

blocks=("$work"/.blocks/block-*.sh)
if [ ! -e "${blocks[0]}" ]; then
  echo "readme_examples: no \`\`\`sh example blocks found in $src/README.md" >&2
  exit 1
fi
for b in "${blocks[@]}"; do
  name="$(basename "$b" .sh)"
  echo "readme_examples: $name"
  sed 's/^/    /' "$b"
  if ! (cd "$work" && bash -euo pipefail "$b") > "$work/.blocks/$name.log" 2>&1; then
    echo "readme_examples: $name FAILED; its output:" >&2
    tail -n 30 "$work/.blocks/$name.log" >&2
    exit 1
  fi
done
echo "readme_examples: ${#blocks[@]} blocks ran"

#!/bin/sh
# Screenshots of every page on the demo and on the real-indicator frame, at 1024x768 and
# 1920x1080: tests/browser/screens.sh [OUT_DIR] (needs a release build, chromium and
# `npm ci` here). FULL=1 takes whole pages. The PNGs are for looking at; do not commit them.
set -e
here=$(cd "$(dirname "$0")" && pwd)
root=$(cd "$here/../.." && pwd)
out=${1:-$root/target/screens}
bin=${CARGO_TARGET_DIR:-$root/target}/release/gapwise
mkdir -p "$out"
port=7901
for project in demo-data tests/fixtures/real_frame; do
  tag=$(basename "$project")
  keyfile=$(mktemp)
  projects=$(mktemp -d)
  "$bin" serve "$root/$project" --addr 127.0.0.1:$port --key-file "$keyfile" --projects "$projects" >/dev/null 2>&1 &
  pid=$!
  i=0
  while [ ! -s "$keyfile" ] && [ $i -lt 100 ]; do sleep 0.2; i=$((i + 1)); done
  sleep 0.5
  node "$here/screens.mjs" "http://127.0.0.1:$port" "$out" "$(cat "$keyfile")" "$tag" || true
  kill $pid
  rm -rf "$keyfile" "$projects"
  port=$((port + 1))
done

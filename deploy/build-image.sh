#!/usr/bin/env bash
# Builds the static keelson binary and the FROM-scratch image.
# Usage: deploy/build-image.sh [TAG]   (default keelson:0.1.0)
# KEELSON_BIN=PATH uses an already-built static binary under target/ instead
# (CI checks the image of the binary its tests ran against).
set -euo pipefail
cd "$(dirname "$0")/.."
tag="${1:-keelson:0.1.0}"
bin="${KEELSON_BIN:-}"
if [ -z "$bin" ]; then
  RUSTFLAGS="-C target-feature=+crt-static" \
    cargo build --release --locked --target x86_64-unknown-linux-gnu --bin keelson
  bin=target/x86_64-unknown-linux-gnu/release/keelson
fi
# A static binary has no NEEDED entries (no shared libraries to load from the empty image).
if readelf -d "$bin" | grep -q '(NEEDED)'; then
  echo "error: $bin needs shared libraries:" >&2
  readelf -d "$bin" | grep '(NEEDED)' >&2
  exit 1
fi
DOCKER_BUILDKIT="${DOCKER_BUILDKIT:-0}" docker build -q -f deploy/Dockerfile --build-arg "KEELSON_BIN=$bin" -t "$tag" .

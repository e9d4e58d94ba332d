#!/usr/bin/env bash
# The build steps of the Dockerfile's build stage, as a script: the
# Dockerfile runs this very file, so running it here builds the same binary
# the image gets (static, no cgo, trimmed paths) without Docker.
#
#   scripts/docker-build-steps.sh [OUT_DIR]    (default: bin/docker)
#
# VERSION, if set, is stamped into the binary (sidetrend version).
set -euo pipefail
cd "$(dirname "$0")/.."

out=${1:-bin/docker}
version=${VERSION:-devel}
mkdir -p "$out"

# Step 1: the module's dependencies, checked against go.sum.
go mod download
go mod verify >/dev/null

# Step 2: a static binary: CGO_ENABLED=0 (no libc needed at run time),
# -trimpath (no build paths in it), -s -w (no symbol tables).
CGO_ENABLED=0 go build -trimpath -ldflags "-s -w -X main.version=${version}" -o "$out/sidetrend" ./cmd/sidetrend

# Step 3: checks the image relies on.
if command -v file >/dev/null 2>&1; then
  if ! file "$out/sidetrend" | grep -q 'statically linked'; then
    echo "docker-build-steps: $out/sidetrend is not statically linked:" >&2
    file "$out/sidetrend" >&2
    exit 1
  fi
elif ldd "$out/sidetrend" >/dev/null 2>&1; then
  echo "docker-build-steps: $out/sidetrend is dynamically linked (ldd lists libraries)" >&2
  exit 1
fi
"$out/sidetrend" version
echo "docker-build-steps: built $out/sidetrend"

#!/usr/bin/env bash
# buf and the protoc plugins at the versions pinned in proto/ (the go:generate
# line and buf.gen.yaml), fetched through the Go module proxy and built into
# the Go build cache, for package compat's lint, breaking and freshness
# checks. Nothing is downloaded as a binary; when the modules and builds are
# cached already this only checks that they run.
set -euo pipefail
cd "$(dirname "$0")/../.."
mods=$( { grep -o 'github.com/bufbuild/buf/cmd/buf@v[0-9A-Za-z.+-]*' proto/pulsefleet/v1/generate.go | head -n 1
          grep -o '[a-z0-9./-]*/cmd/protoc-gen-[a-z-]*@v[0-9A-Za-z.+-]*' proto/buf.gen.yaml; } )
if [ "$(printf '%s\n' "$mods" | grep -c @)" -lt 3 ]; then
  echo "buf.sh: could not read the pinned buf and plugin versions from proto/" >&2
  exit 1
fi
for m in $mods; do
  if ! out=$(go run "$m" --version 2>&1); then
    echo "buf.sh: go run $m --version failed: $out" >&2
    exit 1
  fi
done

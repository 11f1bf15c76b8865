#!/usr/bin/env bash
# Runs every test of pulsefleet: installs the real tools the suite drives
# (each .ci/deps.d/*.sh installs one, only when missing), then go vet and
# go test over every package. This is the README's test command.
set -euo pipefail
cd "$(dirname "$0")/.."
for dep in .ci/deps.d/*.sh; do
  [ -e "$dep" ] || continue
  echo "== dependency: $dep"
  bash "$dep"
done
echo "== go vet"
go vet ./...
echo "== go test"
go test -count=1 -timeout 20m "$@" ./...
if [ -n "${PULSEFLEET_FUZZ_SECONDS:-}" ]; then
  echo "== fuzz (${PULSEFLEET_FUZZ_SECONDS} s per target)"
  ./scripts/fuzz.sh "$PULSEFLEET_FUZZ_SECONDS"
fi

#!/usr/bin/env bash
# Runs every test of pulsefleet: installs the real tools the suite drives
# (each .ci/deps.d/*.sh installs one, only when missing), then go vet,
# staticcheck and go test over every package of the product module (the
# packages that run goroutines under the race detector), then the same over
# the nested deploy module (deploy/go.mod: the Kubernetes and kustomize
# modules its tests need stay out of the product's go.mod).
# This is the README's test command; extra arguments go to every go test.
set -euo pipefail
cd "$(dirname "$0")/.."

# staticcheck is run through go run at this pinned version (no install step):
# 2026.2.2, the release built for Go 1.26.
staticcheck=honnef.co/go/tools/cmd/staticcheck@v0.8.2

# Packages that start goroutines or are called from several at once; their
# tests run with -race. DEVELOPERS.md has the timings that keep this within
# CI's limit.
race_pkgs=(./internal/gateway/... ./internal/ingest/... ./internal/notify/... ./internal/cluster/... ./internal/controlplane/... ./internal/auth/... ./internal/web/... ./internal/ids/... ./internal/store/... ./internal/sim/... ./internal/tune/... ./cmd/...)

for dep in .ci/deps.d/*.sh; do
  [ -e "$dep" ] || continue
  echo "== dependency: $dep"
  bash "$dep"
done
echo "== go vet"
go vet ./...
echo "== staticcheck"
go run "$staticcheck" ./...
echo "== go test"
race_list=$(go list "${race_pkgs[@]}")
other_list=$(go list ./... | grep -vxF "$race_list")
# shellcheck disable=SC2086 # one package per word
go test -count=1 -timeout 20m "$@" $other_list
echo "== go test -race"
# shellcheck disable=SC2086
go test -race -count=1 -timeout 40m "$@" $race_list
echo "== deploy module: go vet, staticcheck, go test"
(
  cd deploy
  go vet ./...
  go run "$staticcheck" ./...
  go test -count=1 -timeout 20m "$@" ./...
)
if [ -n "${PULSEFLEET_FUZZ_SECONDS:-}" ]; then
  echo "== fuzz (${PULSEFLEET_FUZZ_SECONDS} s per target)"
  ./scripts/fuzz.sh "$PULSEFLEET_FUZZ_SECONDS"
fi

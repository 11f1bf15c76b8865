#!/usr/bin/env bash
# systemd-analyze, for verifying deploy/systemd/pulsefleet.service
# (deploy's TestSystemdUnitVerifies). Does nothing when present.
set -euo pipefail
command -v systemd-analyze >/dev/null && exit 0
apt-get update -qq && apt-get install -y -qq --no-install-recommends systemd >/dev/null
command -v systemd-analyze >/dev/null

#!/usr/bin/env bash
# Installs Prometheus Alertmanager (Debian's prometheus-alertmanager package)
# for the notification tests of internal/notify and cmd/pulsefleet, which
# start their own Alertmanager on loopback. Idempotent and quiet on success.
# The package's service is kept from starting (it would take :9093); see
# apt-held.bash.
set -euo pipefail
if command -v prometheus-alertmanager >/dev/null 2>&1 || command -v alertmanager >/dev/null 2>&1; then
  exit 0
fi
. "$(dirname "$0")/apt-held.bash"
apt_install_held prometheus-alertmanager prometheus-alertmanager prometheus-aler

#!/usr/bin/env bash
# Installs promtool (from Debian's prometheus package) for the rule and
# metrics checks of deploy/prometheus. Idempotent and quiet on success.
# The package also ships the Prometheus server, which is kept from starting
# (it would take :9090); see apt-held.bash.
set -euo pipefail
if command -v promtool >/dev/null 2>&1; then
  exit 0
fi
. "$(dirname "$0")/apt-held.bash"
apt_install_held prometheus promtool prometheus

#!/usr/bin/env bash
# Installs promtool (from Debian's prometheus package) for the rule and
# metrics checks of deploy/prometheus. Idempotent and quiet on success.
#
# The package also ships the Prometheus server and, on a machine with an init
# system, would start it (and take port 9090). A policy-rc.d that answers 101
# ("action forbidden") keeps invoke-rc.d from starting any service during the
# install; without systemd nothing else starts it. Afterwards we check that no
# prometheus server process is running.
set -euo pipefail
if command -v promtool >/dev/null 2>&1; then
  exit 0
fi
export DEBIAN_FRONTEND=noninteractive
SUDO=""
if [ "$(id -u)" != 0 ]; then SUDO=sudo; fi
policy=/usr/sbin/policy-rc.d
restore=""
if [ -e "$policy" ]; then
  restore="$(mktemp)"
  $SUDO cp -p "$policy" "$restore"
fi
printf '#!/bin/sh\nexit 101\n' | $SUDO tee "$policy" >/dev/null
$SUDO chmod 755 "$policy"
cleanup() {
  if [ -n "$restore" ]; then $SUDO mv "$restore" "$policy"; else $SUDO rm -f "$policy"; fi
}
trap cleanup EXIT
$SUDO apt-get update -qq >/dev/null
$SUDO apt-get install -y -qq --no-install-recommends prometheus >/dev/null
if ! command -v promtool >/dev/null 2>&1; then
  echo "promtool.sh: apt-get install prometheus did not provide promtool" >&2
  exit 1
fi
# Nothing of the package may be left serving (it would hold :9090).
if pids="$(pgrep -x prometheus)"; then
  echo "promtool.sh: a prometheus server is running after the install (pids $pids); stop it" >&2
  exit 1
fi

#!/usr/bin/env bash
# Installs Prometheus Alertmanager (Debian's prometheus-alertmanager package)
# for the notification tests of internal/notify and cmd/pulsefleet, which
# start their own Alertmanager on loopback. Idempotent and quiet on success.
#
# The package would start its service on a machine with an init system (and
# take port 9093). A policy-rc.d that answers 101 ("action forbidden") keeps
# invoke-rc.d from starting it during the install; afterwards we check that
# no alertmanager process is running.
set -euo pipefail
if command -v prometheus-alertmanager >/dev/null 2>&1 || command -v alertmanager >/dev/null 2>&1; then
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
$SUDO apt-get install -y -qq --no-install-recommends prometheus-alertmanager >/dev/null
if ! command -v prometheus-alertmanager >/dev/null 2>&1; then
  echo "alertmanager.sh: apt-get install prometheus-alertmanager did not provide prometheus-alertmanager" >&2
  exit 1
fi
# Nothing of the package may be left serving (it would hold :9093). The
# kernel keeps 15 characters of a process name: prometheus-aler.
if pids="$(pgrep -x prometheus-aler)"; then
  echo "alertmanager.sh: an alertmanager is running after the install (pids $pids); stop it" >&2
  exit 1
fi

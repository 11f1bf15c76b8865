#!/usr/bin/env bash
# Installs the etcd server (Debian's etcd-server package) for the cluster and
# control-plane tests (internal/cluster, internal/controlplane, cmd's
# failover test): each test starts its own etcd on loopback ports in a temp
# directory. Idempotent and quiet on success.
#
# Like promtool.sh: a policy-rc.d answering 101 keeps the package's init
# script from starting a system etcd during the install (it would take ports
# 2379/2380); afterwards no etcd may be running.
set -euo pipefail
if command -v etcd >/dev/null 2>&1; then
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
$SUDO apt-get install -y -qq --no-install-recommends etcd-server >/dev/null
if ! command -v etcd >/dev/null 2>&1; then
  echo "etcd.sh: apt-get install etcd-server did not provide etcd" >&2
  exit 1
fi
if pids="$(pgrep -x etcd)"; then
  echo "etcd.sh: an etcd server is running after the install (pids $pids); stop it" >&2
  exit 1
fi

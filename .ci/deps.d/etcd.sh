#!/usr/bin/env bash
# Installs the etcd server (Debian's etcd-server package) for the cluster and
# control-plane tests (internal/cluster, internal/controlplane, cmd's
# failover test): each test starts its own etcd on loopback ports in a temp
# directory. Idempotent and quiet on success. The package's service is kept
# from starting (it would take ports 2379/2380); see apt-held.bash.
set -euo pipefail
if command -v etcd >/dev/null 2>&1; then
  exit 0
fi
. "$(dirname "$0")/apt-held.bash"
apt_install_held etcd-server etcd etcd

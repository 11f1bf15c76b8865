# Sourced (not run) by the deps.d scripts that install a Debian package whose
# service must not start: it has no .sh ending, so scripts/test.sh passes it
# over. The calling script has already checked that its tool is missing.
#
# apt_install_held PACKAGE COMMAND SERVER: installs PACKAGE without its
# recommends, then checks that COMMAND is on the PATH and that no process
# named SERVER runs (the kernel keeps 15 characters of a process name).
#
# On a machine with an init system the package would start its service and
# take the port the tests want. A policy-rc.d answering 101 ("action
# forbidden") keeps invoke-rc.d from starting any service during the install;
# the previous policy-rc.d, if any, is put back afterwards, also on failure.
apt_install_held() {
  local pkg=$1 cmd=$2 server=$3 me pids sudo=""
  me=$(basename "$0")
  if [ "$(id -u)" != 0 ]; then sudo=sudo; fi
  export DEBIAN_FRONTEND=noninteractive
  _held_sudo=$sudo _held_policy=/usr/sbin/policy-rc.d _held_restore=""
  if [ -e "$_held_policy" ]; then
    _held_restore="$(mktemp)"
    $sudo cp -p "$_held_policy" "$_held_restore"
  fi
  trap _apt_held_restore EXIT
  printf '#!/bin/sh\nexit 101\n' | $sudo tee "$_held_policy" >/dev/null
  $sudo chmod 755 "$_held_policy"
  $sudo apt-get update -qq >/dev/null
  $sudo apt-get install -y -qq --no-install-recommends "$pkg" >/dev/null
  _apt_held_restore
  trap - EXIT
  if ! command -v "$cmd" >/dev/null 2>&1; then
    echo "$me: apt-get install $pkg did not provide $cmd" >&2
    exit 1
  fi
  if pids="$(pgrep -x "$server")"; then
    echo "$me: a $server process is running after the install (pids $pids); stop it" >&2
    exit 1
  fi
}

_apt_held_restore() {
  if [ -n "$_held_restore" ]; then
    $_held_sudo mv "$_held_restore" "$_held_policy"
  else
    $_held_sudo rm -f "$_held_policy"
  fi
}

#!/usr/bin/env bash
# Installs Debian's chromium (headless browser for the report and web page
# tests) when /usr/bin/chromium is missing. Idempotent and quiet on success.
set -euo pipefail
if [ -x /usr/bin/chromium ]; then
  exit 0
fi
export DEBIAN_FRONTEND=noninteractive
SUDO=""
if [ "$(id -u)" != 0 ]; then SUDO=sudo; fi
$SUDO apt-get update -qq >/dev/null
$SUDO apt-get install -y -qq chromium >/dev/null
if [ ! -x /usr/bin/chromium ]; then
  echo "chromium.sh: apt-get install chromium did not provide /usr/bin/chromium" >&2
  exit 1
fi

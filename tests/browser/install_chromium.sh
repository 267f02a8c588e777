#!/usr/bin/env bash
# Install Debian's chromium (the headless browser the `browser`-marked tests
# render the HTML report with) unless it is already on PATH. Needs root, as in
# CI. Idempotent; fails loudly.
set -euo pipefail

if command -v chromium >/dev/null; then
    echo "chromium: already installed ($(command -v chromium))"
    exit 0
fi
[ "$(id -u)" = 0 ] || { echo "tests/browser/install_chromium.sh: must run as root to apt-get install chromium" >&2; exit 1; }

export DEBIAN_FRONTEND=noninteractive
apt-get update -qq
apt-get install -y -qq chromium fonts-dejavu-core >/dev/null
command -v chromium >/dev/null || { echo "tests/browser/install_chromium.sh: apt-get finished but chromium is not on PATH" >&2; exit 1; }
echo "chromium: installed $(dpkg-query -W -f='${Version}' chromium)"

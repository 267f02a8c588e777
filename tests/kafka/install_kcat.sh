#!/usr/bin/env bash
# Install Debian's kcat (a Kafka client we did not write, used by the Kafka
# tests) unless it is already on PATH. Needs root, as in CI. Fails loudly.
set -euo pipefail

if command -v kcat >/dev/null; then
    echo "kcat: already installed ($(command -v kcat))"
    exit 0
fi
[ "$(id -u)" = 0 ] || { echo "tests/kafka/install_kcat.sh: must run as root to apt-get install kcat" >&2; exit 1; }

export DEBIAN_FRONTEND=noninteractive
apt-get update -qq
apt-get install -y -qq kcat >/dev/null
command -v kcat >/dev/null || { echo "tests/kafka/install_kcat.sh: apt-get finished but kcat is not on PATH" >&2; exit 1; }
echo "kcat: installed $(dpkg-query -W -f='${Version}' kcat)"

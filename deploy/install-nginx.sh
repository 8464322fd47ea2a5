#!/usr/bin/env bash
# Install nginx from Debian's packages for the topology test (tests/deploy/test_deploy.py), if missing.
#
# Only the binary is wanted: the test runs its own nginx in the foreground with a generated
# config on 127.0.0.1, so the packaged service is stopped and kept from starting at boot.
# Idempotent; quick when nginx is already there.
set -euo pipefail

if command -v nginx >/dev/null 2>&1 || [ -x /usr/sbin/nginx ]; then
    exit 0
fi

SUDO=""
if [ "$(id -u)" -ne 0 ]; then
    SUDO="sudo"
fi

echo "install-nginx: installing nginx from Debian's packages"
export DEBIAN_FRONTEND=noninteractive
# policy-rc.d answering 101 keeps the package's post-install step from starting a system
# nginx on port 80: nothing this project starts may listen beyond what the tests choose.
policy=/usr/sbin/policy-rc.d
created_policy=0
if [ ! -e "$policy" ]; then
    printf '#!/bin/sh\nexit 101\n' | $SUDO tee "$policy" >/dev/null
    $SUDO chmod 755 "$policy"
    created_policy=1
fi
cleanup() { if [ "$created_policy" = 1 ]; then $SUDO rm -f "$policy"; fi; }
trap cleanup EXIT

$SUDO apt-get update -q >/dev/null
# nginx-light is the smallest build with the upstream and proxy modules the test uses;
# newer Debian releases fold it into plain nginx.
if ! $SUDO apt-get install -y -q --no-install-recommends nginx-light >/dev/null 2>&1; then
    $SUDO apt-get install -y -q --no-install-recommends nginx >/dev/null
fi
command -v nginx >/dev/null 2>&1 || [ -x /usr/sbin/nginx ] || { echo "install-nginx: nginx is still missing" >&2; exit 1; }
echo "install-nginx: $(/usr/sbin/nginx -v 2>&1)"

#!/usr/bin/env bash
# Install the OS packages whose programs the tests run, when they are missing: Redis and
# PostgreSQL servers (store agents), promtool (alerting rules), systemd-analyze (service units).
# Idempotent; runs as root (CI does). Prints what it installed and how long it took.
set -euo pipefail

need=()
command -v redis-server >/dev/null || need+=(redis-server)
if ! command -v pg_ctl >/dev/null && ! ls /usr/lib/postgresql/*/bin/pg_ctl >/dev/null 2>&1; then
    need+=(postgresql)
fi
command -v promtool >/dev/null || need+=(prometheus)
command -v systemd-analyze >/dev/null || need+=(systemd)

if [ ${#need[@]} -eq 0 ]; then
    echo "== os-packages: everything present"
    exit 0
fi
if [ "$(id -u)" != 0 ]; then
    echo "os-packages.sh: ${need[*]} missing and installing them needs root" >&2
    exit 1
fi
t0=$(date +%s)
echo "== os-packages: installing ${need[*]}"
export DEBIAN_FRONTEND=noninteractive
apt-get update -qq
# No recommends: the prometheus package would pull in exporters; we need its promtool only.
# policy-rc.d keeps the packages from starting their services (tests start their own servers).
printf '#!/bin/sh\nexit 101\n' > /usr/sbin/policy-rc.d && chmod +x /usr/sbin/policy-rc.d
trap 'rm -f /usr/sbin/policy-rc.d' EXIT
apt-get install -y -qq --no-install-recommends "${need[@]}" >/dev/null
echo "== os-packages: done in $(( $(date +%s) - t0 )) s"

#!/usr/bin/env bash
# Installs the distribution's Prometheus (prometheus and promtool) when promtool is missing, so
# tests/test_alert_rules.py and tests/test_prometheus_live.py can run. Safe to call every time:
# it does nothing when both programs are already on PATH. Debian and Ubuntu only (apt-get).
set -euo pipefail

if command -v promtool >/dev/null 2>&1 && command -v prometheus >/dev/null 2>&1; then
    exit 0
fi

if ! command -v apt-get >/dev/null 2>&1; then
    echo "install-prometheus.sh: no apt-get here; install Prometheus (prometheus, promtool)" \
        "from https://prometheus.io/download/ and put both on PATH" >&2
    exit 1
fi

as_root() {
    if [ "$(id -u)" -eq 0 ]; then "$@"; else sudo "$@"; fi
}

as_root apt-get update -qq
# Quiet even on success: the CI log should show the tests, not dpkg's progress.
as_root env DEBIAN_FRONTEND=noninteractive \
    apt-get install -y -qq --no-install-recommends prometheus >/dev/null

# On a machine with systemd the package starts a daemon on :9090 that scrapes nothing we run;
# the tests start their own on a free loopback port, so stop and disable the packaged one.
if command -v systemctl >/dev/null 2>&1 && systemctl is-active --quiet prometheus 2>/dev/null; then
    as_root systemctl disable --now --quiet prometheus || true
fi

command -v promtool >/dev/null 2>&1 || {
    echo "install-prometheus.sh: the prometheus package did not provide promtool" >&2
    exit 1
}

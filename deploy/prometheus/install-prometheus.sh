#!/usr/bin/env bash
# Installs the distribution's Prometheus (prometheus and promtool) when either is missing, so
# tests/test_alert_rules.py and tests/test_prometheus_live.py can run. Safe to call every time.
set -euo pipefail
if command -v promtool >/dev/null 2>&1 && command -v prometheus >/dev/null 2>&1; then
    exit 0
fi
bash "$(dirname "$0")/../debian-package.sh" prometheus prometheus promtool

# On a machine with systemd the package starts a daemon on :9090 that scrapes nothing we run;
# the tests start their own on a free loopback port, so stop and disable the packaged one.
if command -v systemctl >/dev/null 2>&1 && systemctl is-active --quiet prometheus 2>/dev/null; then
    if [ "$(id -u)" -eq 0 ]; then
        systemctl disable --now --quiet prometheus || true
    else
        sudo systemctl disable --now --quiet prometheus || true
    fi
fi

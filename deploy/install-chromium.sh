#!/usr/bin/env bash
# Installs the distribution's Chromium when it is missing, so tests/test_preview_browser.py can
# open the HTML preview report headless. Safe to call every time: it does nothing when chromium
# is already on PATH. Debian and Ubuntu only (apt-get).
set -euo pipefail

if command -v chromium >/dev/null 2>&1 || command -v chromium-browser >/dev/null 2>&1; then
    exit 0
fi

if ! command -v apt-get >/dev/null 2>&1; then
    echo "install-chromium.sh: no apt-get here; install Chromium and put chromium on PATH" >&2
    exit 1
fi

as_root() {
    if [ "$(id -u)" -eq 0 ]; then "$@"; else sudo "$@"; fi
}

as_root apt-get update -qq
# Quiet even on success: the CI log should show the tests, not dpkg's progress.
as_root env DEBIAN_FRONTEND=noninteractive \
    apt-get install -y -qq --no-install-recommends chromium >/dev/null

command -v chromium >/dev/null 2>&1 || {
    echo "install-chromium.sh: the chromium package did not provide a chromium command" >&2
    exit 1
}

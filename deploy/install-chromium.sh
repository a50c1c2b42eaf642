#!/usr/bin/env bash
# Installs Debian's Chromium when it is missing, so tests/test_preview_browser.py can open the
# HTML preview report headless. Safe to call every time.
set -euo pipefail
bash "$(dirname "$0")/debian-package.sh" chromium chromium

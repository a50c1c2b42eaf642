#!/usr/bin/env bash
# debian-package.sh PACKAGE COMMAND...: install the distribution's PACKAGE with apt-get when any
# COMMAND is missing from PATH, then check that every COMMAND is there. Does nothing when they
# all are, so the test setup can call it every time. Debian and Ubuntu only; the install scripts
# beside the tools that need them (Prometheus, Chromium, kubectl) call it.
set -euo pipefail

package=$1
shift
missing=0
for command in "$@"; do
    command -v "$command" >/dev/null 2>&1 || missing=1
done
[ "$missing" -eq 0 ] && exit 0

if ! command -v apt-get >/dev/null 2>&1; then
    echo "debian-package.sh: no apt-get here; install $package so that $* are on PATH" >&2
    exit 1
fi

as_root() {
    if [ "$(id -u)" -eq 0 ]; then "$@"; else sudo "$@"; fi
}

as_root apt-get update -qq
# Quiet even on success: the CI log should show the tests, not dpkg's progress.
as_root env DEBIAN_FRONTEND=noninteractive \
    apt-get install -y -qq --no-install-recommends "$package" >/dev/null

for command in "$@"; do
    command -v "$command" >/dev/null 2>&1 || {
        echo "debian-package.sh: the $package package did not provide $command" >&2
        exit 1
    }
done

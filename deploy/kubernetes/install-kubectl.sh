#!/usr/bin/env bash
# Installs the distribution's kubectl (Debian's kubernetes-client package) when kubectl is
# missing, so tests/test_deploy.py can render the kustomize overlays. Safe to call every time:
# it does nothing when kubectl is already on PATH. Debian and Ubuntu only (apt-get). Debian 12
# ships kubectl 1.20 with kustomize 2.0, which is why the kustomizations use only fields that
# version reads as well as current ones.
set -euo pipefail

if command -v kubectl >/dev/null 2>&1; then
    exit 0
fi

if ! command -v apt-get >/dev/null 2>&1; then
    echo "install-kubectl.sh: no apt-get here; install kubectl" \
        "(https://kubernetes.io/docs/tasks/tools/) and put it on PATH" >&2
    exit 1
fi

as_root() {
    if [ "$(id -u)" -eq 0 ]; then "$@"; else sudo "$@"; fi
}

as_root apt-get update -qq
# Quiet even on success: the CI log should show the tests, not dpkg's progress.
as_root env DEBIAN_FRONTEND=noninteractive \
    apt-get install -y -qq --no-install-recommends kubernetes-client >/dev/null

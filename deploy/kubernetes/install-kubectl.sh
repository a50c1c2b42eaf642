#!/usr/bin/env bash
# Installs the distribution's kubectl (Debian's kubernetes-client package) when kubectl is
# missing, so tests/test_deploy.py can render the kustomize overlays. Safe to call every time.
# Debian 12 ships kubectl 1.20 with kustomize 2.0, which is why the kustomizations use only
# fields that version reads as well as current ones.
set -euo pipefail
bash "$(dirname "$0")/../debian-package.sh" kubernetes-client kubectl

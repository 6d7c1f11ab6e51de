#!/usr/bin/env bash
# Installs what axsift needs, skipping what is already present (safe to rerun).
#   bash scripts/setup.sh          the system HDF5 library and pkg-config (apt; root is needed
#                                  only when they are missing)
#   bash scripts/setup.sh checks   also Chromium (renders the report in tests) and the Python
#                                  packages of the reference checks, at the exact versions of
#                                  scripts/requirements-check.txt, in .venv/ in the project root
#                                  (never the system site-packages); checks run .venv/bin/python
set -euo pipefail
cd "$(dirname "$0")/.."
missing=()
pkg-config --exists hdf5 2>/dev/null || missing+=(libhdf5-dev pkg-config)
if [[ "${1:-}" == checks ]]; then
    command -v chromium >/dev/null 2>&1 || missing+=(chromium)
fi
if ((${#missing[@]})); then
    apt-get update -qq
    DEBIAN_FRONTEND=noninteractive apt-get install -y -qq "${missing[@]}" >/dev/null
fi
[[ "${1:-}" == checks ]] || exit 0
requirements=scripts/requirements-check.txt
stamp=.venv/requirements-check.txt
if ! cmp -s "$requirements" "$stamp" 2>/dev/null; then
    rm -rf .venv
    python3 -m venv .venv
    .venv/bin/python -m pip install --quiet --disable-pip-version-check -r "$requirements"
    cp "$requirements" "$stamp"
fi

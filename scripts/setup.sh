#!/usr/bin/env bash
# Installs the system HDF5 library, Chromium (renders the report in tests) and the Python
# packages used by the checks.
# Safe to run repeatedly; skips what is already present.
set -euo pipefail
if ! pkg-config --exists hdf5 2>/dev/null; then
    apt-get update -qq
    DEBIAN_FRONTEND=noninteractive apt-get install -y -qq libhdf5-dev pkg-config >/dev/null
fi
if ! command -v chromium >/dev/null 2>&1; then
    apt-get update -qq
    DEBIAN_FRONTEND=noninteractive apt-get install -y -qq chromium >/dev/null
fi
if ! python3 -c "import scipy, numpy, h5py" 2>/dev/null; then
    python3 -m pip install --quiet scipy numpy h5py
fi

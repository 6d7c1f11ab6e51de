#!/usr/bin/env bash
# Simulates the invented demo night and reduces it with the default pipeline.
# Installs the system HDF5 library first if it is missing. Outputs go to out/demo/.
set -euo pipefail
cd "$(dirname "$0")/.."
bash scripts/setup.sh
cargo run --release --quiet -- demo --out out/demo "$@"

#!/usr/bin/env bash
# The whole test suite: Rust tests, then the scipy reference checks.
set -euo pipefail
cd "$(dirname "$0")/.."
bash scripts/setup.sh
cargo test --release
python3 scripts/check_savgol.py

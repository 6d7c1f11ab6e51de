#!/usr/bin/env bash
# The whole test suite: Rust tests, then the scipy reference checks and the h5py check of
# a demo run's outputs.
set -euo pipefail
cd "$(dirname "$0")/.."
bash scripts/setup.sh
# HDF5 locks files with descriptors that child processes inherit; tests that start the
# command line beside others in the same binary would see spurious "unable to lock" errors.
export HDF5_USE_FILE_LOCKING=FALSE
cargo test --release
python3 scripts/check_savgol.py
demo_out="$(mktemp -d)"
trap 'rm -rf "$demo_out"' EXIT
./target/release/axsift demo --quiet --out "$demo_out"
python3 scripts/check_results.py "$demo_out"

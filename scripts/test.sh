#!/usr/bin/env bash
# The whole test suite: Rust tests, then the scipy reference checks and the h5py check of
# a demo run's outputs.
set -euo pipefail
cd "$(dirname "$0")/.."
bash scripts/setup.sh checks
# HDF5 locks files with descriptors that child processes inherit; tests that start the
# command line beside others in the same binary would see spurious "unable to lock" errors.
export HDF5_USE_FILE_LOCKING=FALSE
# tests/slurm.rs starts a local Slurm and stops it itself; this also stops it if the run is
# interrupted (the script only stops daemons it started, and not while another run's Slurm
# test holds the lock).
stop_slurm() { flock -n /run/axsift-slurm-local.lock bash scripts/slurm_local.sh stop >/dev/null 2>&1 || true; }
trap stop_slurm EXIT
cargo test --release
.venv/bin/python scripts/check_savgol.py
.venv/bin/python scripts/check_average.py target/release/axsift
demo_out="$(mktemp -d)"
trap 'rm -rf "$demo_out"; stop_slurm' EXIT
./target/release/axsift demo --quiet --out "$demo_out"
.venv/bin/python scripts/check_results.py "$demo_out"

# Set-up shared by scripts/bench.sh and scripts/bench_average.sh, sourced after `set -euo
# pipefail` with `work` set to the work folder: installs /usr/bin/time and the reference
# checks' virtual environment if missing, builds the release binary, and defines `root`,
# `python`, `axsift` and `measure`.
root="$(cd "$(dirname "${BASH_SOURCE[0]}")/.." && pwd)"
mkdir -p "$work"
command -v /usr/bin/time >/dev/null || { apt-get update -qq && apt-get install -y -qq time; }
bash "$root/scripts/setup.sh" checks
export HDF5_USE_FILE_LOCKING=FALSE
python="$root/.venv/bin/python"
(cd "$root" && cargo build --release -q)
axsift="${CARGO_TARGET_DIR:-$root/target}/release/axsift"

# Runs a command under /usr/bin/time; prints "seconds peak_kb".
measure() {
  /usr/bin/time -f "%e %M" -o "$work/time.txt" "$@" >/dev/null 2>"$work/stderr.txt" || { cat "$work/stderr.txt"; exit 1; }
  cat "$work/time.txt"
}

#!/usr/bin/env bash
# Whole-reduction benchmark: simulates nights of 300, 3000 and 10000 steps x 32768 bins (f32,
# the demo facility), reduces each with `axsift reduce` and the default pipeline.toml, and
# prints input bins/s and peak RSS, once right after another run (hot) and once after a 12 s
# idle pause. Then runs the numpy/scipy baselines (scipy savgol_filter, and an FFT fit) on the
# 3000-step night and prints the ratios. Not part of the tests: timings on shared machines
# are noisy. Usage: bash scripts/bench.sh [work dir, default /tmp/axsift-bench]
# With AXSIFT_BEFORE=/path/to/an/older/axsift, that build is measured in the same run (hot,
# alternating with this one) and the ratio printed.
set -euo pipefail
root="$(cd "$(dirname "$0")/.." && pwd)"
work="${1:-/tmp/axsift-bench}"
mkdir -p "$work"
command -v /usr/bin/time >/dev/null || { apt-get update -qq && apt-get install -y -qq time; }
python3 -c "import h5py, scipy" 2>/dev/null || pip install -q h5py scipy numpy
(cd "$root" && cargo build --release -q)
axsift="${CARGO_TARGET_DIR:-$root/target}/release/axsift"
bins=32768

# Runs a command under /usr/bin/time; prints "seconds peak_kb".
measure() {
  /usr/bin/time -f "%e %M" -o "$work/time.txt" "$@" >/dev/null 2>"$work/stderr.txt" || { cat "$work/stderr.txt"; exit 1; }
  cat "$work/time.txt"
}

declare -A hot
for steps in 300 3000 10000; do
  night="$work/night$steps.h5"
  if [ ! -f "$night" ]; then
    sed -e "s/^n_steps = .*/n_steps = $steps/" -e "s/^n_bins = .*/n_bins = $bins/" "$root/fixtures/demo_night.toml" > "$work/night$steps.toml"
    "$axsift" -q simulate --scenario "$work/night$steps.toml" --out "$night"
  fi
  cat "$night" > /dev/null   # page cache
  measure "$axsift" -q reduce --config "$root/pipeline.toml" --out "$work/out$steps" "$night" >/dev/null
  read -r t_hot kb_hot < <(measure "$axsift" -q reduce --config "$root/pipeline.toml" --out "$work/out$steps" "$night")
  sleep 12
  read -r t_idle kb_idle < <(measure "$axsift" -q reduce --config "$root/pipeline.toml" --out "$work/out$steps" "$night")
  hot[$steps]=$t_hot
  if [ -n "${AXSIFT_BEFORE:-}" ]; then
    read -r t_before kb_before < <(measure "$AXSIFT_BEFORE" -q reduce --config "$root/pipeline.toml" --out "$work/before$steps" "$night")
    read -r t_again kb_again < <(measure "$axsift" -q reduce --config "$root/pipeline.toml" --out "$work/out$steps" "$night")
    python3 - "$steps" "$t_before" "$kb_before" "$t_again" <<'PY'
import sys
steps, tb, kb, ta = int(sys.argv[1]), *map(float, sys.argv[2:])
n = steps * 32768
print(f"before {steps:>5} steps: hot {tb:6.2f} s {n/tb/1e6:6.1f} M bins/s peak {kb/1024:5.0f} MB | this build right after: {ta:6.2f} s, {tb/ta:4.2f}x faster")
PY
  fi
  python3 - "$steps" "$t_hot" "$kb_hot" "$t_idle" "$kb_idle" <<'PY'
import sys
steps, th, kh, ti, ki = int(sys.argv[1]), *map(float, sys.argv[2:])
n = steps * 32768
print(f"axsift {steps:>5} steps: hot {th:6.2f} s {n/th/1e6:6.1f} M bins/s peak {kh/1024:5.0f} MB | after 12 s idle {ti:6.2f} s {n/ti/1e6:6.1f} M bins/s peak {ki/1024:5.0f} MB")
PY
done

night="$work/night3000.h5"
for fit in fft savgol; do
  read -r t kb < <(measure python3 "$root/scripts/baseline_numpy.py" --fit "$fit" "$night")
  python3 - "$fit" "$t" "$kb" "${hot[3000]}" <<'PY'
import sys
fit, t, kb, ours = sys.argv[1], float(sys.argv[2]), float(sys.argv[3]), float(sys.argv[4])
print(f"numpy ({fit:>6} fit) 3000 steps: {t:6.2f} s {3000*32768/t/1e6:6.1f} M bins/s peak {kb/1024:5.0f} MB; axsift is {t/ours:5.1f}x faster")
PY
done

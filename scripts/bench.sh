#!/usr/bin/env bash
# Whole-reduction benchmark: simulates nights of 300, 3000 and 10000 steps x 32768 bins (f32,
# the demo facility), reduces each with `axsift reduce` and the default pipeline.toml, and
# prints input bins/s and peak RSS: the median and best of several runs right after one
# another (hot), and one run after a 12 s idle pause. Then runs the numpy/scipy baselines
# (scipy savgol_filter, and an FFT fit) on the 3000-step night and prints the ratios to the
# median. Not part of the tests: timings on shared machines are noisy, hence medians.
# Usage: bash scripts/bench.sh [work dir, default /tmp/axsift-bench]
# With AXSIFT_BEFORE=/path/to/an/older/axsift, that build is measured in the same run,
# alternating with this one run by run, and the ratio of the medians printed.
set -euo pipefail
root="$(cd "$(dirname "$0")/.." && pwd)"
work="${1:-/tmp/axsift-bench}"
mkdir -p "$work"
command -v /usr/bin/time >/dev/null || { apt-get update -qq && apt-get install -y -qq time; }
bash "$root/scripts/setup.sh" checks
python="$root/.venv/bin/python"
(cd "$root" && cargo build --release -q)
axsift="${CARGO_TARGET_DIR:-$root/target}/release/axsift"
bins=32768

# Runs a command under /usr/bin/time; prints "seconds peak_kb".
measure() {
  /usr/bin/time -f "%e %M" -o "$work/time.txt" "$@" >/dev/null 2>"$work/stderr.txt" || { cat "$work/stderr.txt"; exit 1; }
  cat "$work/time.txt"
}

# Runs of each build per night size (hot, alternating with the earlier build if given).
declare -A repeats=([300]=7 [3000]=5 [10000]=3)
declare -A hot
for steps in 300 3000 10000; do
  night="$work/night$steps.h5"
  if [ ! -f "$night" ]; then
    sed -e "s/^n_steps = .*/n_steps = $steps/" -e "s/^n_bins = .*/n_bins = $bins/" "$root/fixtures/demo_night.toml" > "$work/night$steps.toml"
    "$axsift" -q simulate --scenario "$work/night$steps.toml" --out "$night"
  fi
  cat "$night" > /dev/null   # page cache
  measure "$axsift" -q reduce --config "$root/pipeline.toml" --out "$work/out$steps" "$night" >/dev/null
  ours=() before=()
  for _ in $(seq "${repeats[$steps]}"); do
    ours+=("$(measure "$axsift" -q reduce --config "$root/pipeline.toml" --out "$work/out$steps" "$night")")
    if [ -n "${AXSIFT_BEFORE:-}" ]; then
      before+=("$(measure "$AXSIFT_BEFORE" -q reduce --config "$root/pipeline.toml" --out "$work/before$steps" "$night")")
    fi
  done
  sleep 12
  idle="$(measure "$axsift" -q reduce --config "$root/pipeline.toml" --out "$work/out$steps" "$night")"
  hot[$steps]=$(python3 - "${ours[@]}" <<'PY'
import statistics, sys
print(statistics.median(float(r.split()[0]) for r in sys.argv[1:]))
PY
)
  python3 - "$steps" "$idle" "${#ours[@]}" "${ours[@]}" "${before[@]}" <<'PY'
import statistics, sys
steps, idle, k = int(sys.argv[1]), sys.argv[2].split(), int(sys.argv[3])
runs = [tuple(map(float, r.split())) for r in sys.argv[4:]]
ours, before = runs[:k], runs[k:]
n = steps * 32768
def line(name, rs):
    t = [r[0] for r in rs]
    med, best, kb = statistics.median(t), min(t), max(r[1] for r in rs)
    return med, f"{name} {steps:>5} steps: hot median {med:5.2f} s {n/med/1e6:6.1f} M bins/s, best {best:5.2f} s {n/best/1e6:6.1f} M bins/s ({len(t)} runs), peak {kb/1024:4.0f} MB"
med, text = line("axsift", ours)
ti, ki = float(idle[0]), float(idle[1])
print(f"{text} | after 12 s idle {ti:5.2f} s {n/ti/1e6:6.1f} M bins/s peak {ki/1024:4.0f} MB")
if before:
    med_before, text = line("before", before)
    print(f"{text} | this build {med_before/med:4.2f}x faster (medians)")
PY
done

night="$work/night3000.h5"
for fit in fft savgol; do
  read -r t kb < <(measure "$python" "$root/scripts/baseline_numpy.py" --fit "$fit" "$night")
  python3 - "$fit" "$t" "$kb" "${hot[3000]}" <<'PY'
import sys
fit, t, kb, ours = sys.argv[1], float(sys.argv[2]), float(sys.argv[3]), float(sys.argv[4])
print(f"numpy ({fit:>6} fit) 3000 steps: {t:6.2f} s {3000*32768/t/1e6:6.1f} M bins/s peak {kb/1024:5.0f} MB; axsift (hot median) is {t/ours:5.1f}x faster")
PY
done

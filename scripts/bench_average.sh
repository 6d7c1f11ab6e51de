#!/usr/bin/env bash
# Averaging benchmark: simulates int16 IQ captures of the invented facility (4096-sample
# segments at 409.6 kHz) and averages them into run files with `axsift average --fft-bins
# 4096` (Hann, no overlap): complex samples per second end to end (capture in, run file out,
# hot page cache) and peak RSS, the median and best of several runs, for
#   short:  16 steps x 4 M samples (67 M samples, 0.27 GB)
#   night:  64 steps x 4 M samples (268 M samples, 1.07 GB)
#   long:   32 steps x 8 M samples (268 M samples, 1.07 GB in longer steps)
# so the memory can be seen not to grow with the capture. Then the numpy/scipy reference
# (scripts/bench_average_ref.py: scipy.signal.welch per step) on the night capture in the same
# run, its speed and memory, the ratio of the medians, and the largest difference per bin.
# Not part of the tests: timings on shared machines are noisy, hence medians.
# Usage: bash scripts/bench_average.sh [work dir, default /tmp/axsift-bench-average]
set -euo pipefail
work="${1:-/tmp/axsift-bench-average}"
source "$(dirname "$0")/bench_common.sh"
runs=7

# name steps averages-per-step
for spec in "short 16 1024" "night 64 1024" "long 32 2048"; do
  read -r name steps averages <<<"$spec"
  capture="$work/$name.h5"
  if [ ! -f "$capture" ]; then
    sed -e "s/^n_steps = .*/n_steps = $steps/" -e "s/^n_averages = .*/n_averages = $averages/" -e "s/^n_bins = .*/n_bins = 4096/" \
      -e "s/^step_bins = .*/step_bins = 2000/" "$root/fixtures/demo_night.toml" > "$work/$name.toml"
    "$axsift" -q simulate --capture --scenario "$work/$name.toml" --out "$capture"
  fi
  cat "$capture" > /dev/null   # page cache
  measure "$axsift" -q average --fft-bins 4096 --out "$work/$name-run.h5" "$capture" >/dev/null
  results=()
  for _ in $(seq "$runs"); do
    results+=("$(measure "$axsift" -q average --fft-bins 4096 --out "$work/$name-run.h5" "$capture")")
  done
  python3 - "$name" "$((steps * averages * 4096))" "${results[@]}" <<'PY' | tee -a "$work/summary.txt"
import statistics, sys
name, n = sys.argv[1], int(sys.argv[2])
runs = [tuple(map(float, r.split())) for r in sys.argv[3:]]
t = [r[0] for r in runs]
med, best, kb = statistics.median(t), min(t), max(r[1] for r in runs)
print(f"axsift {name:>5}: {n/1e6:6.0f} M samples: median {med:5.2f} s {n/med/1e6:6.1f} M samples/s, best {best:5.2f} s {n/best/1e6:6.1f} M samples/s ({len(t)} runs), peak {kb/1024:4.0f} MB")
PY
done

night="$work/night.h5"
samples=$((64 * 1024 * 4096))
ref=()
for _ in 1 2 3; do
  ref+=("$(measure "$python" "$root/scripts/bench_average_ref.py" "$night" "$work/night-ref.h5" --fft-bins 4096)")
done
ours=()
for _ in 1 2 3; do
  ours+=("$(measure "$axsift" -q average --fft-bins 4096 --out "$work/night-run.h5" "$night")")
done
"$python" "$root/scripts/bench_average_ref.py" "$night" "$work/night-ref.h5" --fft-bins 4096 --compare "$work/night-run.h5"
python3 - "$samples" "${#ref[@]}" "${ref[@]}" "${ours[@]}" <<'PY' | tee -a "$work/summary.txt"
import statistics, sys
n, k = int(sys.argv[1]), int(sys.argv[2])
runs = [tuple(map(float, r.split())) for r in sys.argv[3:]]
ref, ours = runs[:k], runs[k:]
tr, to = statistics.median(r[0] for r in ref), statistics.median(r[0] for r in ours)
print(f"numpy/scipy night: median {tr:6.2f} s {n/tr/1e6:6.1f} M samples/s, peak {max(r[1] for r in ref)/1024:5.0f} MB ({k} runs); "
      f"axsift in the same run {to:5.2f} s: {tr/to:5.1f}x faster (medians)")
PY

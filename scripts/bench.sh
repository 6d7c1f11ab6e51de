#!/usr/bin/env bash
# Whole-reduction benchmark: simulates nights of 32768-bin steps (f32, the demo facility), reduces
# each with `axsift reduce` and the default pipeline.toml, and prints input bins/s and peak RSS:
# the median and best of several runs right after one another (hot), and one run after a 12 s
# idle pause. Nights: 300, 3000 and 10000 steps 200 bins apart (the demo scan; 0.1 to 2 M RF
# bins), and "wide", fixtures/wide_night.toml (3000 steps 6553 bins apart, 19.7 M RF bins).
# Then runs the numpy/scipy baselines (scipy savgol_filter, and an FFT fit) on the 3000-step
# and the wide night, medians of several runs, and prints their ratios to axsift's median.
# Each run writes into a new output folder, as a morning's reduction does (the previous run's
# folder is removed before it, untimed): on ext4 a run that replaces an earlier results.h5
# pays for writing the new one out inside the rename (0.3 s for the wide night's 395 MB).
# Not part of the tests: timings on shared machines are noisy, hence medians.
# Usage: bash scripts/bench.sh [work dir, default /tmp/axsift-bench]
# Environment: BENCH_NIGHTS (default "300 3000 10000 wide campaign") chooses the nights;
# "campaign" runs scripts/bench_state.sh last (nightly updates of 1e7- and 1e8-bin states,
# RUNS=3 there, against the same nights reduced without a state and the numpy/scipy reference
# scripts/bench_state_ref.py on campaigns of the same sizes),
# BENCH_STATE_NIGHTS (default "wide", those of them measured) the nights also added to a new
# analysis state (3 runs each), BENCH_BASELINE_NIGHTS (default "3000 wide", those of them
# measured) the baselines' nights,
# BENCH_BASELINE_RUNS (default 3) the baselines' runs per night and fit.
# With AXSIFT_BEFORE=/path/to/an/older/axsift, that build is measured in the same run,
# alternating with this one run by run, and the ratio of the medians printed.
set -euo pipefail
work="${1:-/tmp/axsift-bench}"
source "$(dirname "$0")/bench_common.sh"
bins=32768
requested="${BENCH_NIGHTS:-300 3000 10000 wide campaign}"
nights="$(echo "$requested" | tr ' ' '\n' | grep -vx campaign | tr '\n' ' ' || true)"
baseline_nights="${BENCH_BASELINE_NIGHTS:-3000 wide}"
baseline_runs="${BENCH_BASELINE_RUNS:-3}"

# Median of the first fields of "seconds peak_kb" lines.
median_s() {
  python3 - "$@" <<'PY'
import statistics, sys
print(statistics.median(float(r.split()[0]) for r in sys.argv[1:]))
PY
}

# Steps of a night by name.
steps_of() {
  case "$1" in
    wide) sed -n 's/^n_steps = \([0-9]*\).*/\1/p' "$root/fixtures/wide_night.toml" ;;
    *) echo "$1" ;;
  esac
}

# Simulates the night `name` into $work/night<name>.h5 unless it is there.
make_night() {
  local name="$1" night="$work/night$1.h5"
  [ -f "$night" ] && return
  if [ "$name" = wide ]; then
    cp "$root/fixtures/wide_night.toml" "$work/night$name.toml"
  else
    sed -e "s/^n_steps = .*/n_steps = $name/" -e "s/^n_bins = .*/n_bins = $bins/" "$root/fixtures/demo_night.toml" > "$work/night$name.toml"
  fi
  "$axsift" -q simulate --scenario "$work/night$name.toml" --out "$night"
}

# Reduces NIGHT with BUILD into a new folder OUT (an earlier one removed first, untimed), with
# any further arguments; prints "seconds peak_kb".
reduce_fresh() {
  rm -rf "$2"
  measure "$1" -q reduce --config "$root/pipeline.toml" --out "$2" "$3" "${@:4}"
}

# Runs of each build per night (hot, alternating with the earlier build if given).
declare -A repeats=([300]=7 [3000]=5 [10000]=3 [wide]=5)
declare -A hot
for name in $nights; do
  steps="$(steps_of "$name")"
  night="$work/night$name.h5"
  make_night "$name"
  cat "$night" > /dev/null   # page cache
  reduce_fresh "$axsift" "$work/out$name" "$night" >/dev/null
  ours=() before=()
  for _ in $(seq "${repeats[$name]}"); do
    ours+=("$(reduce_fresh "$axsift" "$work/out$name" "$night")")
    if [ -n "${AXSIFT_BEFORE:-}" ]; then
      before+=("$(reduce_fresh "$AXSIFT_BEFORE" "$work/before$name" "$night")")
    fi
  done
  sleep 12
  idle="$(reduce_fresh "$axsift" "$work/out$name" "$night")"
  hot[$name]="$(median_s "${ours[@]}")"
  python3 - "$name" "$steps" "$idle" "${#ours[@]}" "${ours[@]}" "${before[@]}" <<'PY'
import statistics, sys
name, steps, idle, k = sys.argv[1], int(sys.argv[2]), sys.argv[3].split(), int(sys.argv[4])
runs = [tuple(map(float, r.split())) for r in sys.argv[5:]]
ours, before = runs[:k], runs[k:]
n = steps * 32768
def line(build, rs):
    t = [r[0] for r in rs]
    med, best, kb = statistics.median(t), min(t), max(r[1] for r in rs)
    return med, f"{build} {name:>5} ({steps} steps): hot median {med:5.2f} s {n/med/1e6:6.1f} M bins/s, best {best:5.2f} s {n/best/1e6:6.1f} M bins/s ({len(t)} runs), peak {kb/1024:4.0f} MB"
med, text = line("axsift", ours)
ti, ki = float(idle[0]), float(idle[1])
print(f"{text} | after 12 s idle {ti:5.2f} s {n/ti/1e6:6.1f} M bins/s peak {ki/1024:4.0f} MB")
if before:
    med_before, text = line("before", before)
    print(f"{text} | this build {med_before/med:4.2f}x faster (medians)")
PY
done

# The same nights added to a new analysis state (the first morning of a campaign), which
# streams the night into the state's sums and writes the span's outputs tile by tile.
for name in ${BENCH_STATE_NIGHTS:-wide}; do
  [ -n "${hot[$name]:-}" ] || continue
  runs=()
  for _ in 1 2 3; do
    rm -rf "$work/state$name"
    runs+=("$(reduce_fresh "$axsift" "$work/outstate$name" "$work/night$name.h5" --state "$work/state$name")")
  done
  python3 - "$name" "$(steps_of "$name")" "${runs[@]}" <<'PY'
import statistics, sys
name, steps = sys.argv[1], int(sys.argv[2])
runs = [tuple(map(float, r.split())) for r in sys.argv[3:]]
t = statistics.median(r[0] for r in runs)
kb = max(r[1] for r in runs)
print(f"axsift {name:>5} into a new state: median {t:5.2f} s {steps*32768/t/1e6:6.1f} M bins/s ({len(runs)} runs), peak {kb/1024:4.0f} MB")
PY
done

for name in $baseline_nights; do
  [ -n "${hot[$name]:-}" ] || continue
  steps="$(steps_of "$name")"
  for fit in fft savgol; do
    runs=()
    for _ in $(seq "$baseline_runs"); do
      runs+=("$(measure "$python" "$root/scripts/baseline_numpy.py" --fit "$fit" "$work/night$name.h5")")
    done
    python3 - "$name" "$steps" "$fit" "${hot[$name]}" "${runs[@]}" <<'PY'
import statistics, sys
name, steps, fit, ours = sys.argv[1], int(sys.argv[2]), sys.argv[3], float(sys.argv[4])
runs = [tuple(map(float, r.split())) for r in sys.argv[5:]]
t = statistics.median(r[0] for r in runs)
kb = max(r[1] for r in runs)
print(f"numpy ({fit:>6} fit) {name:>5}: median {t:6.2f} s {steps*32768/t/1e6:6.1f} M bins/s ({len(runs)} runs) peak {kb/1024:5.0f} MB; axsift (hot median) is {t/ours:5.1f}x faster")
PY
  done
done
if echo "$requested" | tr ' ' '\n' | grep -qx campaign; then
  echo "campaign states (scripts/bench_state.sh):"
  RUNS="${RUNS:-3}" WORK="$work/campaign" bash "$root/scripts/bench_state.sh"
fi

#!/usr/bin/env bash
# Campaign-state benchmark: the cost of one nightly `reduce --state` update on states of 1e7
# and 1e8 RF bins (100 Hz bins: 1 GHz and 10 GHz of simulated campaign), for nights of two RF
# spans. The large states are built cheaply from tens of simulated nights of 128-bin steps
# (one step per 128 bins, 4 M RF bins a night at most), with the default pipeline but a
# 31-bin Savitzky-Golay window (a 128-bin step cannot hold the default 401). Each measured
# update starts from a hard-linked copy of the built state (an update never changes a file
# in place: it writes new block and candidate files and renames a new state.json), so every
# run sees the same state. Prints median wall time and peak RSS (/usr/bin/time) of RUNS runs
# per case, and the same night reduced without a state beside it. Then the numpy/scipy
# reference, scripts/bench_state_ref.py (.venv's pinned numpy/scipy/h5py, scripts/setup.sh
# checks), on the same nights against campaigns of the same grids: the per-bin sums in three
# memory-mapped .npy files (20 bytes a bin, 0.2 and 2.0 GB, built once from random sums in
# seconds), into which an update adds the night and over whose span it recomputes the grand
# spectrum and the bins above threshold (no candidate tracking, IF profile or commit); each
# run from the same campaign (the span's sums kept and written back, untimed). Prints its
# median wall time (Python start-up and imports included), peak RSS, the median of the time
# the script measures itself, and the ratio of the medians, numpy / axsift, per case.
#
#   bash scripts/bench_state.sh            # RUNS=5, work in a temporary folder
#   RUNS=3 WORK=/tmp/bs bash scripts/bench_state.sh
set -euo pipefail
cd "$(dirname "$0")/.."
export HDF5_USE_FILE_LOCKING=FALSE
cargo build --release --quiet
bash scripts/setup.sh checks   # .venv with the pinned numpy/scipy/h5py of the reference
exe="$PWD/target/release/axsift"
python="$PWD/.venv/bin/python"
ref="$PWD/scripts/bench_state_ref.py"
runs="${RUNS:-5}"
work="${WORK:-$(mktemp -d)}"
mkdir -p "$work"
sed 's/^window_bins = 401/window_bins = 31/' pipeline.toml >"$work/bench.toml"

# scenario SEED FIRST_CAVITY_HZ N_STEPS STEP_BINS N_BINS
scenario() {
    cat <<EOF
seed = $1
run_label = "campaign benchmark night $1 (simulated)"
[facility]
magnet_field_t = 8.0
cavity_volume_m3 = 0.02
form_factor = 0.45
[scan]
first_cavity_freq_hz = $2
n_steps = $3
step_bins = $4
n_bins = $5
bin_width_hz = 100.0
loaded_q = 50000.0
coupling_beta = 2.0
noise_temp_k = 0.6
n_averages = 20000
gain_ripple = 0.05
gain_ripple_period_bins = 1500.0
baseline_drift = 0.02
EOF
}

# build NAME N_NIGHTS STEPS_PER_NIGHT: adjacent nights of 128-bin steps from 5.2 GHz up.
build() {
    local dir="$work/$1" t0
    [ -f "$dir/state.json" ] && return
    t0=$(date +%s)
    for ((i = 0; i < $2; i++)); do
        scenario $((100 + i)) "$(awk -v i="$i" -v n="$3" 'BEGIN { printf "%.1f", 5.2e9 + i * n * 12800 }')" "$3" 128 128 >"$work/build.toml"
        "$exe" -q simulate --scenario "$work/build.toml" --out "$work/build.h5"
        "$exe" -q reduce --config "$work/bench.toml" --state "$dir" --out "$work/build-out" "$work/build.h5"
    done
    rm -rf "$work/build.h5" "$work/build-out"
    echo "built $1: $("$exe" status --json --state "$dir" | grep -o '"covered_hz": [0-9.e+]*'), $(du -sh "$dir" | cut -f1) on disk" \
        "(state.json $(du -h "$dir/state.json" | cut -f1), candidates/ $(du -sh "$dir/candidates" | cut -f1) in $(ls "$dir/candidates" | wc -l) files), $(($(date +%s) - t0)) s"
}

median() { sort -g | awk '{v[NR] = $1} END {print v[int((NR + 1) / 2)]}'; }
declare -A medians   # axsift's median wall time per case, "STEPS STATE"

# measure LABEL STATE NIGHT: median wall time and peak RSS of RUNS updates (STATE empty: no state).
measure() {
    local times=() rss=() k
    for ((k = 0; k < runs; k++)); do
        rm -rf "$work/run" "$work/run-out"
        local args=()
        if [ -n "$2" ]; then
            cp -al "$work/$2" "$work/run"
            args=(--state "$work/run")
        fi
        /usr/bin/time -f "%e %M" -o "$work/time.txt" "$exe" -q reduce --config "$work/bench.toml" "${args[@]}" --out "$work/run-out" "$3"
        read -r t m <"$work/time.txt"
        times+=("$t")
        rss+=("$m")
    done
    medians["$3 $2"]="$(printf '%s\n' "${times[@]}" | median)"
    printf '%-34s median %6.2f s (%s)  peak RSS median %4d MB\n' "$1" "${medians["$3 $2"]}" "${times[*]}" \
        $(($(printf '%s\n' "${rss[@]}" | median) / 1024))
}

# ref_build NAME STATE: the numpy reference's campaign (scripts/bench_state_ref.py init) on the
# grid of the built axsift state STATE: three memory-mapped .npy files, 20 bytes a bin.
ref_build() {
    local dir="$work/$1" t0 grid
    [ -f "$dir/sums.json" ] && return
    t0=$(date +%s)
    grid=$("$python" -c 'import json, sys; s = json.load(open(sys.argv[1])); print(s["rf_origin_hz"], s["grid_bins"][1] - s["grid_bins"][0])' "$work/$2/state.json")
    read -r origin bins <<<"$grid"
    "$python" "$ref" init "$dir" --bins "$bins" --origin-hz "$origin" --like "$work/night-1000.h5" --window 31
    echo "built $1 (numpy reference, $bins bins): $(du -sh "$dir" | cut -f1) on disk, $(($(date +%s) - t0)) s"
}

# measure_ref LABEL CAMPAIGN NIGHT STATE: median wall time and peak RSS of RUNS reference updates,
# each from the same campaign (the night's span of the sums kept before and written back after,
# untimed), and the ratio of the medians to axsift's update of NIGHT into STATE.
measure_ref() {
    local times=() rss=() own=() k
    for ((k = 0; k < runs; k++)); do
        rm -f "$work/ref-out.h5"
        "$python" "$ref" save-span "$work/$2" "$3" "$work/ref-span.npz"
        /usr/bin/time -f "%e %M" -o "$work/time.txt" "$python" "$ref" update "$work/$2" "$3" --window 31 --out "$work/ref-out.h5" >"$work/ref.txt"
        "$python" "$ref" restore-span "$work/$2" "$work/ref-span.npz"
        read -r t m <"$work/time.txt"
        times+=("$t")
        rss+=("$m")
        own+=("$(cut -d' ' -f1 "$work/ref.txt")")
    done
    local med ours
    med="$(printf '%s\n' "${times[@]}" | median)"
    ours="${medians["$3 $4"]}"
    printf '%-34s median %6.2f s (%s)  peak RSS median %4d MB; in the script %.2f s; numpy / axsift %.1fx\n' "$1" "$med" "${times[*]}" \
        $(($(printf '%s\n' "${rss[@]}" | median) / 1024)) "$(printf '%s\n' "${own[@]}" | median)" "$(awk -v a="$med" -v b="$ours" 'BEGIN { print a / b }')"
    echo "    $(cat "$work/ref.txt")"
}

build state-1e7 20 3907   # 20 nights x 500 096 bins: 1.0e7 RF bins
build state-1e8 25 31250  # 25 nights x 4 000 000 bins: 1.0e8 RF bins

# Measured nights inside both campaigns (a rescan of 5.25-5.29 GHz): 4096-bin steps 200 bins
# apart, 1000 and 2000 steps (RF spans 0.20 M and 0.40 M bins).
for steps in 1000 2000; do
    scenario 7 5.25e9 "$steps" 200 4096 >"$work/night-$steps.toml"
    [ -f "$work/night-$steps.h5" ] || "$exe" -q simulate --scenario "$work/night-$steps.toml" --out "$work/night-$steps.h5"
done
for steps in 1000 2000; do
    measure "night $steps steps, no state" "" "$work/night-$steps.h5"
    measure "night $steps steps, 1e7-bin state" state-1e7 "$work/night-$steps.h5"
    measure "night $steps steps, 1e8-bin state" state-1e8 "$work/night-$steps.h5"
done
ref_build ref-1e7 state-1e7
ref_build ref-1e8 state-1e8
for steps in 1000 2000; do
    measure_ref "numpy $steps steps, 1e7-bin campaign" ref-1e7 "$work/night-$steps.h5" state-1e7
    measure_ref "numpy $steps steps, 1e8-bin campaign" ref-1e8 "$work/night-$steps.h5" state-1e8
done
rm -f "$work/ref-out.h5" "$work/ref-span.npz" "$work/ref.txt"
rm -rf "$work/run" "$work/run-out"
/usr/bin/time -f "%e %M" -o "$work/time.txt" "$exe" -q export --config "$work/bench.toml" --state "$work/state-1e7" --out "$work/campaign.h5"
read -r t m <"$work/time.txt"
echo "export of the 1e7-bin state: $t s, peak RSS $((m / 1024)) MB, $(du -h "$work/campaign.h5" | cut -f1)"
rm -f "$work/campaign.h5"
echo "work folder: $work"

#!/usr/bin/env python3
"""numpy/scipy reference of one nightly `axsift reduce --state` update, for scripts/bench_state.sh.

The campaign is kept the way a straightforward analysis script would keep it: per RF bin the
sums over all nights (sum of 1/sigma^2 `weight`, f64; sum of R/sigma^2 `weighted_sum`, f64;
steps `coverage`, u32: 20 bytes a bin, as in axsift's state blocks) in three .npy files opened
with np.load(mmap_mode="r+"), and the grid (origin, bin width, bins) in sums.json. An update
touches only the night's span of them:

  read the night's run file (h5py, the whole night in memory); the per-step chain of
  scripts/baseline_numpy.py (imported: ingest, gain shape, FFT Savitzky-Golay fit of order 4
  with --window bins, delta, rescale); inverse-variance combination on the night's RF grid;
  add it into the campaign's sums over the night's span; the grand spectrum (the Maxwellian
  lineshape filter of baseline_numpy.py, the lineshape at the centre of the recomputed range,
  divided by the null spread predicted from the lineshape and Savitzky-Golay kernels,
  ||L - h*L|| / ||L||) over the span and one kernel length on either side; bins above 3.355
  (= 5 - z_0.95) and their runs of adjacent bins (one candidate each) written with the
  range's grand spectrum to --out (HDF5, written to a temporary name and renamed); flush the
  sums.

It does not track candidates across nights, make an IF profile or test for interference, cut
steps by their residual spread, keep a generation or commit protocol (the sums are changed in
place), hash the input or compute limits. Subcommands:

  init FOLDER --bins N --origin-hz F --like RUN --window W   the campaign's files, untimed:
      every bin seen by one step centred on it with RUN's first step's T_sys, Q_L, beta and
      averages (weight N / (k_B T dnu_b / P_sig(f))^2; weighted_sum a normal draw of spread
      sqrt(weight) times the predicted spread, so the grand spectrum has unit spread there;
      coverage 1), in chunks of 1e7 bins; 20 bytes a bin on disk (2.0 GB for 1e8 bins)
  update FOLDER RUN --window W --out OUT          the timed update; prints one line
  save-span FOLDER RUN SAVED / restore-span FOLDER SAVED
      keep the sums over RUN's span in an .npz and write them back (untimed), so that every
      measured update starts from the same campaign

Usage: .venv/bin/python scripts/bench_state_ref.py update /tmp/bs/ref-1e7 night.h5 --window 31 --out o.h5
"""
import argparse
import json
import os
import resource
import sys
import time

import h5py
import numpy as np
from scipy import signal

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
from baseline_numpy import D, combine, grand_spectrum, lineshape, power_scale, read_run, residuals  # noqa: E402

THRESHOLD = 3.355
ARRAYS = {"weight": np.float64, "weighted_sum": np.float64, "coverage": np.uint32}
CHUNK_BINS = 10_000_000
MAX_MISALIGNMENT_BINS = 1e-3


def open_sums(folder, mode):
    """The grid (sums.json) and the three memory-mapped sums of the campaign in folder."""
    path = os.path.join(folder, "sums.json")
    try:
        with open(path) as f:
            grid = json.load(f)
    except (OSError, ValueError) as e:
        raise SystemExit(f"{path}: cannot read the campaign grid: {e}")
    sums = {}
    for name in ARRAYS:
        p = os.path.join(folder, f"{name}.npy")
        sums[name] = np.load(p, mmap_mode=mode)
        if sums[name].shape != (grid["n_bins"],):
            raise SystemExit(f"{p}: shape {sums[name].shape}, sums.json says n_bins {grid['n_bins']}")
    return grid, sums


def predicted_spread(line, window):
    """Null spread of the lineshape filter on Savitzky-Golay residuals, ||L - h*L|| / ||L||
    (h the fit's interior kernel): the grand spectrum is divided by it."""
    h = signal.savgol_coeffs(window, D)
    padded = np.zeros(len(line) + window - 1)
    padded[window // 2:window // 2 + len(line)] = line
    return np.linalg.norm(padded - np.convolve(line, h)) / np.linalg.norm(line)


def night_span(grid, run, start_freq_hz, step_bins):
    """First campaign bin and RF bins of a night whose steps start at start_freq_hz."""
    bw = grid["bin_width_hz"]
    lo = start_freq_hz.min()
    offset = (lo - grid["rf_origin_hz"]) / bw
    first = int(round(offset))
    if abs(offset - first) > MAX_MISALIGNMENT_BINS:
        raise SystemExit(f"{run}: lowest start_freq_hz {lo} is {offset - first:+.4f} bins off the campaign grid")
    n = int(round((start_freq_hz.max() - lo) / bw)) + step_bins
    if first < 0 or first + n > grid["n_bins"]:
        raise SystemExit(f"{run}: RF bins {first} to {first + n - 1} outside the campaign's 0 to {grid['n_bins'] - 1}")
    return first, n


def init(a):
    """Creates the campaign's files, filled as one plausible earlier night per bin."""
    os.makedirs(a.folder, exist_ok=True)
    _, st, h = read_run(a.like)
    m = {"q": st["loaded_q"][0], "beta": st["coupling_beta"][0], "t": st["noise_temp_k"][0]}
    n_avg = float(st["n_averages"][0])
    sums = {name: np.lib.format.open_memmap(os.path.join(a.folder, f"{name}.npy"), mode="w+", dtype=t, shape=(a.bins,)) for name, t in ARRAYS.items()}
    rng = np.random.default_rng(1)
    for lo in range(0, a.bins, CHUNK_BINS):
        hi = min(a.bins, lo + CHUNK_BINS)
        f_hz = a.origin_hz + np.arange(lo, hi) * h["bw"]
        w = n_avg / power_scale(h, dict(m, fc=f_hz), f_hz) ** 2
        spread = predicted_spread(lineshape(f_hz[len(f_hz) // 2], h["bw"]), a.window)
        sums["weight"][lo:hi] = w
        sums["weighted_sum"][lo:hi] = rng.standard_normal(hi - lo) * (spread * np.sqrt(w))
        sums["coverage"][lo:hi] = 1
    for s in sums.values():
        s.flush()
    path = os.path.join(a.folder, "sums.json")
    with open(path + ".tmp", "w") as f:
        json.dump({"rf_origin_hz": a.origin_hz, "bin_width_hz": float(h["bw"]), "n_bins": a.bins}, f)
    os.replace(path + ".tmp", path)


def update(a):
    """One nightly update; prints seconds, peak RSS and what it found."""
    t0 = time.perf_counter()
    grid, sums = open_sums(a.folder, "r+")
    p, st, h = read_run(a.run)
    if h["bw"] != grid["bin_width_hz"]:
        raise SystemExit(f"{a.run}: bin_width_hz {h['bw']}, the campaign's is {grid['bin_width_hz']}")
    first, n = night_span(grid, a.run, st["start_freq_hz"], p.shape[1])
    delta = residuals(p, "fft", a.window)
    del p
    _, wsum, wr, cov = combine(st, h, delta, coverage=True)
    del delta
    sums["weight"][first:first + n] += wsum
    sums["weighted_sum"][first:first + n] += wr
    sums["coverage"][first:first + n] += cov
    # Recomputed range: every bin whose line reaches into the span, and one kernel length more above.
    bw = grid["bin_width_hz"]
    line = lineshape(grid["rf_origin_hz"] + (first + n / 2) * bw, bw)
    lo = max(0, first - len(line))
    hi = min(grid["n_bins"], first + n + len(line))
    end = min(grid["n_bins"], hi + len(line) - 1)
    grand = grand_spectrum(sums["weighted_sum"][lo:end], sums["weight"][lo:end], line)[: hi - lo] / predicted_spread(line, a.window)
    above = grand > THRESHOLD
    edges = np.diff(np.concatenate(([0], above.astype(np.int8), [0])))
    starts, stops = np.flatnonzero(edges == 1), np.flatnonzero(edges == -1)
    peaks = np.maximum.reduceat(np.where(above, grand, -np.inf), starts) if len(starts) else np.zeros(0)
    tmp = a.out + ".tmp"
    with h5py.File(tmp, "w") as f:
        f.attrs["rf_start_hz"] = grid["rf_origin_hz"] + lo * bw
        f.attrs["bin_width_hz"] = bw
        f.attrs["first_bin"] = lo
        f.create_dataset("grand", data=grand)
        f.create_dataset("candidate_freq_hz", data=grid["rf_origin_hz"] + (lo + starts) * bw)
        f.create_dataset("candidate_bins", data=stops - starts)
        f.create_dataset("candidate_grand", data=peaks)
    os.replace(tmp, a.out)
    for s in sums.values():
        s.flush()
    elapsed = time.perf_counter() - t0
    rss_mb = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    print(f"{elapsed:.3f} s, peak RSS {rss_mb:.0f} MB: night of {n} RF bins into {grid['n_bins']}, grand over {hi - lo} bins "
          f"(std {np.nanstd(grand):.3f}), {int(above.sum())} above {THRESHOLD} in {len(starts)} candidates")


def save_span(a):
    """Keeps the sums over the night's span in an .npz."""
    grid, sums = open_sums(a.folder, "r")
    with h5py.File(a.run, "r") as f:
        start, step_bins = f["steps"]["start_freq_hz"][...], f["spectra"].shape[1]
    first, n = night_span(grid, a.run, start, step_bins)
    np.savez(a.saved, first=first, **{name: s[first:first + n] for name, s in sums.items()})


def restore_span(a):
    """Writes sums kept by save-span back into the campaign."""
    _, sums = open_sums(a.folder, "r+")
    with np.load(a.saved) as kept:
        first = int(kept["first"])
        for name, s in sums.items():
            s[first:first + len(kept[name])] = kept[name]
            s.flush()


def main():
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    sub = ap.add_subparsers(dest="cmd", required=True)
    p = sub.add_parser("init")
    p.add_argument("folder")
    p.add_argument("--bins", type=int, required=True)
    p.add_argument("--origin-hz", type=float, required=True)
    p.add_argument("--like", required=True)
    p.add_argument("--window", type=int, required=True)
    p.set_defaults(func=init)
    p = sub.add_parser("update")
    p.add_argument("folder")
    p.add_argument("run")
    p.add_argument("--window", type=int, required=True)
    p.add_argument("--out", required=True)
    p.set_defaults(func=update)
    p = sub.add_parser("save-span")
    p.add_argument("folder")
    p.add_argument("run")
    p.add_argument("saved")
    p.set_defaults(func=save_span)
    p = sub.add_parser("restore-span")
    p.add_argument("folder")
    p.add_argument("saved")
    p.set_defaults(func=restore_span)
    a = ap.parse_args()
    a.func(a)


if __name__ == "__main__":
    main()

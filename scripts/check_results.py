#!/usr/bin/env python3
"""Checks the outputs of a reduction as a Python user opens them.

Usage: check_results.py OUTPUT_FOLDER   (written by `axsift demo` or `axsift reduce`)

- every dataset in results.h5 carries non-empty `units` and `description` attributes;
- the frequency axis (root attributes rf_start_hz, bin_width_hz, n_rf_bins) spans the
  summary's rf_start_hz to rf_stop_hz;
- the predicted spread's runs expand to one value per bin, and with them A / (sigma_A *
  spread) from the amplitude and sigma_a datasets is the stored grand spectrum, within the
  four single-precision roundings (5 x 2^-24 relative);
- one MHz of the grand spectrum is read without reading the file: the datasets are chunked
  and a 1 MHz slice touches at most two chunks;
- the candidates listed in summary.json are the strongest of those in results.h5 (frequencies
  and significances), and their count is n_candidates;
- summary.json's `no_data` holds bins and steps for each cause (masked, non_finite,
  non_positive): non-negative integers, zero together, at most n_steps_in steps;
- the grand spectrum's mean and spread, the bins above the threshold and the valid bins
  recomputed from results.h5 agree with summary.json, within what the single precision of
  results.h5 allows: each value rounded by at most 2^-24 of the largest |value|, so the mean
  and the spread move by no more than that (the threshold count is compared exactly: no
  value lies that close to the threshold on the demo night).
Exits 1 with one line per problem.
"""
import json
import sys
from pathlib import Path

import h5py
import numpy as np


def main(folder: Path) -> int:
    summary = json.loads((folder / "summary.json").read_text())
    problems = []
    with h5py.File(folder / "results.h5", "r") as f:
        datasets = []
        f.visititems(lambda name, obj: datasets.append(name) if isinstance(obj, h5py.Dataset) else None)
        for name in datasets:
            for attr in ("units", "description"):
                value = f[name].attrs.get(attr)
                if value is None or str(value).strip() == "":
                    problems.append(f"dataset {name}: attribute `{attr}` missing or empty")
        grand = f["grand"][()].astype(np.float64)
        start, width, n = f.attrs["rf_start_hz"], f.attrs["bin_width_hz"], int(f.attrs["n_rf_bins"])
        chunk = f["grand"].chunks
        one_mhz = int(np.ceil(1e6 / width))
        if chunk is None or -(-one_mhz // chunk[0]) + 1 > 2:
            problems.append(f"grand: chunks {chunk}; one MHz ({one_mhz} bins) should touch at most two")
        cand_f = f["candidates/frequency_hz"][()]
        cand_s = f["candidates/significance"][()]
        # The predicted spread's runs, expanded as the README says; the grand spectrum is
        # A / (sigma_A * spread), each of the four rounded by 2^-24 of itself when stored.
        first_bin, value = f["predicted_spread/first_bin"][()], f["predicted_spread/value"][()]
        spread = np.repeat(value, np.diff(first_bin, append=int(f.attrs["n_rf_bins"])))
        if len(spread) != n or first_bin[0] != 0:
            problems.append(f"predicted_spread: runs from bin {first_bin[0]} expand to {len(spread)} bins, not {n}")
        else:
            amplitude, sigma_a = f["amplitude"][()].astype(np.float64), f["sigma_a"][()].astype(np.float64)
            with np.errstate(invalid="ignore", divide="ignore"):
                recomputed = amplitude / (sigma_a * spread)
            both = np.isfinite(grand) & np.isfinite(recomputed)
            worst = np.max(np.abs(recomputed[both] - grand[both]) / np.maximum(np.abs(grand[both]), 1e-30), initial=0.0)
            if not np.array_equal(np.isfinite(grand), np.isfinite(recomputed)) or worst > 5 * 2.0**-24:
                problems.append(f"grand: A / (sigma_A * predicted_spread) departs from it by {worst:.2e} relative (bound 5 x 2^-24)")
    if n != len(grand) or abs(start - summary["rf_start_hz"]) > 1e-6 or abs(start + (n - 1) * width - summary["rf_stop_hz"]) > 1e-3:
        problems.append(f"frequency axis: {n} bins from {start} Hz by {width} Hz; summary.json has {summary['n_rf_bins']} bins, {summary['rf_start_hz']} to {summary['rf_stop_hz']} Hz")
    want_f = np.array([c["frequency_hz"] for c in summary["candidates"]], dtype=float)
    want_s = np.array([c["significance"] for c in summary["candidates"]], dtype=float)
    strongest = np.argsort(-cand_s, kind="stable")[: len(want_f)]
    if len(cand_f) != summary["n_candidates"] or len(want_f) != min(len(cand_f), len(want_f)):
        problems.append(f"candidates: {len(cand_f)} in results.h5, {len(want_f)} listed and n_candidates = {summary['n_candidates']} in summary.json")
    elif not (np.allclose(cand_f[strongest], want_f, rtol=0, atol=1e-3) and np.allclose(cand_s[strongest], want_s, rtol=1e-12, atol=0)):
        problems.append("candidates: the strongest in results.h5 differ from those listed in summary.json")
    finite = grand[np.isfinite(grand)]
    rounding = 2.0**-24 * np.abs(finite).max() if len(finite) else 0.0
    checks = [
        ("n_rf_bins", len(grand), summary["n_rf_bins"], 0),
        ("n_valid_bins", len(finite), summary["n_valid_bins"], 0),
        ("grand_mean", finite.mean(), summary["grand_mean"], rounding + 1e-12),
        ("grand_std", finite.std(), summary["grand_std"], rounding + 1e-12),
        ("n_bins_above_threshold", int((finite > summary["threshold"]).sum()), summary["n_bins_above_threshold"], 0),
    ]
    no_data = summary.get("no_data")
    if not isinstance(no_data, dict):
        problems.append("summary.json: `no_data` missing")
    else:
        for cause in ("masked", "non_finite", "non_positive"):
            c = no_data.get(cause)
            if not isinstance(c, dict) or not all(isinstance(c.get(k), int) and c[k] >= 0 for k in ("bins", "steps")):
                problems.append(f"no_data.{cause}: {c!r}, expected non-negative bins and steps")
            elif c["steps"] > summary["n_steps_in"] or (c["bins"] == 0) != (c["steps"] == 0):
                problems.append(f"no_data.{cause}: {c['bins']} bins in {c['steps']} steps of {summary['n_steps_in']}")
    for key, got, want, tol in checks:
        if want is None or abs(got - want) > tol:
            problems.append(f"{key}: {got} from results.h5, {want} in summary.json")
    for p in problems:
        print(f"check_results: {p}", file=sys.stderr)
    if not problems:
        print(f"check_results: {len(datasets)} datasets described, {len(cand_f)} candidates and the grand spectrum's spread agree with summary.json")
    return 1 if problems else 0


if __name__ == "__main__":
    if len(sys.argv) != 2:
        sys.exit(__doc__)
    sys.exit(main(Path(sys.argv[1])))

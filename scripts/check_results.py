#!/usr/bin/env python3
"""Checks the outputs of a reduction as a Python user opens them.

Usage: check_results.py OUTPUT_FOLDER   (written by `axsift demo` or `axsift reduce`)

- every dataset in results.h5 carries non-empty `units` and `description` attributes;
- the candidates in results.h5 are those of summary.json (frequencies and significances);
- the grand spectrum's mean and spread, the bins above the threshold and the valid bins
  recomputed from results.h5 agree with summary.json.
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
        grand = f["grand"][()]
        cand_f = f["candidates/frequency_hz"][()]
        cand_s = f["candidates/significance"][()]
    want_f = np.array([c["frequency_hz"] for c in summary["candidates"]], dtype=float)
    want_s = np.array([c["significance"] for c in summary["candidates"]], dtype=float)
    if len(cand_f) != summary["n_candidates"] or len(want_f) != summary["n_candidates"]:
        problems.append(f"candidates: {len(cand_f)} in results.h5, {len(want_f)} listed and n_candidates = {summary['n_candidates']} in summary.json")
    elif not (np.allclose(cand_f, want_f, rtol=0, atol=1e-3) and np.allclose(cand_s, want_s, rtol=1e-12, atol=0)):
        problems.append("candidates: frequencies or significances differ between results.h5 and summary.json")
    finite = grand[np.isfinite(grand)]
    checks = [
        ("n_rf_bins", len(grand), summary["n_rf_bins"], 0),
        ("n_valid_bins", len(finite), summary["n_valid_bins"], 0),
        ("grand_mean", finite.mean(), summary["grand_mean"], 1e-9),
        ("grand_std", finite.std(), summary["grand_std"], 1e-9),
        ("n_bins_above_threshold", int((finite > summary["threshold"]).sum()), summary["n_bins_above_threshold"], 0),
    ]
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

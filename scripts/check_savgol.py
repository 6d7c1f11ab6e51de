#!/usr/bin/env python3
"""Reference fixtures for the Savitzky-Golay smoother (src/dsp/savgol.rs).

How the fixtures were made: `python3 scripts/check_savgol.py --write` draws
2000 samples of a smooth curve plus Gaussian noise from
numpy.random.default_rng(SEED) and writes them to fixtures/savgol_input.txt,
then writes scipy.signal.savgol_filter(x, W, 4) (default mode='interp') of that
input to fixtures/savgol_scipy_w31_d4.txt (W = 31) and
fixtures/savgol_scipy_w101_d4.txt (W = 101). One value per line, printed with
Python's repr so that every float round-trips exactly.

Without --write the script recomputes everything and compares it with the
committed files, exiting with status 1 on any mismatch. It also reports how far
scipy's interior weights (savgol_coeffs) lie from the exact least-squares
weights computed in rational arithmetic; that error bounds how closely the
interior of a scipy fixture can agree with an exact smoother.
"""

import argparse
from fractions import Fraction
import pathlib
import sys

import numpy as np
import scipy
from scipy.signal import savgol_coeffs, savgol_filter

SEED = 20240611
N_SAMPLES = 2000
ORDER = 4
WINDOWS = (31, 101)
# Relative tolerance for the scipy outputs: allows for BLAS/LAPACK differences
# between installations, far below the 1e-10 the Rust test demands.
RTOL = 1e-13

FIXTURES = pathlib.Path(__file__).resolve().parent.parent / "fixtures"
INPUT_FILE = FIXTURES / "savgol_input.txt"


def output_file(window):
    return FIXTURES / f"savgol_scipy_w{window}_d{ORDER}.txt"


def make_input():
    rng = np.random.default_rng(SEED)
    t = np.linspace(0.0, 1.0, N_SAMPLES)
    curve = 1.0 + 0.3 * np.sin(2.0 * np.pi * 3.0 * t) + 0.2 * t**2 - 0.1 * np.exp(-((t - 0.6) / 0.05) ** 2)
    return curve + 0.05 * rng.standard_normal(N_SAMPLES)


def exact_interior_weights(window, order):
    """Centre-value least-squares weights, exact: row 0 of (AᵀA)⁻¹Aᵀ for the
    Vandermonde matrix A on abscissae -(W-1)/2 .. (W-1)/2."""
    half = window // 2
    xs = range(-half, half + 1)
    n = order + 1
    aug = [[Fraction(sum(x ** (i + j) for x in xs)) for j in range(n)]
           + [Fraction(int(i == j)) for j in range(n)] for i in range(n)]
    for c in range(n):
        pivot = next(r for r in range(c, n) if aug[r][c] != 0)
        aug[c], aug[pivot] = aug[pivot], aug[c]
        aug[c] = [v / aug[c][c] for v in aug[c]]
        for r in range(n):
            if r != c and aug[r][c] != 0:
                f = aug[r][c]
                aug[r] = [a - f * b for a, b in zip(aug[r], aug[c])]
    first_row = aug[0][n:]
    return np.array([float(sum(first_row[k] * x ** k for k in range(n))) for x in xs])


def write_values(path, values):
    path.write_text("".join(repr(float(v)) + "\n" for v in values))


def read_values(path):
    return np.array([float(line) for line in path.read_text().split()])


def compare(name, committed, expected, rtol):
    if committed.shape != expected.shape:
        print(f"MISMATCH {name}: {committed.size} values, expected {expected.size}")
        return False
    scale = np.max(np.abs(expected))
    err = np.max(np.abs(committed - expected)) / scale
    ok = err <= rtol
    print(f"{'ok' if ok else 'MISMATCH'} {name}: max |diff| / max|ref| = {err:.3e} (limit {rtol:.0e})")
    return ok


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--write", action="store_true", help="regenerate the fixture files")
    args = parser.parse_args()
    print(f"numpy {np.__version__}, scipy {scipy.__version__}")

    x = make_input()
    if args.write:
        FIXTURES.mkdir(exist_ok=True)
        write_values(INPUT_FILE, x)
        x = read_values(INPUT_FILE)
        for window in WINDOWS:
            write_values(output_file(window), savgol_filter(x, window, ORDER))
        print(f"wrote {INPUT_FILE.name} and {', '.join(output_file(w).name for w in WINDOWS)}")
        return 0

    committed_input = read_values(INPUT_FILE)
    ok = compare(INPUT_FILE.name, committed_input, x, 0.0)
    for window in WINDOWS:
        weight_err = np.max(np.abs(savgol_coeffs(window, ORDER) - exact_interior_weights(window, ORDER)))
        print(f"info W={window}: max |scipy weight - exact weight| = {weight_err:.2e}")
        ok &= compare(output_file(window).name, read_values(output_file(window)),
                      savgol_filter(committed_input, window, ORDER), RTOL)
    return 0 if ok else 1


if __name__ == "__main__":
    sys.exit(main())

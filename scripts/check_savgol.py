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
committed files, exiting with status 1 on any mismatch.

How close a fresh scipy run must be to the committed files: savgol_filter is a
linear map y = M x. Its rows are least-squares weights that scipy computes in
floating point (savgol_coeffs for the interior, a polynomial fit for the edge
bins of mode='interp'), so they differ from the exact weights by an amount that
depends on the scipy release and the machine's LAPACK/BLAS kernels. The script
measures that error on the installed scipy: it applies savgol_filter to the
identity matrix (M, column by column) and subtracts the exact weights computed
in rational arithmetic (interior and edges). Row i of the output is then within
e_i = ||M_scipy[i] - M_exact[i]||_1 * max|x| of the exact smoother, plus the
rounding of a W-term dot product, W * eps * sum_k |M[i,k] x_k|. The committed
files came from a scipy run of the same kind, so a fresh run may differ from them
by twice the largest such bound; a real change of the smoother (window, order,
edge mode, input) moves the output by the noise level, ~1e-2, far above it.
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
# Largest relative error of a double-precision product (numpy.finfo(float).eps / 2).
UNIT_ROUNDOFF = np.finfo(float).eps / 2

FIXTURES = pathlib.Path(__file__).resolve().parent.parent / "fixtures"
INPUT_FILE = FIXTURES / "savgol_input.txt"


def output_file(window):
    return FIXTURES / f"savgol_scipy_w{window}_d{ORDER}.txt"


def make_input():
    rng = np.random.default_rng(SEED)
    t = np.linspace(0.0, 1.0, N_SAMPLES)
    curve = 1.0 + 0.3 * np.sin(2.0 * np.pi * 3.0 * t) + 0.2 * t**2 - 0.1 * np.exp(-((t - 0.6) / 0.05) ** 2)
    return curve + 0.05 * rng.standard_normal(N_SAMPLES)


def exact_weights(window, order):
    """Least-squares weights in rational arithmetic, one row per evaluation point
    s = -(W-1)/2 .. (W-1)/2 of a window on abscissae -(W-1)/2 .. (W-1)/2: row
    (W-1)/2 is the centre (interior) weight set, the rows before and after it are
    the left and right edge bins of mode='interp'. Returns W x W Fractions."""
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
    inverse = [row[n:] for row in aug]
    rows = []
    for s in xs:
        # coefficient of x^b in the fitted value at s: sum_a s^a (A^T A)^-1_ab
        c = [sum(Fraction(s) ** a * inverse[a][b] for a in range(n)) for b in range(n)]
        rows.append([sum(c[b] * Fraction(x) ** b for b in range(n)) for x in xs])
    return rows


def exact_matrix(n_samples, window, order):
    """The exact smoother of savgol_filter(x, window, order) (mode='interp') as an
    n_samples x n_samples float matrix built from the rational weights."""
    half = window // 2
    rows = np.array([[float(w) for w in row] for row in exact_weights(window, order)])
    m = np.zeros((n_samples, n_samples))
    for i in range(n_samples):
        if i < half:
            m[i, :window] = rows[i]
        elif i >= n_samples - half:
            m[i, n_samples - window:] = rows[i - (n_samples - window)]
        else:
            m[i, i - half:i + half + 1] = rows[half]
    return m


def scipy_error_bound(x, window, order):
    """Per output bin, how far the installed scipy's savgol_filter(x) can lie from
    the exact smoother: weight error times the input's size plus the dot-product
    rounding (see the module docstring). Also returns the largest weight error."""
    m_scipy = savgol_filter(np.eye(x.size), window, order, axis=0)
    m_exact = exact_matrix(x.size, window, order)
    weight_err = np.abs(m_scipy - m_exact)
    bound = weight_err.sum(axis=1) * np.max(np.abs(x)) + window * UNIT_ROUNDOFF * (np.abs(m_exact) @ np.abs(x))
    return bound, weight_err.max()


def write_values(path, values):
    path.write_text("".join(repr(float(v)) + "\n" for v in values))


def read_values(path):
    return np.array([float(line) for line in path.read_text().split()])


def compare(name, committed, expected, allowed):
    """Checks |committed - expected| <= allowed in every bin (allowed: array or scalar)."""
    if committed.shape != expected.shape:
        print(f"MISMATCH {name}: {committed.size} values, expected {expected.size}")
        return False
    diff = np.abs(committed - expected)
    allowed = np.broadcast_to(allowed, diff.shape)
    ok = bool(np.all(diff <= allowed))
    worst = int(np.argmax(diff - allowed))
    print(f"{'ok' if ok else 'MISMATCH'} {name}: max |diff| = {diff.max():.3e}, "
          f"largest share of the allowed difference {diff[worst] / allowed[worst] if allowed[worst] > 0 else float(diff[worst] > 0):.3g} "
          f"(bin {worst}: {diff[worst]:.3e} allowed {allowed[worst]:.3e})")
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
        bound, weight_err = scipy_error_bound(committed_input, window, ORDER)
        interior_err = np.max(np.abs(savgol_coeffs(window, ORDER) - np.array([float(w) for w in exact_weights(window, ORDER)[window // 2]])))
        print(f"info W={window}: max |scipy weight - exact weight| = {weight_err:.2e} ({interior_err:.2e} in the interior); "
              f"scipy within {bound.max():.2e} of the exact smoother")
        ok &= compare(output_file(window).name, read_values(output_file(window)),
                      savgol_filter(committed_input, window, ORDER), 2.0 * bound.max())
    return 0 if ok else 1


if __name__ == "__main__":
    sys.exit(main())

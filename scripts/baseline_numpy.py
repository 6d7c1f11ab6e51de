#!/usr/bin/env python3
"""Straightforward numpy/scipy reduction of one run file, the comparison for scripts/bench.sh.

Same chain as axsift's default pipeline.toml, written the way an analysis script usually is:
the whole night in memory; ingest (positive finite power), gain shape (mean over steps,
normalised to 1), Savitzky-Golay fit (W=401, d=4) of each step divided by it, delta =
P / (G SG) - 1, rescale by k_B T dnu_b / P_sig(f) (KSVZ, 0.45 GeV/cm^3), inverse-variance
combination on the RF grid, and the Maxwellian lineshape filter. --fit chooses scipy's
savgol_filter (direct convolution) or the same interior kernel applied by FFT
(scipy.signal.fftconvolve, edges from savgol_filter on the first and last windows).
Prints one line: seconds and number of RF bins. Spread-based cuts are left out.
scripts/bench_state_ref.py imports the stages (read_run, residuals, combine, lineshape,
grand_spectrum) with its own baseline window.
"""
import argparse
import sys
import time

import h5py
import numpy as np
from scipy import signal, special

KB = 1.380649e-23
HBAR, C, ALPHA, MU0, EV = 1.054571817e-34, 299792458.0, 7.2973525693e-3, 1.25663706212e-6, 1.602176634e-19
W, D = 401, 4


def power_scale(h, m, f):
    """Per-bin k_B T dnu_b / P_sig(f) for one step (W), Lambda form, KSVZ."""
    rho = 0.45 * 1e9 * EV * 1e6
    lam = 77.6e6 * EV
    coupling = 0.97**2 * ALPHA**2 * HBAR**3 * C**3 * rho / (np.pi**2 * lam**4)
    magnet = h["B"] ** 2 * h["V"] * h["C"] / MU0
    fc, q, beta = m["fc"], m["q"], m["beta"]
    lor = 1.0 / (1.0 + 4 * q * q * (f / fc - 1.0) ** 2)
    p = coupling * magnet * 2 * np.pi * fc * q * beta / (1 + beta) * lor
    return KB * m["t"] * h["bw"] / p


def fft_savgol(x, window=W):
    """Savitzky-Golay fit of each row: FFT interior, scipy's polynomial edges."""
    h = signal.savgol_coeffs(window, D)
    out = signal.fftconvolve(x, h[np.newaxis, :], mode="same", axes=1)
    half = window // 2
    out[:, :half] = signal.savgol_filter(x[:, :window], window, D, axis=1)[:, :half]
    out[:, -half:] = signal.savgol_filter(x[:, -window:], window, D, axis=1)[:, -half:]
    return out


def read_run(path):
    """The run file's spectra (f64, one row per step), per-step metadata and facility attributes."""
    with h5py.File(path, "r") as f:
        p = f["spectra"][...].astype(np.float64)
        st = {k: f["steps"][k][...] for k in ["start_freq_hz", "cavity_freq_hz", "loaded_q", "coupling_beta", "noise_temp_k", "n_averages"]}
        h = {"bw": f.attrs["bin_width_hz"], "B": f.attrs["magnet_field_t"], "V": f.attrs["cavity_volume_m3"], "C": f.attrs["form_factor"]}
    return p, st, h


def residuals(p, fit="savgol", window=W):
    """delta = P / (G SG) - 1 per step: ingest (in place on p), gain shape, Savitzky-Golay fit."""
    p[~((p > 0) & np.isfinite(p))] = np.nan
    gain = np.nanmean(p, axis=0)
    gain /= np.nanmean(gain)
    flat = p / gain
    fitted = signal.savgol_filter(flat, window, D, axis=1) if fit == "savgol" else fft_savgol(flat, window)
    return flat / fitted - 1.0


def combine(st, h, delta, coverage=False):
    """Inverse-variance sums on the night's RF grid from its lowest start frequency:
    (lowest start frequency in Hz, sum of 1/sigma^2, sum of R/sigma^2[, steps per bin])."""
    n_steps, n_bins = delta.shape
    lo = st["start_freq_hz"].min()
    n_rf = int(round((st["start_freq_hz"].max() - lo) / h["bw"])) + n_bins
    wsum, wr = np.zeros(n_rf), np.zeros(n_rf)
    cov = np.zeros(n_rf, dtype=np.uint32) if coverage else None
    k = np.arange(n_bins)
    for i in range(n_steps):
        m = {"fc": st["cavity_freq_hz"][i], "q": st["loaded_q"][i], "beta": st["coupling_beta"][i], "t": st["noise_temp_k"][i]}
        scale = power_scale(h, m, st["start_freq_hz"][i] + k * h["bw"])
        r = delta[i] * scale
        s = scale / np.sqrt(st["n_averages"][i])
        ok = np.isfinite(r)
        first = int(round((st["start_freq_hz"][i] - lo) / h["bw"]))
        w = np.where(ok, 1.0 / s**2, 0.0)
        wsum[first:first + n_bins] += w
        wr[first:first + n_bins] += np.where(ok, w * r, 0.0)
        if coverage:
            cov[first:first + n_bins] += ok
    return (lo, wsum, wr, cov) if coverage else (lo, wsum, wr)


def lineshape(nu_hz, bw_hz):
    """Maxwellian lineshape (gamma 3/2) at nu_hz, integrated over bins of bw_hz: the power
    fraction per bin, up to 0.999 of the line."""
    scale_hz = nu_hz * (270e3 / C) ** 2 / 3
    edges = np.arange(0, 200) * bw_hz
    cdf = special.gammainc(1.5, edges / scale_hz)
    return np.diff(cdf)[: np.searchsorted(cdf, 0.999) + 1]


def grand_spectrum(wr, wsum, line):
    """Grand spectrum A_j / sigma_A,j of a line starting in each bin j (bins past the end read as empty)."""
    num = signal.fftconvolve(wr, line[::-1], mode="full")[len(line) - 1:]
    den = signal.fftconvolve(wsum, (line**2)[::-1], mode="full")[len(line) - 1:]
    with np.errstate(invalid="ignore", divide="ignore"):
        return (num / den) * np.sqrt(den)


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("run")
    ap.add_argument("--fit", choices=["savgol", "fft"], default="savgol")
    a = ap.parse_args()
    t0 = time.perf_counter()
    p, st, h = read_run(a.run)
    delta = residuals(p, a.fit)
    lo, wsum, wr = combine(st, h, delta)
    n_rf = len(wsum)
    # Lineshape at the band centre.
    grand = grand_spectrum(wr, wsum, lineshape(lo + n_rf * h["bw"] / 2, h["bw"]))
    elapsed = time.perf_counter() - t0
    print(f"{elapsed:.3f} s, {n_rf} RF bins, grand std {np.nanstd(grand):.3f}")


if __name__ == "__main__":
    sys.exit(main())

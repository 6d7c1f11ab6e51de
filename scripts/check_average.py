"""Reference check of `axsift average` against scipy.signal.welch.

Writes IQ captures (format "axsift-iq" v1) with h5py (default libver), float32 volts and int16
counts with iq_scale, of coloured complex noise plus a tone, averages them with the built
binary, and compares every bin of every step with

    scipy.signal.welch(x, fs, window=..., nperseg=N, noverlap=round(overlap N),
                       return_onesided=False, scaling="density", detrend=False)

fftshifted (scipy 1.17.1, pinned in scripts/requirements-check.txt). The documented factor
between the two: axsift stores power per bin, welch a density, so P_k = Pxx_k * fs / N
(the bin width). Tolerance 1e-5 relative per bin: both are double precision, the run file
stores f32 (relative rounding 6e-8). Also checked: bin_width_hz = fs / N, start_freq_hz =
lo - fs/2 (plus the dropped bins with --keep-fraction), step metadata carried over, and
n_averages: the segment count without overlap, and with overlap Welch's effective number
of independent averages (Welch 1967, IEEE Trans. Audio Electroacoust. 15, 70, the variance
of the averaged estimate for Gaussian noise), computed here from its definition.

The run file's `bin_correlation` (the correlation of the averaged noise power of bins
d = 1, 2, ... apart) is checked twice: against the same quantity computed here by direct
time-domain sums over the window, and that formula against a Monte Carlo of
scipy.signal.welch on complex white noise (4000 seeded trials; tolerance 5 standard errors of
the trial-to-trial scatter).

Usage: .venv/bin/python scripts/check_average.py [path/to/axsift]
"""

import os
import subprocess
import sys
import tempfile

import h5py
import numpy as np
from scipy import signal

AXSIFT = sys.argv[1] if len(sys.argv) > 1 else "target/release/axsift"
RTOL = 1e-5
FS_HZ = 2.048e6
N_STEPS = 3


def capture_samples(rng, n_samples):
    """Coloured complex noise (so the level changes across the band) plus a tone, volts."""
    white = rng.standard_normal(n_samples + 64) + 1j * rng.standard_normal(n_samples + 64)
    taps = signal.firwin(65, 0.6) * np.exp(2j * np.pi * 0.1 * np.arange(65))
    coloured = np.convolve(white, taps, mode="valid")[:n_samples]
    t = np.arange(n_samples) / FS_HZ
    tone = 3.0 * np.exp(2j * np.pi * 123.4e3 * t)
    return 1e-3 * (coloured + 0.5 * white[:n_samples] + tone)


def write_capture(path, x, kind, first_time_s):
    """x: [n_steps, n_samples] complex volts. Returns what the file holds, in volts."""
    with h5py.File(path, "w") as f:
        f.attrs["format"] = "axsift-iq"
        f.attrs["format_version"] = np.uint32(1)
        f.attrs["sample_rate_hz"] = FS_HZ
        f.attrs["magnet_field_t"] = 8.0
        f.attrs["cavity_volume_m3"] = 0.02
        f.attrs["form_factor"] = 0.45
        f.attrs["run_label"] = "check_average (invented)"
        iq = np.stack([x.real, x.imag], axis=-1)
        if kind == "int16":
            scale = np.max(np.abs(iq)) / 30000.0
            counts = np.round(iq / scale).astype(np.int16)
            f.attrs["iq_scale"] = scale
            f.create_dataset("iq", data=counts)
            stored = counts.astype(np.float64) * scale
        else:
            f.create_dataset("iq", data=iq.astype(np.float32))
            stored = iq.astype(np.float32).astype(np.float64)
        n = x.shape[0]
        steps = f.create_group("steps")
        steps["lo_freq_hz"] = 5.2e9 + 20e3 * np.arange(n)
        steps["cavity_freq_hz"] = 5.2e9 + 20e3 * np.arange(n) + 1.5e3
        steps["loaded_q"] = np.full(n, 5e4)
        steps["coupling_beta"] = np.full(n, 2.0)
        steps["noise_temp_k"] = 0.6 + 0.01 * np.arange(n)
        steps["timestamp_s"] = first_time_s + 10.0 * np.arange(n)
    return stored[..., 0] + 1j * stored[..., 1]


def effective_averages(window, hop, k):
    """Welch (1967): K / (1 + 2 sum_j (1 - j/K) rho_j), rho_j the squared normalised overlap."""
    n = len(window)
    power = np.sum(window**2)
    total = 0.0
    for j in range(1, k):
        shift = j * hop
        if shift >= n:
            break
        rho = (np.sum(window[: n - shift] * window[shift:]) / power) ** 2
        total += (1.0 - j / k) * rho
    return k / (1.0 + 2.0 * total)


def correlation_of_bins(window, hop, k, max_lag):
    """rho_d = sum_j (1 - |j|/K) |c_j(d)|^2 / (same at d = 0), c_j(d) = sum_n w_n w_(n+jD)
    exp(-2 pi i d n / N), by direct sums (K = None: the limit of many segments)."""
    n = len(window)
    t = np.arange(n)

    def total(d):
        s = 0.0
        for j in range(0, n // hop + 1):
            shift = j * hop
            if shift >= n or (k is not None and j >= k):
                break
            c = np.sum(window[: n - shift] * window[shift:] * np.exp(-2j * np.pi * d * t[: n - shift] / n))
            weight = 1.0 if k is None else 1.0 - j / k
            s += (1.0 if j == 0 else 2.0) * weight * abs(c) ** 2
        return s

    zero = total(0)
    return np.array([total(d) / zero for d in range(1, max_lag + 1)])


def check_bin_correlation(tmp, rng, window, overlap):
    n_fft, k, trials = 64, 32, 4000
    noverlap = int(round(overlap * n_fft))
    hop = n_fft - noverlap
    n_samples = hop * (k - 1) + n_fft
    scipy_window = "hann" if window == "hann" else "boxcar"
    w = signal.get_window(scipy_window, n_fft)
    # What axsift declares, from a small capture averaged with these options.
    path = os.path.join(tmp, f"white-{window}-{overlap}.h5")
    write_capture(path, rng.standard_normal((2, n_samples)) + 1j * rng.standard_normal((2, n_samples)), "float32", 1.0e9)
    out = os.path.join(tmp, f"white-{window}-{overlap}-run.h5")
    run_average(out, [path], n_fft, window, overlap, 1.0)
    with h5py.File(out, "r") as f:
        declared = np.asarray(f.attrs["bin_correlation"]) if "bin_correlation" in f.attrs else np.zeros(0)
    lags = max(len(declared), 3)
    formula = correlation_of_bins(w, hop, None, lags)
    nonzero = np.nonzero(np.abs(formula) >= 1e-9)[0]
    expected_len = nonzero[-1] + 1 if len(nonzero) else 0
    assert len(declared) == expected_len, (window, overlap, declared, formula)
    assert np.allclose(declared, formula[: len(declared)], rtol=0, atol=1e-12), (window, overlap, declared, formula)
    # The formula for K segments against scipy's averaged periodograms of white noise.
    x = rng.standard_normal((trials, n_samples)) + 1j * rng.standard_normal((trials, n_samples))
    _, pxx = signal.welch(x, 1.0, window=scipy_window, nperseg=n_fft, noverlap=noverlap, return_onesided=False, scaling="density", detrend=False, axis=-1)
    z = pxx / pxx.mean() - 1.0
    variance = np.mean(z * z)
    finite_k = correlation_of_bins(w, hop, k, 3)
    for d in range(1, 4):
        per_trial = np.mean(z * np.roll(z, -d, axis=1), axis=1) / variance
        measured, se = per_trial.mean(), per_trial.std(ddof=1) / np.sqrt(trials)
        assert abs(measured - finite_k[d - 1]) < 5 * se, (window, overlap, d, measured, finite_k[d - 1], se)
        print(f"check_average: bin correlation, {window} overlap {overlap}, lag {d}: welch Monte Carlo {measured:.4f} +- {se:.4f}, formula {finite_k[d - 1]:.4f} ({k} segments), declared {formula[d - 1]:.4f} (many segments)")


def run_average(out, captures, n_fft, window, overlap, keep):
    cmd = [AXSIFT, "--quiet", "average", "--fft-bins", str(n_fft), "--window", window, "--overlap", str(overlap), "--keep-fraction", str(keep), "--out", out]
    subprocess.run(cmd + captures, check=True)


def check_case(tmp, name, files, n_fft, window, overlap, keep):
    out = os.path.join(tmp, f"{name}.h5")
    run_average(out, [path for path, _ in files], n_fft, window, overlap, keep)
    noverlap = int(round(overlap * n_fft))
    kept = 2 * int(round(keep * n_fft / 2))
    first = (n_fft - kept) // 2
    scipy_window = "hann" if window == "hann" else "boxcar"
    w = signal.get_window(scipy_window, n_fft)
    with h5py.File(out, "r") as f:
        spectra = f["spectra"][()]
        fmt = f.attrs["format"]
        assert (fmt.decode() if isinstance(fmt, bytes) else fmt) == "axsift-run", fmt
        assert f.attrs["bin_width_hz"] == FS_HZ / n_fft, f.attrs["bin_width_hz"]
        start = f["steps/start_freq_hz"][()]
        n_avg = f["steps/n_averages"][()]
        cavity = f["steps/cavity_freq_hz"][()]
        t_sys = f["steps/noise_temp_k"][()]
        times = f["steps/timestamp_s"][()]
    row = 0
    worst = 0.0
    for path, x in files:
        with h5py.File(path, "r") as f:
            meta = {k: f["steps"][k][()] for k in f["steps"]}
        for i in range(x.shape[0]):
            _, pxx = signal.welch(x[i], FS_HZ, window=scipy_window, nperseg=n_fft, noverlap=noverlap, return_onesided=False, scaling="density", detrend=False)
            expected = np.fft.fftshift(pxx)[first : first + kept] * FS_HZ / n_fft
            rel = np.abs(spectra[row] / expected - 1.0)
            worst = max(worst, rel.max())
            assert rel.max() < RTOL, f"{name} step {row}: worst bin {rel.argmax()} off by {rel.max():.2e}"
            lo = meta["lo_freq_hz"][i]
            want_start = lo - FS_HZ / 2 + first * FS_HZ / n_fft
            assert abs(start[row] - want_start) <= 1e-6, (name, row, start[row], want_start)
            k = (x.shape[1] - n_fft) // (n_fft - noverlap) + 1
            want_n = k if noverlap == 0 else max(1, int(round(effective_averages(w, n_fft - noverlap, k))))
            assert n_avg[row] == want_n, (name, row, n_avg[row], want_n)
            assert cavity[row] == meta["cavity_freq_hz"][i] and t_sys[row] == meta["noise_temp_k"][i] and times[row] == meta["timestamp_s"][i]
            row += 1
    assert row == spectra.shape[0]
    print(f"check_average: {name}: {row} steps x {kept} bins equal welch * fs/N within {worst:.1e} (tolerance {RTOL:g}); n_averages {n_avg[0]}")


def main():
    rng = np.random.default_rng(20261203)
    with tempfile.TemporaryDirectory() as tmp:
        n_samples = 9 * 1024 + 300  # the incomplete tail segment is not used, as in scipy
        x_f32 = np.stack([capture_samples(rng, n_samples) for _ in range(N_STEPS)])
        x_i16 = np.stack([capture_samples(rng, n_samples) for _ in range(N_STEPS)])
        f32_path = os.path.join(tmp, "float32.h5")
        i16_path = os.path.join(tmp, "int16.h5")
        f32 = (f32_path, write_capture(f32_path, x_f32, "float32", 1.0e9))
        i16 = (i16_path, write_capture(i16_path, x_i16, "int16", 1.0e9 + 1000.0))
        check_case(tmp, "float32 hann", [f32], 1024, "hann", 0.0, 1.0)
        check_case(tmp, "int16 hann", [i16], 1024, "hann", 0.0, 1.0)
        check_case(tmp, "float32 rectangular", [f32], 256, "rectangular", 0.0, 1.0)
        check_case(tmp, "int16 hann overlap 0.5 keep 0.8", [i16], 1024, "hann", 0.5, 0.8)
        check_case(tmp, "two captures rectangular overlap 0.3 keep 0.5", [f32, i16], 512, "rectangular", 0.3, 0.5)
        # Steps longer than one piece read (2 MiB of samples: 2^19 int16 pairs), so pieces,
        # and segments overlapping across their boundaries, are added up.
        long_path = os.path.join(tmp, "long.h5")
        x_long = np.stack([capture_samples(rng, 1_300_000) for _ in range(2)])
        long = (long_path, write_capture(long_path, x_long, "int16", 1.0e9 + 5000.0))
        check_case(tmp, "int16 steps of 3 pieces, hann overlap 0.5", [long], 4096, "hann", 0.5, 1.0)
        check_case(tmp, "int16 steps of 3 pieces, rectangular", [long], 4096, "rectangular", 0.0, 1.0)
        for window, overlap in [("hann", 0.0), ("hann", 0.5), ("rectangular", 0.5), ("rectangular", 0.0)]:
            check_bin_correlation(tmp, rng, window, overlap)


if __name__ == "__main__":
    main()

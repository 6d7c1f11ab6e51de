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


if __name__ == "__main__":
    main()

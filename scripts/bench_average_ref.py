"""numpy/scipy reference of `axsift average` for scripts/bench_average.sh.

Reads an IQ capture (format "axsift-iq" v1) step by step with h5py, forms each step's
spectrum with scipy.signal.welch (Hann, nperseg = --fft-bins, no overlap, two-sided density,
no detrending), fftshifts it, converts the density to power per bin (times fs / N) and writes
the spectra to OUT (dataset `spectra`, f32, one row per step). With --compare RUN_FILE it
then prints the largest relative difference per bin from that run file's spectra.

Usage: .venv/bin/python scripts/bench_average_ref.py CAPTURE OUT --fft-bins N [--compare RUN]
"""

import argparse

import h5py
import numpy as np
from scipy import signal


def main():
    parser = argparse.ArgumentParser()
    parser.add_argument("capture")
    parser.add_argument("out")
    parser.add_argument("--fft-bins", type=int, required=True)
    parser.add_argument("--compare")
    args = parser.parse_args()
    n = args.fft_bins
    with h5py.File(args.capture, "r") as f, h5py.File(args.out, "w") as out:
        fs = float(f.attrs["sample_rate_hz"])
        scale = float(f.attrs.get("iq_scale", 1.0))
        iq = f["iq"]
        spectra = out.create_dataset("spectra", shape=(iq.shape[0], n), dtype=np.float32)
        for i in range(iq.shape[0]):
            step = iq[i].astype(np.float32)
            x = (step[:, 0] + 1j * step[:, 1]) * scale
            _, pxx = signal.welch(x, fs, window="hann", nperseg=n, noverlap=0, return_onesided=False, scaling="density", detrend=False)
            spectra[i] = np.fft.fftshift(pxx) * fs / n
    if args.compare:
        with h5py.File(args.out, "r") as ref, h5py.File(args.compare, "r") as ours:
            rel = np.abs(ours["spectra"][()] / ref["spectra"][()] - 1.0)
        print(f"largest relative difference per bin from {args.compare}: {rel.max():.1e}")


if __name__ == "__main__":
    main()

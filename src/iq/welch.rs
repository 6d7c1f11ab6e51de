//! Welch's averaged periodogram of complex samples (Welch 1967, IEEE Trans. Audio
//! Electroacoust. 15, 70): segments of `fft_bins` samples, `hop` samples apart, each
//! multiplied by a window, transformed, and their squared magnitudes averaged.
//!
//! Scale: the power in bin k is P_k = a^2 sum_s |X_s,k|^2 / (K N sum_n w_n^2), for K segments of
//! N samples, window w and a volts per stored unit. A flat noise density S (V^2/Hz) then gives
//! P_k = S dnu_b with dnu_b = f_s / N, whatever the window: the division by sum w^2 accounts for
//! the window's noise-equivalent bandwidth. Relative to `scipy.signal.welch(...,
//! scaling="density", return_onesided=False)` (a density in V^2/Hz), P_k = dnu_b * Pxx_k.
//! Bins come out in increasing frequency: bin j has offset (j - N/2) f_s / N from the LO.
//!
//! Arithmetic is f64 throughout (the samples are widened as they are windowed).

use crate::runfile::MAX_CORRELATION_LAGS;
use rustfft::num_complex::Complex;
use rustfft::{Fft, FftPlanner};
use std::sync::Arc;

/// The segment window.
#[derive(Debug, Clone, Copy, PartialEq, Eq, clap::ValueEnum)]
pub enum Window {
    /// Periodic Hann window, w_n = (1 - cos(2 pi n / N)) / 2 (as scipy's `get_window("hann", N)`).
    Hann,
    /// No window (w_n = 1).
    Rectangular,
}

impl Window {
    /// The N window values.
    pub fn values(self, n: usize) -> Vec<f64> {
        match self {
            Window::Hann => (0..n).map(|i| 0.5 - 0.5 * (std::f64::consts::TAU * i as f64 / n as f64).cos()).collect(),
            Window::Rectangular => vec![1.0; n],
        }
    }
}

/// A planned estimator: window, segment spacing and transform, made once and shared by all
/// threads.
pub struct WelchPlan {
    window: Vec<f64>,
    window_power: f64,
    hop: usize,
    fft: Arc<dyn Fft<f64>>,
}

/// Per-thread buffers of [`WelchPlan::accumulate`].
#[derive(Default)]
pub struct Work {
    segment: Vec<Complex<f64>>,
    scratch: Vec<Complex<f64>>,
}

impl WelchPlan {
    /// Plans segments of `fft_bins` samples (even, at least 2) overlapping by the fraction
    /// `overlap` (0 <= overlap < 1; the overlap in samples is rounded to the nearest whole
    /// sample, as is scipy's `noverlap` when given as `N * overlap`).
    pub fn new(fft_bins: usize, window: Window, overlap: f64) -> Result<Self, String> {
        if fft_bins < 2 || !fft_bins.is_multiple_of(2) {
            return Err(format!("--fft-bins {fft_bins} must be even and at least 2"));
        }
        if !(0.0..1.0).contains(&overlap) {
            return Err(format!("--overlap {overlap} must be in [0, 1)"));
        }
        let hop = fft_bins - (overlap * fft_bins as f64).round() as usize;
        if hop == 0 {
            return Err(format!("--overlap {overlap} leaves no sample between segments of {fft_bins}"));
        }
        let window = window.values(fft_bins);
        let window_power = window.iter().map(|w| w * w).sum();
        Ok(Self { window, window_power, hop, fft: FftPlanner::new().plan_fft_forward(fft_bins) })
    }

    /// Samples per segment (and bins per spectrum before any are dropped).
    pub fn fft_bins(&self) -> usize {
        self.window.len()
    }
    /// Samples from one segment's start to the next.
    pub fn hop(&self) -> usize {
        self.hop
    }
    /// Whole segments in `n_samples` samples (the incomplete tail is not used, as in scipy).
    pub fn n_segments(&self, n_samples: usize) -> usize {
        if n_samples < self.fft_bins() { 0 } else { (n_samples - self.fft_bins()) / self.hop + 1 }
    }

    /// The effective number of independent averages of `n_segments` segments (Welch 1967,
    /// for Gaussian noise): K / (1 + 2 sum_{j=1}^{K-1} (1 - j/K) rho_j), with
    /// rho_j = (sum_n w_n w_{n+jD})^2 / (sum_n w_n^2)^2 the correlation of the periodograms of
    /// segments j hops (D samples each) apart. K itself when segments do not overlap.
    pub fn effective_averages(&self, n_segments: usize) -> f64 {
        let (n, k) = (self.fft_bins(), n_segments as f64);
        let mut correlation_sum = 0.0;
        for j in (1..n_segments).take_while(|j| j * self.hop < n) {
            let shift = j * self.hop;
            let lagged: f64 = self.window[..n - shift].iter().zip(&self.window[shift..]).map(|(a, b)| a * b).sum();
            correlation_sum += (1.0 - j as f64 / k) * (lagged / self.window_power).powi(2);
        }
        k / (1.0 + 2.0 * correlation_sum)
    }

    /// Correlation of the averaged noise power of bins d = 1, 2, ... apart (element d - 1),
    /// for circular complex Gaussian white noise (I and Q independent, of equal variance) and
    /// many segments: rho_d = sum_j |c_j(d)|^2 / sum_j |c_j(0)|^2 over segment pairs j hops
    /// apart (j = -J..J, all pairs that share samples), c_j(d) = sum_n w_n w_{n+jD}
    /// exp(-2 pi i d n / N) (Isserlis: Cov(|X|^2, |Y|^2) = |E[X Y*]|^2 for circular Gaussian X,
    /// Y). Without overlap it is exact for any segment count (Hann: 4/9, 1/36, then 0); with
    /// overlap, K segments weight pair j by 1 - |j|/K instead of 1. Lags up to
    /// [`MAX_CORRELATION_LAGS`] (or N/2), trailing ones below 1e-9 dropped: empty for a
    /// rectangular window without overlap, whose bins are independent.
    pub fn bin_correlation(&self) -> Vec<f64> {
        let n = self.fft_bins();
        let mut planner = FftPlanner::new();
        let fft = planner.plan_fft_forward(n);
        let mut summed = vec![0.0; n];
        let mut product = vec![Complex::default(); n];
        for j in (0..).take_while(|j| j * self.hop < n) {
            let shift = j * self.hop;
            product.iter_mut().for_each(|p| *p = Complex::default());
            for (p, (a, b)) in product.iter_mut().zip(self.window.iter().zip(&self.window[shift..])) {
                p.re = a * b;
            }
            fft.process(&mut product);
            let pairs = if j == 0 { 1.0 } else { 2.0 };
            for (s, c) in summed.iter_mut().zip(&product) {
                *s += pairs * c.norm_sqr();
            }
        }
        let mut rho: Vec<f64> = summed[1..=(n / 2).min(MAX_CORRELATION_LAGS)].iter().map(|s| s / summed[0]).collect();
        while rho.last().is_some_and(|r| r.abs() < 1e-9) {
            rho.pop();
        }
        rho
    }

    /// Adds |X_k|^2 of `n_segments` consecutive segments of `samples` (I and Q interleaved,
    /// the first segment starting at sample 0) to `power_sum` (N bins, transform order), in
    /// segment order.
    pub fn accumulate<T: Copy + Into<f64>>(&self, samples: &[T], n_segments: usize, power_sum: &mut [f64], work: &mut Work) {
        let n = self.fft_bins();
        work.segment.resize(n, Complex::default());
        work.scratch.resize(self.fft.get_inplace_scratch_len(), Complex::default());
        for s in 0..n_segments {
            let first = 2 * s * self.hop;
            windowed(&samples[first..first + 2 * n], &self.window, &mut work.segment);
            self.fft.process_with_scratch(&mut work.segment, &mut work.scratch);
            add_squared_magnitudes(power_sum, &work.segment);
        }
    }

    /// The averaged spectrum of `n_segments` segments from their summed |X_k|^2 (transform
    /// order), in increasing frequency, bins `kept` of the shifted order only, as power per bin
    /// (`volts_per_unit`^2 times the stored unit squared).
    pub fn finish(&self, power_sum: &[f64], n_segments: usize, volts_per_unit: f64, kept: std::ops::Range<usize>) -> Vec<f32> {
        let n = self.fft_bins();
        let scale = volts_per_unit * volts_per_unit / (n_segments as f64 * n as f64 * self.window_power);
        kept.map(|j| (power_sum[(j + n / 2) % n] * scale) as f32).collect()
    }
}

crate::simd::per_bin_loop! {
    /// `out[n] = (I_n w_n, Q_n w_n)`, widening the interleaved samples to f64.
    fn windowed<T: Copy + Into<f64>>(iq: &[T], window: &[f64], out: &mut [Complex<f64>]) {
        for ((o, pair), &w) in out.iter_mut().zip(iq.chunks_exact(2)).zip(window) {
            *o = Complex::new(pair[0].into() * w, pair[1].into() * w);
        }
    }
}

crate::simd::per_bin_loop! {
    /// `sums[k] += |x_k|^2` over the common length.
    fn add_squared_magnitudes(sums: &mut [f64], x: &[Complex<f64>]) {
        for (s, x) in sums.iter_mut().zip(x) {
            *s += x.re * x.re + x.im * x.im;
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn effective_averages_without_overlap_is_the_segment_count() {
        let plan = WelchPlan::new(256, Window::Hann, 0.0).unwrap();
        assert_eq!(plan.effective_averages(37), 37.0);
    }

    /// Hann at 50 % overlap: the N/2 shared samples give sum_n w_n w_{n+N/2} = (N/2) (1/8) and
    /// sum_n w_n^2 = N (3/8), so rho_1 = (1/6)^2 = 1/36 (the overlap correlation of 16.7 % in
    /// Harris 1978, Proc. IEEE 66, 51, Table 1, recalled from memory) and K segments give
    /// K / (1 + 2 (1 - 1/K) / 36). Rectangular at 50 %: rho_1 = (1/2)^2.
    #[test]
    fn effective_averages_at_half_overlap_follow_the_window_correlation() {
        let k = 99.0;
        let hann = WelchPlan::new(512, Window::Hann, 0.5).unwrap();
        assert!((hann.effective_averages(99) - k / (1.0 + 2.0 * (1.0 - 1.0 / k) / 36.0)).abs() < 1e-9);
        let rect = WelchPlan::new(512, Window::Rectangular, 0.5).unwrap();
        assert!((rect.effective_averages(99) - k / (1.0 + 2.0 * (1.0 - 1.0 / k) / 4.0)).abs() < 1e-9);
    }

    /// Hann as a cosine sum, w = 1/2 - (1/2) cos(2 pi n / N) (Harris 1978, Proc. IEEE 66, 51):
    /// its windowed DFT is X_k = Y_k / 2 - (Y_(k-1) + Y_(k+1)) / 4 with Y the plain DFT, whose
    /// bins are independent for white noise. So E|X_k|^2 = 3/8, E[X_k X*_(k+1)] = -1/4 and
    /// E[X_k X*_(k+2)] = 1/16 (units of E|Y|^2): the powers correlate by (2/3)^2 = 4/9 at one
    /// bin and (1/6)^2 = 1/36 at two, and not beyond. A rectangular window leaves Y itself.
    #[test]
    fn bin_correlation_without_overlap_follows_the_cosine_sum_form() {
        let hann = WelchPlan::new(1024, Window::Hann, 0.0).unwrap().bin_correlation();
        assert_eq!(hann.len(), 2, "{hann:?}");
        assert!((hann[0] - 4.0 / 9.0).abs() < 1e-12 && (hann[1] - 1.0 / 36.0).abs() < 1e-12, "{hann:?}");
        assert!(WelchPlan::new(1024, Window::Rectangular, 0.0).unwrap().bin_correlation().is_empty());
    }

    /// Rectangular at 50 % overlap: segment pairs one hop apart share N/2 samples, so
    /// c_1(d) = sum_{n < N/2} exp(-2 pi i d n / N), of magnitude N/2 at d = 0, 0 at even d and
    /// |1 / sin(pi d / N)| at odd d (a geometric sum); c_0(d) = N delta_d0. Then
    /// rho_d = 2 / (N^2 sin^2(pi d / N)) / (1 + 2 / 4) at odd d, 0 at even d.
    #[test]
    fn bin_correlation_with_half_overlap_follows_the_geometric_sum() {
        let n = 64usize;
        let rho = WelchPlan::new(n, Window::Rectangular, 0.5).unwrap().bin_correlation();
        for (i, r) in rho.iter().enumerate() {
            let d = (i + 1) as f64;
            let expected = if (i + 1) % 2 == 0 { 0.0 } else { 2.0 / ((n * n) as f64 * (std::f64::consts::PI * d / n as f64).sin().powi(2)) / 1.5 };
            assert!((r - expected).abs() < 1e-12, "lag {}: {r} vs {expected}", i + 1);
        }
        assert_eq!(rho.len(), n / 2 - 1, "the last odd lag below N/2 is the last non-zero one");
    }

    #[test]
    fn segments_and_options() {
        let plan = WelchPlan::new(100, Window::Rectangular, 0.25).unwrap();
        assert_eq!(plan.hop(), 75);
        assert_eq!((plan.n_segments(99), plan.n_segments(100), plan.n_segments(174), plan.n_segments(175)), (0, 1, 1, 2));
        assert!(WelchPlan::new(101, Window::Hann, 0.0).is_err());
        assert!(WelchPlan::new(64, Window::Hann, 1.0).is_err());
        assert!(WelchPlan::new(64, Window::Hann, -0.1).is_err());
    }
}

//! Savitzky–Golay smoothing of uniformly sampled spectra.
//!
//! A Savitzky–Golay filter replaces every bin by the value, at that bin, of the
//! least-squares polynomial of degree `order` fitted to the `window_bins` bins
//! centred on it. Away from the edges this is a fixed symmetric FIR filter; it
//! is applied here by FFT convolution. In the first and last half-window the
//! polynomial fitted to the first (respectively last) `window_bins` samples is
//! evaluated instead, which is what `scipy.signal.savgol_filter(x, W, d)` does
//! with its default `mode='interp'`.
//!
//! All quantities are in bins: the filter knows nothing about the physical bin
//! width, and the samples are assumed to be equally spaced. The output has the
//! same units as the input.

use std::sync::Arc;

use rustfft::num_complex::Complex;
use rustfft::{Fft, FftPlanner};

/// Why a Savitzky–Golay filter could not be built or applied.
#[derive(Debug, Clone, PartialEq, Eq, thiserror::Error)]
pub enum SavgolError {
    /// The window length is even, so it has no centre bin.
    #[error("window_bins = {window} is even; the window must be an odd number of bins")]
    EvenWindow {
        /// The rejected window length, bins.
        window: usize,
    },
    /// The window is shorter than 3 bins.
    #[error("window_bins = {window} is too short; the window must be at least 3 bins")]
    WindowTooShort {
        /// The rejected window length, bins.
        window: usize,
    },
    /// The polynomial order is not below the window length.
    #[error("polynomial order {order} is too high; it must be less than window_bins = {window}")]
    OrderTooHigh {
        /// The rejected polynomial order.
        order: usize,
        /// The window length it was checked against, bins.
        window: usize,
    },
    /// The input spectrum has fewer bins than the window.
    #[error("input has {len} bins; it must have at least window_bins = {window} bins")]
    InputTooShort {
        /// Number of bins in the input.
        len: usize,
        /// The filter window length, bins.
        window: usize,
    },
    /// A buffer handed to a [`SmoothingPlan`] does not match the planned length.
    #[error("{buffer} has {len} bins but the plan was made for {expected} bins")]
    LengthMismatch {
        /// Which buffer was wrong (`"input"` or `"output"`).
        buffer: &'static str,
        /// Its length, bins.
        len: usize,
        /// The length the plan was made for, bins.
        expected: usize,
    },
}

/// A Savitzky–Golay smoother with a fixed odd window and polynomial order.
///
/// Cheap to clone: the precomputed tables are shared.
#[derive(Debug, Clone)]
pub struct SavitzkyGolay {
    window: usize,
    order: usize,
    /// Orthonormal basis of the degree-`order` polynomials sampled on the
    /// window, row-major `window × (order + 1)`.
    basis: Arc<[f64]>,
    /// Interior weights `h_j`, `j = 0..window`, applied as
    /// `y_out[p] = Σ_j h_j · y[p − half + j]`.
    coefficients: Arc<[f64]>,
}

impl SavitzkyGolay {
    /// Builds the smoother for a window of `window_bins` bins (odd, at least
    /// 3) and a fitted polynomial of degree `order` (less than `window_bins`).
    ///
    /// The least-squares projector is formed from an orthonormal basis `Q`
    /// (`window_bins × (order + 1)`) of the polynomial columns, obtained by
    /// modified Gram–Schmidt on the Vandermonde columns of the abscissa scaled
    /// to `[-1, 1]`. Column `k` is generated as `x ⊙ q_{k−1}` rather than as
    /// the raw power `x^k`; both span the same space, but the former stays well
    /// conditioned for high orders. Each column is orthogonalised twice, so `Q`
    /// is orthonormal to rounding. The interior weights are the centre row of
    /// `Q Qᵀ`, symmetrised so that `h_j = h_{W−1−j}` holds exactly.
    pub fn new(window_bins: usize, order: usize) -> Result<Self, SavgolError> {
        if window_bins < 3 {
            return Err(SavgolError::WindowTooShort {
                window: window_bins,
            });
        }
        if window_bins.is_multiple_of(2) {
            return Err(SavgolError::EvenWindow {
                window: window_bins,
            });
        }
        if order >= window_bins {
            return Err(SavgolError::OrderTooHigh {
                order,
                window: window_bins,
            });
        }

        let w = window_bins;
        let cols = order + 1;
        let half = (w - 1) / 2;
        let x: Vec<f64> = (0..w)
            .map(|i| (i as f64 - half as f64) / half as f64)
            .collect();

        // Column-major while building; copied to row-major at the end.
        let mut q: Vec<Vec<f64>> = Vec::with_capacity(cols);
        let first = 1.0 / (w as f64).sqrt();
        q.push(vec![first; w]);
        for k in 1..cols {
            let mut v: Vec<f64> = x.iter().zip(&q[k - 1]).map(|(a, b)| a * b).collect();
            for _pass in 0..2 {
                for qj in &q {
                    let r: f64 = qj.iter().zip(&v).map(|(a, b)| a * b).sum();
                    v.iter_mut().zip(qj).for_each(|(vi, qi)| *vi -= r * qi);
                }
            }
            let norm = v.iter().map(|a| a * a).sum::<f64>().sqrt();
            v.iter_mut().for_each(|vi| *vi /= norm);
            q.push(v);
        }

        let mut basis = vec![0.0; w * cols];
        for (k, col) in q.iter().enumerate() {
            for (i, &value) in col.iter().enumerate() {
                basis[i * cols + k] = value;
            }
        }

        let centre = &basis[half * cols..(half + 1) * cols];
        let row: Vec<f64> = (0..w)
            .map(|j| {
                let qj = &basis[j * cols..(j + 1) * cols];
                centre.iter().zip(qj).map(|(a, b)| a * b).sum()
            })
            .collect();
        let coefficients: Vec<f64> = (0..w).map(|j| 0.5 * (row[j] + row[w - 1 - j])).collect();

        Ok(Self {
            window: w,
            order,
            basis: basis.into(),
            coefficients: coefficients.into(),
        })
    }

    /// Window length, bins (odd).
    pub fn window_bins(&self) -> usize {
        self.window
    }

    /// Degree of the fitted polynomial.
    pub fn order(&self) -> usize {
        self.order
    }

    /// Interior weights `h_j`, `j = 0..window_bins`, dimensionless and
    /// symmetric about the centre; the smoothed interior bin `p` is
    /// `Σ_j h_j · y[p − (W−1)/2 + j]`. They sum to 1.
    pub fn coefficients(&self) -> &[f64] {
        &self.coefficients
    }

    /// The centre weight `h_0` (the middle entry of [`Self::coefficients`]).
    ///
    /// Because the weights are a row of an orthogonal projector,
    /// `Σ_j h_j² = h_0`: for white noise of variance `σ²`, an interior
    /// smoothed bin has variance `h_0 σ²`, and the residual `y − ŷ` has
    /// variance `(1 − h_0) σ²`. So `h_0` is the fraction of the white-noise
    /// variance per bin that the smoothing removes from the residual.
    pub fn center_weight(&self) -> f64 {
        self.coefficients[(self.window - 1) / 2]
    }

    /// Precomputes the FFT plans and kernel spectrum for inputs of exactly
    /// `n_bins` bins, which must be at least [`Self::window_bins`].
    pub fn plan(&self, n_bins: usize) -> Result<SmoothingPlan, SavgolError> {
        if n_bins < self.window {
            return Err(SavgolError::InputTooShort {
                len: n_bins,
                window: self.window,
            });
        }
        let fft_len = (n_bins + self.window - 1).next_power_of_two();
        let mut planner = FftPlanner::<f64>::new();
        let forward = planner.plan_fft_forward(fft_len);
        let inverse = planner.plan_fft_inverse(fft_len);

        // Reversed weights turn the convolution into the correlation
        // Σ_j h_j y[p − half + j]; the 1/N of the inverse FFT is folded in.
        let scale = 1.0 / fft_len as f64;
        let mut kernel = vec![Complex::new(0.0, 0.0); fft_len];
        for (m, slot) in kernel.iter_mut().take(self.window).enumerate() {
            *slot = Complex::new(self.coefficients[self.window - 1 - m] * scale, 0.0);
        }
        forward.process(&mut kernel);

        Ok(SmoothingPlan {
            filter: self.clone(),
            n_bins,
            forward,
            inverse,
            kernel_spectrum: kernel,
        })
    }

    /// Smooths `input` (at least [`Self::window_bins`] bins) and returns a
    /// vector of the same length and units.
    ///
    /// Builds a fresh [`SmoothingPlan`] on every call; when many spectra of
    /// the same length are smoothed, make the plan once with [`Self::plan`].
    pub fn smooth(&self, input: &[f64]) -> Result<Vec<f64>, SavgolError> {
        let plan = self.plan(input.len())?;
        let mut out = vec![0.0; input.len()];
        plan.smooth(input, &mut out)?;
        Ok(out)
    }

    /// Writes into `out` the fitted polynomial through `samples` (exactly
    /// `window` values) evaluated at window rows `rows`.
    fn fit_edge(&self, samples: &[f64], rows: std::ops::Range<usize>, out: &mut [f64]) {
        let cols = self.order + 1;
        let mut amplitudes = vec![0.0; cols];
        for (i, &y) in samples.iter().enumerate() {
            let qi = &self.basis[i * cols..(i + 1) * cols];
            amplitudes.iter_mut().zip(qi).for_each(|(a, q)| *a += q * y);
        }
        for (slot, r) in out.iter_mut().zip(rows) {
            let qr = &self.basis[r * cols..(r + 1) * cols];
            *slot = qr.iter().zip(&amplitudes).map(|(q, a)| q * a).sum();
        }
    }
}

/// A Savitzky–Golay smoother prepared for one input length.
///
/// Holds the forward and inverse FFT plans (length the next power of two at
/// or above `n_bins + window_bins − 1`) and the kernel spectrum. It is
/// `Send + Sync` and used through `&self`, so one plan can serve many threads.
#[derive(Clone)]
pub struct SmoothingPlan {
    filter: SavitzkyGolay,
    n_bins: usize,
    forward: Arc<dyn Fft<f64>>,
    inverse: Arc<dyn Fft<f64>>,
    kernel_spectrum: Vec<Complex<f64>>,
}

impl std::fmt::Debug for SmoothingPlan {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("SmoothingPlan")
            .field("window_bins", &self.filter.window)
            .field("order", &self.filter.order)
            .field("n_bins", &self.n_bins)
            .field("fft_len", &self.kernel_spectrum.len())
            .finish()
    }
}

impl SmoothingPlan {
    /// Number of bins this plan accepts.
    pub fn n_bins(&self) -> usize {
        self.n_bins
    }

    /// The smoother this plan applies.
    pub fn filter(&self) -> &SavitzkyGolay {
        &self.filter
    }

    /// Smooths `input` into `out`; both must have exactly [`Self::n_bins`]
    /// bins. The interior is computed by FFT convolution, the first and last
    /// `(W−1)/2` bins by evaluating the polynomial fitted to the first and
    /// last `W` input bins. Allocates one FFT work buffer per call.
    ///
    /// A non-finite input value spreads through the FFT to every interior
    /// output bin.
    pub fn smooth(&self, input: &[f64], out: &mut [f64]) -> Result<(), SavgolError> {
        if input.len() != self.n_bins {
            return Err(SavgolError::LengthMismatch {
                buffer: "input",
                len: input.len(),
                expected: self.n_bins,
            });
        }
        if out.len() != self.n_bins {
            return Err(SavgolError::LengthMismatch {
                buffer: "output",
                len: out.len(),
                expected: self.n_bins,
            });
        }
        let n = self.n_bins;
        let w = self.filter.window;
        let half = (w - 1) / 2;

        let mut buf = vec![Complex::new(0.0, 0.0); self.kernel_spectrum.len()];
        for (slot, &y) in buf.iter_mut().zip(input) {
            slot.re = y;
        }
        self.forward.process(&mut buf);
        buf.iter_mut()
            .zip(&self.kernel_spectrum)
            .for_each(|(b, k)| *b *= k);
        self.inverse.process(&mut buf);
        for p in half..n - half {
            out[p] = buf[p + half].re;
        }

        self.filter.fit_edge(&input[..w], 0..half, &mut out[..half]);
        self.filter
            .fit_edge(&input[n - w..], w - half..w, &mut out[n - half..]);
        Ok(())
    }
}

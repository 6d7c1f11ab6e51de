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

use super::correlate::{CorrelationScratch, Correlator, Sample};

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
            return Err(SavgolError::WindowTooShort { window: window_bins });
        }
        if window_bins.is_multiple_of(2) {
            return Err(SavgolError::EvenWindow { window: window_bins });
        }
        if order >= window_bins {
            return Err(SavgolError::OrderTooHigh { order, window: window_bins });
        }

        let w = window_bins;
        let cols = order + 1;
        let half = (w - 1) / 2;
        let x: Vec<f64> = (0..w).map(|i| (i as f64 - half as f64) / half as f64).collect();

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

        Ok(Self { window: w, order, basis: basis.into(), coefficients: coefficients.into() })
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
    /// `n_bins` bins, which must be at least [`Self::window_bins`], with
    /// transforms in f64. See [`Self::plan_in`].
    pub fn plan(&self, n_bins: usize) -> Result<SmoothingPlan, SavgolError> {
        self.plan_in::<f64>(n_bins)
    }

    /// As [`Self::plan`], with the interior's transforms in the sample type
    /// `T` (f32 is about twice as fast). The interior is a [`Correlator`] with
    /// the interior weights: overlap-save FFT blocks of about eight windows
    /// (at least 1024 bins), two blocks per complex FFT, applied to the
    /// input's departures from its mean (the weights sum to 1, so the mean is
    /// added back exactly in f64). With f32 transforms an interior value is
    /// then off by about 1e-7 of the largest departure within its block.
    pub fn plan_in<T: Sample>(&self, n_bins: usize) -> Result<SmoothingPlan<T>, SavgolError> {
        if n_bins < self.window {
            return Err(SavgolError::InputTooShort { len: n_bins, window: self.window });
        }
        Ok(SmoothingPlan { filter: self.clone(), n_bins, interior: Correlator::new(&self.coefficients) })
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
    fn fit_edge(&self, samples: &[f64], rows: std::ops::Range<usize>, out: &mut [f64], amplitudes: &mut Vec<f64>) {
        let cols = self.order + 1;
        amplitudes.clear();
        amplitudes.resize(cols, 0.0);
        for (i, &y) in samples.iter().enumerate() {
            let qi = &self.basis[i * cols..(i + 1) * cols];
            amplitudes.iter_mut().zip(qi).for_each(|(a, q)| *a += q * y);
        }
        for (slot, r) in out.iter_mut().zip(rows) {
            let qr = &self.basis[r * cols..(r + 1) * cols];
            *slot = qr.iter().zip(amplitudes.iter()).map(|(q, a)| q * a).sum();
        }
    }
}

/// A Savitzky–Golay smoother prepared for one input length.
///
/// Holds the interior [`Correlator`] (FFT plans and kernel spectrum). It is
/// `Send + Sync` and used through `&self`, so one plan can serve many
/// threads, each with its own [`SmoothingScratch`].
#[derive(Clone)]
pub struct SmoothingPlan<T: Sample = f64> {
    filter: SavitzkyGolay,
    n_bins: usize,
    interior: Correlator<T>,
}

/// Work buffers of [`SmoothingPlan::smooth_with`]: one per thread, reused from
/// call to call so that smoothing allocates nothing. Sized on first use.
#[derive(Debug, Clone)]
pub struct SmoothingScratch<T: Sample = f64> {
    correlation: CorrelationScratch<T>,
    amplitudes: Vec<f64>,
}

impl<T: Sample> Default for SmoothingScratch<T> {
    fn default() -> Self {
        Self { correlation: CorrelationScratch::default(), amplitudes: Vec::new() }
    }
}

impl<T: Sample> std::fmt::Debug for SmoothingPlan<T> {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("SmoothingPlan")
            .field("window_bins", &self.filter.window)
            .field("order", &self.filter.order)
            .field("n_bins", &self.n_bins)
            .field("block_len", &self.interior.block_len())
            .finish()
    }
}

impl<T: Sample> SmoothingPlan<T> {
    /// Number of bins this plan accepts.
    pub fn n_bins(&self) -> usize {
        self.n_bins
    }

    /// The smoother this plan applies.
    pub fn filter(&self) -> &SavitzkyGolay {
        &self.filter
    }

    /// Length of one overlap-save FFT block of the interior, bins (a power of two).
    pub fn block_len(&self) -> usize {
        self.interior.block_len()
    }

    /// Smooths `input` into `out`; both must have exactly [`Self::n_bins`]
    /// bins. As [`Self::smooth_with`] with fresh work buffers.
    pub fn smooth(&self, input: &[f64], out: &mut [f64]) -> Result<(), SavgolError> {
        self.smooth_with(input, out, &mut SmoothingScratch::default())
    }

    /// Smooths `input` into `out`; both must have exactly [`Self::n_bins`]
    /// bins. The interior is computed by overlap-save FFT convolution about
    /// the input's mean, the first and last `(W−1)/2` bins (in f64) by
    /// evaluating the polynomial fitted to the first and last `W` input bins.
    /// `scratch` is resized on first use and then reused, so repeated calls
    /// allocate nothing.
    ///
    /// A non-finite input value makes every interior output non-finite (it
    /// enters the mean).
    pub fn smooth_with(&self, input: &[f64], out: &mut [f64], scratch: &mut SmoothingScratch<T>) -> Result<(), SavgolError> {
        if input.len() != self.n_bins {
            return Err(SavgolError::LengthMismatch { buffer: "input", len: input.len(), expected: self.n_bins });
        }
        if out.len() != self.n_bins {
            return Err(SavgolError::LengthMismatch { buffer: "output", len: out.len(), expected: self.n_bins });
        }
        let n = self.n_bins;
        let w = self.filter.window;
        let half = (w - 1) / 2;
        // Interior bin p is the correlation of the input with the weights at p − half.
        let mean = mean(input);
        self.interior.correlate_about(input, mean, &mut out[half..n - half], &mut scratch.correlation);
        let amplitudes = &mut scratch.amplitudes;
        self.filter.fit_edge(&input[..w], 0..half, &mut out[..half], amplitudes);
        self.filter.fit_edge(&input[n - w..], w - half..w, &mut out[n - half..], amplitudes);
        Ok(())
    }
}

/// Mean of `x` (non-empty), with eight interleaved partial sums so that the additions are not
/// one serial chain.
fn mean(x: &[f64]) -> f64 {
    let mut lanes = [0.0f64; 8];
    let mut chunks = x.chunks_exact(8);
    for chunk in &mut chunks {
        for (lane, &v) in lanes.iter_mut().zip(chunk) {
            *lane += v;
        }
    }
    let tail: f64 = chunks.remainder().iter().sum();
    (lanes.iter().sum::<f64>() + tail) / x.len() as f64
}

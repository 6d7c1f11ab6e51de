//! Sliding dot products with a fixed real kernel, by overlap-save FFT.
//!
//! For a kernel `c_0 .. c_{K-1}` the correlation of a sequence `x` is
//! `out[j] = Σ c_k · x[j + k]`, with `x` taken as zero past its end. A direct
//! evaluation costs K multiply-adds per output; here the input is cut into
//! blocks of [`Correlator::block_len`] samples overlapping by K − 1, and each
//! block is transformed, multiplied by the kernel spectrum and transformed
//! back. Two blocks share one complex FFT (one in the real part, one in the
//! imaginary part: the kernel is real, so they never mix), which halves the
//! work on real data. The cost per output is O(log block_len), independent of
//! K. Units: the output has the units of `x` times those of the kernel.
//!
//! Precision: the transforms run in the [`Sample`] type of the correlator,
//! f64 by default; inputs and outputs are always f64. An f32 correlator is
//! about twice as fast. [`Correlator::correlate_about`] transforms the input's
//! departures from a given level and adds the level's share back in f64, so
//! data sitting on a large common level (a spectrum of power near 1) keep the
//! transform's rounding relative to their departures, not to the level.
//!
//! Rounding: each output carries an absolute error of a few ulp (of the
//! sample type) of the largest `|c_k x_i|` products within its block, not of
//! its own terms, so a block mixing very large and very small inputs gives its
//! small outputs a larger relative error than a direct sum would.

use std::sync::Arc;

use rustfft::num_complex::Complex;
use rustfft::{Fft, FftNum, FftPlanner};

use crate::simd::per_bin_loop;

/// A floating-point type the transforms of a [`Correlator`] can run in.
pub trait Sample: FftNum {
    /// The nearest value of this type.
    fn narrow(x: f64) -> Self;
    /// The value as f64 (exact for both implementations).
    fn widen(self) -> f64;
}

impl Sample for f64 {
    fn narrow(x: f64) -> Self {
        x
    }
    fn widen(self) -> f64 {
        self
    }
}

impl Sample for f32 {
    fn narrow(x: f64) -> Self {
        x as f32
    }
    fn widen(self) -> f64 {
        f64::from(self)
    }
}

/// Smallest FFT block, samples.
const MIN_BLOCK_LEN: usize = 1024;

/// A real kernel prepared for overlap-save correlation. `Send + Sync`: one
/// correlator can serve many threads, each with its own
/// [`CorrelationScratch`].
#[derive(Clone)]
pub struct Correlator<T: Sample = f64> {
    kernel_len: usize,
    /// Sum of the kernel values, for adding a level's share back.
    kernel_sum: f64,
    forward: Arc<dyn Fft<T>>,
    inverse: Arc<dyn Fft<T>>,
    /// FFT of the reversed kernel, with the inverse transform's 1/N folded in.
    spectrum: Arc<[Complex<T>]>,
}

/// FFT planners for [`Correlator::with_planners`]: the kernel spectra's (f64) and the
/// sample type's. A planner keeps each transform it planned (twiddle factors included), so
/// correlators of the same block length made with one set share them.
pub struct Planners<T: Sample = f64> {
    exact: FftPlanner<f64>,
    sample: FftPlanner<T>,
}

impl<T: Sample> Default for Planners<T> {
    fn default() -> Self {
        Self { exact: FftPlanner::new(), sample: FftPlanner::new() }
    }
}

/// Work buffers of [`Correlator::correlate_with`], sized on first use and
/// then reused, so repeated calls allocate nothing.
#[derive(Debug, Clone)]
pub struct CorrelationScratch<T: Sample = f64> {
    block: Vec<Complex<T>>,
    fft: Vec<Complex<T>>,
}

impl<T: Sample> Default for CorrelationScratch<T> {
    fn default() -> Self {
        Self { block: Vec::new(), fft: Vec::new() }
    }
}

impl<T: Sample> std::fmt::Debug for Correlator<T> {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("Correlator").field("kernel_len", &self.kernel_len).field("block_len", &self.spectrum.len()).finish()
    }
}

impl<T: Sample> Correlator<T> {
    /// Prepares `kernel` (at least one value). The block length is the power
    /// of two at or above both eight kernel lengths and 1024 samples, which
    /// keeps the overlap a small fraction of each block. The kernel spectrum
    /// is computed in f64 and then rounded to the sample type.
    ///
    /// # Panics
    /// If `kernel` is empty.
    pub fn new(kernel: &[f64]) -> Self {
        Self::with_planners(kernel, &mut Planners::default())
    }

    /// As [`Self::new`], with transforms planned by `planners` (one plan per block length,
    /// shared by every correlator made with them; the same transforms as fresh ones).
    ///
    /// # Panics
    /// If `kernel` is empty.
    pub fn with_planners(kernel: &[f64], planners: &mut Planners<T>) -> Self {
        assert!(!kernel.is_empty(), "a correlation kernel needs at least one value");
        let k = kernel.len();
        let block_len = (8 * (k - 1)).max(MIN_BLOCK_LEN).next_power_of_two();
        let scale = 1.0 / block_len as f64;
        let mut exact = vec![Complex::new(0.0, 0.0); block_len];
        for (slot, &c) in exact.iter_mut().zip(kernel.iter().rev()) {
            *slot = Complex::new(c * scale, 0.0);
        }
        planners.exact.plan_fft_forward(block_len).process(&mut exact);
        let spectrum: Vec<Complex<T>> = exact.iter().map(|z| Complex::new(T::narrow(z.re), T::narrow(z.im))).collect();
        let (forward, inverse) = (planners.sample.plan_fft_forward(block_len), planners.sample.plan_fft_inverse(block_len));
        Self { kernel_len: k, kernel_sum: kernel.iter().sum(), forward, inverse, spectrum: spectrum.into() }
    }

    /// Number of kernel values K.
    pub fn kernel_len(&self) -> usize {
        self.kernel_len
    }

    /// Length of one FFT block, samples (a power of two).
    pub fn block_len(&self) -> usize {
        self.spectrum.len()
    }

    /// Writes `out[j] = Σ_k c_k · input[j + k]` for `j` in `0..out.len()`,
    /// with `input` taken as zero past its end. A non-finite input value
    /// spreads to every output of its block and of the block paired with it.
    pub fn correlate_with(&self, input: &[f64], out: &mut [f64], scratch: &mut CorrelationScratch<T>) {
        self.correlate_about(input, 0.0, out, scratch);
    }

    /// As [`Self::correlate_with`] on the departures `input − level` (taken
    /// as zero past the end of `input`), with `level · Σ c_k` added back in
    /// f64: where the kernel lies wholly within `input`, the same correlation,
    /// with the transform's rounding relative to the departures.
    pub fn correlate_about(&self, input: &[f64], level: f64, out: &mut [f64], scratch: &mut CorrelationScratch<T>) {
        let len = self.spectrum.len();
        let valid = len - (self.kernel_len - 1);
        let blocks = out.len().div_ceil(valid);
        let scratch_len = self.forward.get_inplace_scratch_len().max(self.inverse.get_inplace_scratch_len());
        let zero = Complex::new(T::zero(), T::zero());
        scratch.block.resize(len, zero);
        scratch.fft.resize(scratch_len, zero);
        let (buf, work) = (&mut scratch.block[..], &mut scratch.fft[..]);
        let n = input.len();
        let window = |start: usize| &input[start.min(n)..(start + len).min(n)];
        let back = level * self.kernel_sum;
        // Block b reads input[b·valid .. b·valid + len) and yields out[b·valid ..][..valid].
        for pair in (0..blocks).step_by(2) {
            let (re_start, im_start) = (pair * valid, (pair + 1) * valid);
            let re = window(re_start);
            let im = if pair + 1 < blocks { window(im_start) } else { &[] };
            pack_departures(re, im, level, buf);
            self.forward.process_with_scratch(buf, work);
            multiply_in_place(buf, &self.spectrum);
            self.inverse.process_with_scratch(buf, work);
            let results = &buf[self.kernel_len - 1..];
            let end = (re_start + valid).min(out.len());
            unpack(results, back, &mut out[re_start..end], &mut []);
            if pair + 1 < blocks {
                let end = (im_start + valid).min(out.len());
                unpack(results, back, &mut [], &mut out[im_start..end]);
            }
        }
    }
}

per_bin_loop! {
    /// Fills `buf` with `re[i] - level` as real and `im[i] - level` as imaginary parts, in the
    /// sample type, each part zero past the end of its input (`im` no longer than `re`).
    fn pack_departures<T: Sample>(re: &[f64], im: &[f64], level: f64, buf: &mut [Complex<T>]) {
        let both = im.len().min(re.len());
        for (slot, (&a, &b)) in buf.iter_mut().zip(re.iter().zip(im)) {
            *slot = Complex::new(T::narrow(a - level), T::narrow(b - level));
        }
        for (slot, &a) in buf[both..].iter_mut().zip(&re[both..]) {
            *slot = Complex::new(T::narrow(a - level), T::zero());
        }
        let filled = re.len().min(buf.len());
        buf[filled..].fill(Complex::new(T::zero(), T::zero()));
    }
}

per_bin_loop! {
    /// `buf[i] *= spectrum[i]` over the common length.
    fn multiply_in_place<T: Sample>(buf: &mut [Complex<T>], spectrum: &[Complex<T>]) {
        for (b, k) in buf.iter_mut().zip(spectrum) {
            *b = *b * *k;
        }
    }
}

per_bin_loop! {
    /// Writes the real parts of `results` plus `back` into `real` and the imaginary parts plus
    /// `back` into `imaginary`, each over its common length with `results`, in f64.
    fn unpack<T: Sample>(results: &[Complex<T>], back: f64, real: &mut [f64], imaginary: &mut [f64]) {
        for (o, r) in real.iter_mut().zip(results) {
            *o = r.re.widen() + back;
        }
        for (o, r) in imaginary.iter_mut().zip(results) {
            *o = r.im.widen() + back;
        }
    }
}

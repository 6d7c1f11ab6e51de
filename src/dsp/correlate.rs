//! Sliding dot products with a fixed real kernel, by overlap-save FFT.
//!
//! For a kernel `c_0 .. c_{K-1}` the correlation of a sequence `x` is
//! `out[j] = Σ_k c_k · x[j + k]`, with `x` taken as zero past its end. A direct
//! evaluation costs K multiply-adds per output; here the input is cut into
//! blocks of [`Correlator::block_len`] samples overlapping by K − 1, and each
//! block is transformed, multiplied by the kernel spectrum and transformed
//! back. Two blocks share one complex FFT (one in the real part, one in the
//! imaginary part: the kernel is real, so they never mix), which halves the
//! work on real data. The cost per output is O(log block_len), independent of
//! K. Units: the output has the units of `x` times those of the kernel.
//!
//! Rounding: each output carries an absolute error of a few ulp of the
//! largest `|c_k x_i|` products within its block, not of its own terms, so a
//! block mixing very large and very small inputs gives its small outputs a
//! larger relative error than a direct sum would.

use std::sync::Arc;

use rustfft::num_complex::Complex;
use rustfft::{Fft, FftPlanner};

/// Smallest FFT block, samples.
const MIN_BLOCK_LEN: usize = 1024;

/// A real kernel prepared for overlap-save correlation. `Send + Sync`: one
/// correlator can serve many threads, each with its own
/// [`CorrelationScratch`].
#[derive(Clone)]
pub struct Correlator {
    kernel_len: usize,
    forward: Arc<dyn Fft<f64>>,
    inverse: Arc<dyn Fft<f64>>,
    /// FFT of the reversed kernel, with the inverse transform's 1/N folded in.
    spectrum: Arc<[Complex<f64>]>,
}

/// Work buffers of [`Correlator::correlate_with`], sized on first use and
/// then reused, so repeated calls allocate nothing.
#[derive(Debug, Default, Clone)]
pub struct CorrelationScratch {
    block: Vec<Complex<f64>>,
    fft: Vec<Complex<f64>>,
}

impl std::fmt::Debug for Correlator {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("Correlator").field("kernel_len", &self.kernel_len).field("block_len", &self.spectrum.len()).finish()
    }
}

impl Correlator {
    /// Prepares `kernel` (at least one value). The block length is the power
    /// of two at or above both eight kernel lengths and 1024 samples, which
    /// keeps the overlap a small fraction of each block.
    ///
    /// # Panics
    /// If `kernel` is empty.
    pub fn new(kernel: &[f64]) -> Self {
        assert!(!kernel.is_empty(), "a correlation kernel needs at least one value");
        let k = kernel.len();
        let block_len = (8 * (k - 1)).max(MIN_BLOCK_LEN).next_power_of_two();
        let mut planner = FftPlanner::<f64>::new();
        let forward = planner.plan_fft_forward(block_len);
        let inverse = planner.plan_fft_inverse(block_len);
        let scale = 1.0 / block_len as f64;
        let mut spectrum = vec![Complex::new(0.0, 0.0); block_len];
        for (slot, &c) in spectrum.iter_mut().zip(kernel.iter().rev()) {
            *slot = Complex::new(c * scale, 0.0);
        }
        forward.process(&mut spectrum);
        Self { kernel_len: k, forward, inverse, spectrum: spectrum.into() }
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
    pub fn correlate_with(&self, input: &[f64], out: &mut [f64], scratch: &mut CorrelationScratch) {
        let len = self.spectrum.len();
        let valid = len - (self.kernel_len - 1);
        let blocks = out.len().div_ceil(valid);
        let scratch_len = self.forward.get_inplace_scratch_len().max(self.inverse.get_inplace_scratch_len());
        scratch.block.resize(len, Complex::new(0.0, 0.0));
        scratch.fft.resize(scratch_len, Complex::new(0.0, 0.0));
        let (buf, work) = (&mut scratch.block[..], &mut scratch.fft[..]);
        let n = input.len();
        let window = |start: usize| &input[start.min(n)..(start + len).min(n)];
        // Block b reads input[b·valid .. b·valid + len) and yields out[b·valid ..][..valid].
        for pair in (0..blocks).step_by(2) {
            let (re_start, im_start) = (pair * valid, (pair + 1) * valid);
            let re = window(re_start);
            let im = if pair + 1 < blocks { window(im_start) } else { &[] };
            // `im` starts later than `re`, so it is never the longer one.
            let both = im.len();
            for (slot, (&a, &b)) in buf.iter_mut().zip(re.iter().zip(im)) {
                *slot = Complex::new(a, b);
            }
            for (slot, &a) in buf[both..].iter_mut().zip(&re[both..]) {
                *slot = Complex::new(a, 0.0);
            }
            buf[re.len()..].fill(Complex::new(0.0, 0.0));
            self.forward.process_with_scratch(buf, work);
            buf.iter_mut().zip(self.spectrum.iter()).for_each(|(b, k)| *b *= k);
            self.inverse.process_with_scratch(buf, work);
            let results = &buf[self.kernel_len - 1..];
            let end = (re_start + valid).min(out.len());
            for (o, r) in out[re_start..end].iter_mut().zip(results) {
                *o = r.re;
            }
            if pair + 1 < blocks {
                let end = (im_start + valid).min(out.len());
                for (o, r) in out[im_start..end].iter_mut().zip(results) {
                    *o = r.im;
                }
            }
        }
    }
}

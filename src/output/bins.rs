//! A run of consecutive grid bins of a finished spectrum, as the outputs take them: from a
//! block of a streamed reduction, or a piece of an in-memory spectrum cut the same way.

use crate::stage::{BLOCK_BINS, Block, Spectrum};
use std::ops::Range;

/// Per-bin values of grid bins `first_bin .. first_bin + grand.len()` (all slices of that
/// length; units as in [`Spectrum`]).
#[derive(Debug, Clone, Copy)]
pub struct Bins<'a> {
    /// Grid index of the first bin.
    pub first_bin: usize,
    /// Bins of the whole grid.
    pub grid_bins: usize,
    /// Bin-centre frequency of grid bin 0, Hz.
    pub origin_hz: f64,
    /// Bin width, Hz.
    pub bin_width_hz: f64,
    /// Threshold of the flagging stage (NaN if none).
    pub threshold: f64,
    pub combined: &'a [f64],
    pub combined_sigma: &'a [f64],
    pub amplitude: &'a [f64],
    pub sigma_a: &'a [f64],
    pub predicted_spread: &'a [f64],
    pub grand: &'a [f64],
}

impl<'a> Bins<'a> {
    /// The bins a block owns.
    pub fn of_block(b: &'a Block) -> Self {
        Self {
            first_bin: b.first_bin,
            grid_bins: b.grid_bins,
            origin_hz: b.origin_hz,
            bin_width_hz: b.bin_width_hz,
            threshold: b.threshold.unwrap_or(f64::NAN),
            combined: &b.combined,
            combined_sigma: &b.combined_sigma,
            amplitude: &b.amplitude,
            sigma_a: &b.sigma_a,
            predicted_spread: &b.predicted_spread,
            grand: &b.grand,
        }
        .slice(0..b.len)
    }

    /// The bins in consecutive pieces of `piece_bins` (the last one shorter).
    pub fn pieces(self, piece_bins: usize) -> impl Iterator<Item = Bins<'a>> + 'a {
        let n = self.grand.len();
        (0..n.div_ceil(piece_bins)).map(move |p| self.slice(p * piece_bins..((p + 1) * piece_bins).min(n)))
    }

    /// A spectrum in the pieces a streamed reduction makes ([`BLOCK_BINS`] bins each), so
    /// outputs built from them piece by piece come out the same either way.
    pub fn blocks_of(sp: &'a Spectrum) -> impl Iterator<Item = Bins<'a>> {
        let whole = Self {
            first_bin: 0,
            grid_bins: sp.grand.len(),
            origin_hz: sp.rf_start_hz,
            bin_width_hz: sp.bin_width_hz,
            threshold: sp.threshold.unwrap_or(f64::NAN),
            combined: &sp.combined,
            combined_sigma: &sp.combined_sigma,
            amplitude: &sp.amplitude,
            sigma_a: &sp.sigma_a,
            predicted_spread: &sp.predicted_spread,
            grand: &sp.grand,
        };
        whole.pieces(BLOCK_BINS)
    }

    /// Bins `r` of these (counted from `first_bin`).
    fn slice(&self, r: Range<usize>) -> Self {
        Self {
            first_bin: self.first_bin + r.start,
            combined: &self.combined[r.clone()],
            combined_sigma: &self.combined_sigma[r.clone()],
            amplitude: &self.amplitude[r.clone()],
            sigma_a: &self.sigma_a[r.clone()],
            predicted_spread: &self.predicted_spread[r.clone()],
            grand: &self.grand[r],
            ..*self
        }
    }
}

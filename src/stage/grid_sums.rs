//! The combination's per-RF-bin sums, held in blocks of [`BLOCK_BINS`] bins that exist only
//! while steps touch them.
//!
//! A block is made (zeroed) when a step first reaches it and dropped when the combination
//! finishes it; its buffers are kept for the next block rather than returned to the system,
//! since fresh pages cost a fault each. A night whose steps move steadily along the grid so
//! holds a few blocks at a time, whatever its span; one that jumps back and forth holds every
//! block still to be touched again.

use super::{BLOCK_BINS, written_zeros};
use std::collections::BTreeMap;

/// Sums of one block: sum of z / sigma (reference-axion units^-1), sum of 1 / sigma^2
/// (units^-2), and the number of steps with a sample, per bin.
#[derive(Debug, Default)]
pub(crate) struct Sums {
    pub weighted_sum: Vec<f64>,
    pub weight: Vec<f64>,
    pub coverage: Vec<u32>,
}

impl Sums {
    fn zeroed(len: usize) -> Self {
        Self { weighted_sum: written_zeros(len), weight: written_zeros(len), coverage: written_zeros(len) }
    }

    /// Zeroes a reused block for `len` bins.
    fn reset(&mut self, len: usize) {
        for v in [&mut self.weighted_sum, &mut self.weight] {
            v.clear();
            v.resize(len, 0.0);
        }
        self.coverage.clear();
        self.coverage.resize(len, 0);
    }
}

/// Mutable sums of bins `first_bin ..` of one block, for one task.
pub(crate) struct Piece<'a> {
    /// Grid index of the piece's first bin.
    pub first_bin: usize,
    pub weighted_sum: &'a mut [f64],
    pub weight: &'a mut [f64],
    pub coverage: &'a mut [u32],
}

/// The sums of the grid's open blocks, and buffers kept for reuse.
#[derive(Debug, Default)]
pub(crate) struct GridSums {
    grid_bins: usize,
    open: BTreeMap<usize, Sums>,
    spare: Vec<Sums>,
}

impl GridSums {
    /// No open block, for a grid of `grid_bins` bins.
    pub fn new(grid_bins: usize) -> Self {
        Self { grid_bins, ..Self::default() }
    }

    /// Bins of the whole grid.
    pub fn grid_bins(&self) -> usize {
        self.grid_bins
    }

    fn block_len(&self, block: usize) -> usize {
        BLOCK_BINS.min(self.grid_bins.saturating_sub(block * BLOCK_BINS))
    }

    /// The sums of grid bins `lo..hi` (`hi` within the grid), in pieces of at most
    /// `piece_bins` bins that never cross a block; blocks not yet open are opened zeroed.
    pub fn pieces(&mut self, lo: usize, hi: usize, piece_bins: usize) -> Vec<Piece<'_>> {
        if lo >= hi {
            return Vec::new();
        }
        let (first, last) = (lo / BLOCK_BINS, (hi - 1) / BLOCK_BINS);
        for block in first..=last {
            if !self.open.contains_key(&block) {
                let len = self.block_len(block);
                let sums = match self.spare.pop() {
                    Some(mut sums) => {
                        sums.reset(len);
                        sums
                    }
                    None => Sums::zeroed(len),
                };
                self.open.insert(block, sums);
            }
        }
        let mut pieces = Vec::new();
        for (&block, sums) in self.open.range_mut(first..=last) {
            let base = block * BLOCK_BINS;
            let (from, to) = (lo.max(base) - base, hi.min(base + sums.weight.len()) - base);
            let mut rest = (&mut sums.weighted_sum[from..to], &mut sums.weight[from..to], &mut sums.coverage[from..to]);
            let mut first_bin = base + from;
            while !rest.1.is_empty() {
                let n = piece_bins.min(rest.1.len());
                let (s, s_rest) = std::mem::take(&mut rest.0).split_at_mut(n);
                let (w, w_rest) = std::mem::take(&mut rest.1).split_at_mut(n);
                let (c, c_rest) = std::mem::take(&mut rest.2).split_at_mut(n);
                pieces.push(Piece { first_bin, weighted_sum: s, weight: w, coverage: c });
                rest = (s_rest, w_rest, c_rest);
                first_bin += n;
            }
        }
        pieces
    }

    /// Calls `read` with the sums of block `block` (zeros if no step touched it) and keeps
    /// its buffers for reuse.
    pub fn close(&mut self, block: usize, read: impl FnOnce(&Sums)) {
        match self.open.remove(&block) {
            Some(sums) => {
                read(&sums);
                self.spare.push(sums);
            }
            None => read(&Sums::zeroed(self.block_len(block))),
        }
    }
}

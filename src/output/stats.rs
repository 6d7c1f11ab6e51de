//! Grand-spectrum statistics of the summary, gathered block by block.
//!
//! The finite values of each piece of [`STATS_PIECE_BINS`] bins give their count, mean and
//! sum of squared deviations from it (two passes over the piece, pieces in parallel); the
//! pieces are merged in grid order with the pairwise update of Chan, Golub & LeVeque (1979).
//! The result depends only on how the grid is cut, which is the same for a streamed and an
//! in-memory reduction ([`super::Bins::blocks_of`], pieces counted from each block's start);
//! it agrees with the two-pass formula over the whole grid to rounding (about 1e-16
//! relative).

use super::Bins;
use crate::simd::per_bin_loop;
use rayon::prelude::*;

/// Count, mean and sum of squared deviations of finite values.
#[derive(Debug, Clone, Copy, Default, PartialEq)]
pub struct Moments {
    n: usize,
    mean: f64,
    m2: f64,
}

impl Moments {
    /// The moments of the finite values of each of `columns` (slices of equal length), in two
    /// passes over all of them together: per column the same sums in the same order as two
    /// passes over it alone, with the columns' sums interleaved, so they do not wait on one
    /// another. Also counts the values of `columns[0]` above `above` (none for NaN).
    pub fn of_columns<const K: usize>(columns: [&[f64]; K], above: f64) -> ([Self; K], usize) {
        let len = columns.first().map_or(0, |c| c.len());
        assert!(columns.iter().all(|c| c.len() == len), "columns of unequal length");
        let columns = columns.map(|c| &c[..len]);
        let (mut n, mut sum, mut n_above) = ([0usize; K], [0.0f64; K], 0usize);
        for i in 0..len {
            n_above += usize::from(K > 0 && columns[0][i] > above);
            for k in 0..K {
                let v = columns[k][i];
                // Adding +0 leaves a sum begun at +0 as it was: the same bits as skipping v.
                let finite = v.is_finite();
                n[k] += usize::from(finite);
                sum[k] += if finite { v } else { 0.0 };
            }
        }
        let mean: [f64; K] = std::array::from_fn(|k| if n[k] == 0 { 0.0 } else { sum[k] / n[k] as f64 });
        let mut m2 = [0.0f64; K];
        for i in 0..len {
            for k in 0..K {
                let v = columns[k][i];
                let d = v - mean[k];
                m2[k] += if v.is_finite() { d * d } else { 0.0 };
            }
        }
        (std::array::from_fn(|k| if n[k] == 0 { Self::default() } else { Self { n: n[k], mean: mean[k], m2: m2[k] } }), n_above)
    }

    /// Adds the values `other` describes (merged as if they followed these).
    pub fn merge(&mut self, other: &Self) {
        if other.n == 0 {
            return;
        }
        let total = self.n + other.n;
        let delta = other.mean - self.mean;
        self.mean += delta * other.n as f64 / total as f64;
        self.m2 += other.m2 + delta * delta * self.n as f64 * other.n as f64 / total as f64;
        self.n = total;
    }

    /// Number of finite values.
    pub fn count(&self) -> usize {
        self.n
    }

    /// Mean (0 if there is no value).
    pub fn mean(&self) -> f64 {
        self.mean
    }

    /// Standard deviation, population form (0 if there is no value).
    pub fn std(&self) -> f64 {
        (self.m2 / self.n.max(1) as f64).sqrt()
    }
}

per_bin_loop! {
    /// Appends `a[i] / s[i]` to `out` over the common length (A / sigma_A of the summary).
    fn ratios(a: &[f64], s: &[f64], out: &mut Vec<f64>) {
        out.extend(a.iter().zip(s).map(|(a, s)| a / s));
    }
}

/// Bins of one piece of the statistics (a block is cut into these from its start).
pub const STATS_PIECE_BINS: usize = 16384;

/// What the summary reports about the grand spectrum.
#[derive(Debug, Clone, Copy, Default, PartialEq)]
pub struct GrandStats {
    /// Bins of the grid.
    pub n_bins: usize,
    /// The grand spectrum's finite values.
    pub grand: Moments,
    /// A / sigma_A (before the predicted spread's normalisation).
    pub raw: Moments,
    /// The predicted spread.
    pub predicted_spread: Moments,
    /// Bins above the threshold.
    pub n_above: usize,
}

impl GrandStats {
    /// The statistics of consecutive bins (at most one piece).
    fn of_piece(b: &Bins<'_>) -> Self {
        let mut raw = Vec::with_capacity(b.grand.len());
        ratios(b.amplitude, b.sigma_a, &mut raw);
        let ([grand, raw, predicted_spread], n_above) = Moments::of_columns([b.grand, &raw, b.predicted_spread], b.threshold);
        Self { n_bins: b.grid_bins, grand, raw, predicted_spread, n_above }
    }

    /// Adds the statistics of `other`, of the bins that follow.
    fn merge(&mut self, other: &Self) {
        self.n_bins = other.n_bins;
        self.grand.merge(&other.grand);
        self.raw.merge(&other.raw);
        self.predicted_spread.merge(&other.predicted_spread);
        self.n_above += other.n_above;
    }

    /// Adds consecutive bins (blocks in grid order), in pieces of [`STATS_PIECE_BINS`]
    /// worked on in parallel and merged in order.
    pub fn add(&mut self, bins: &Bins<'_>) {
        let pieces: Vec<Self> = bins.pieces(STATS_PIECE_BINS).collect::<Vec<_>>().par_iter().map(Self::of_piece).collect();
        pieces.iter().for_each(|p| self.merge(p));
        self.n_bins = bins.grid_bins;
    }

    /// The statistics of a whole in-memory spectrum, cut as a streamed reduction cuts it.
    pub fn of_spectrum(sp: &crate::stage::Spectrum) -> Self {
        let mut stats = Self { n_bins: sp.grand.len(), ..Self::default() };
        Bins::blocks_of(sp).for_each(|bins| stats.add(&bins));
        stats
    }
}

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
use rayon::prelude::*;

/// Count, mean and sum of squared deviations of finite values.
#[derive(Debug, Clone, Copy, Default, PartialEq)]
pub struct Moments {
    n: usize,
    mean: f64,
    m2: f64,
}

impl Moments {
    /// The moments of the finite values of `x` (two passes).
    pub fn of(x: impl Iterator<Item = f64> + Clone) -> Self {
        let (n, sum) = x.clone().filter(|v| v.is_finite()).fold((0usize, 0.0), |(n, s), v| (n + 1, s + v));
        if n == 0 {
            return Self::default();
        }
        let mean = sum / n as f64;
        let m2: f64 = x.filter(|v| v.is_finite()).map(|v| (v - mean) * (v - mean)).sum();
        Self { n, mean, m2 }
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
        Self {
            n_bins: b.grid_bins,
            grand: Moments::of(b.grand.iter().copied()),
            raw: Moments::of(b.amplitude.iter().zip(b.sigma_a).map(|(a, s)| a / s)),
            predicted_spread: Moments::of(b.predicted_spread.iter().copied()),
            n_above: b.grand.iter().filter(|&&v| v > b.threshold).count(),
        }
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

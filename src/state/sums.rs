//! The state's per-RF-bin sums over a contiguous range of bins, dense in memory.
//!
//! Bins are numbered on the state's grid: bin b has its centre at `rf_origin_hz + b *
//! bin_width_hz` (b may be negative: nights may extend below the first one). The same type
//! holds one block of the stored sums and the span an update works on.

use std::ops::Range;

/// Per RF bin, for the bins `first_bin .. first_bin + len`: the maximum-likelihood sums of
/// all nights and the part of them that comes from IF-line samples.
#[derive(Debug, Clone, PartialEq)]
pub struct Sums {
    /// Grid index of the first bin.
    pub first_bin: i64,
    /// Sum over steps of 1/sigma^2, reference-axion power^-2.
    pub weight: Vec<f64>,
    /// Sum over steps of R/sigma^2, reference-axion power^-1.
    pub weighted_sum: Vec<f64>,
    /// Steps contributing.
    pub coverage: Vec<u32>,
    /// Sum of 1/sigma^2 of the samples set aside as IF-line samples (included in `weight`).
    pub line_weight: Vec<f64>,
    /// Sum of R/sigma^2 of those samples (included in `weighted_sum`).
    pub line_weighted_sum: Vec<f64>,
    /// Number of those samples.
    pub line_steps: Vec<u32>,
    /// Night of the latest such sample (-1 = none).
    pub line_night: Vec<i32>,
    /// IF bin of the latest such sample (-1 = none).
    pub line_if_bin: Vec<i32>,
    /// Significance of that IF bin in its night's IF profile, normal sigma (NaN = none).
    pub line_if_profile_sigma: Vec<f64>,
}

impl Sums {
    /// Sums with nothing added, for `n` bins from `first_bin`.
    pub fn empty(first_bin: i64, n: usize) -> Self {
        Self {
            first_bin,
            weight: vec![0.0; n],
            weighted_sum: vec![0.0; n],
            coverage: vec![0; n],
            line_weight: vec![0.0; n],
            line_weighted_sum: vec![0.0; n],
            line_steps: vec![0; n],
            line_night: vec![-1; n],
            line_if_bin: vec![-1; n],
            line_if_profile_sigma: vec![f64::NAN; n],
        }
    }

    /// Number of bins.
    pub fn len(&self) -> usize {
        self.weight.len()
    }

    /// Whether it holds no bin.
    pub fn is_empty(&self) -> bool {
        self.weight.is_empty()
    }

    /// The grid bins it holds.
    pub fn bins(&self) -> Range<i64> {
        self.first_bin..self.first_bin + self.len() as i64
    }

    /// Bins with at least one contributing step.
    pub fn covered_bins(&self) -> usize {
        self.coverage.iter().filter(|&&c| c > 0).count()
    }

    /// Whether no night has added anything here.
    pub fn is_blank(&self) -> bool {
        self.coverage.iter().all(|&c| c == 0) && self.line_steps.iter().all(|&n| n == 0)
    }

    /// Copies `src`'s values into the bins the two have in common.
    pub fn copy_overlap(&mut self, src: &Sums) {
        let (lo, hi) = (self.first_bin.max(src.first_bin), (self.first_bin + self.len() as i64).min(src.first_bin + src.len() as i64));
        if lo >= hi {
            return;
        }
        let (d, s, n) = ((lo - self.first_bin) as usize, (lo - src.first_bin) as usize, (hi - lo) as usize);
        self.weight[d..d + n].copy_from_slice(&src.weight[s..s + n]);
        self.weighted_sum[d..d + n].copy_from_slice(&src.weighted_sum[s..s + n]);
        self.coverage[d..d + n].copy_from_slice(&src.coverage[s..s + n]);
        self.line_weight[d..d + n].copy_from_slice(&src.line_weight[s..s + n]);
        self.line_weighted_sum[d..d + n].copy_from_slice(&src.line_weighted_sum[s..s + n]);
        self.line_steps[d..d + n].copy_from_slice(&src.line_steps[s..s + n]);
        self.line_night[d..d + n].copy_from_slice(&src.line_night[s..s + n]);
        self.line_if_bin[d..d + n].copy_from_slice(&src.line_if_bin[s..s + n]);
        self.line_if_profile_sigma[d..d + n].copy_from_slice(&src.line_if_profile_sigma[s..s + n]);
    }

    /// Index of grid bin `bin` in the arrays, if held.
    pub fn index_of(&self, bin: i64) -> Option<usize> {
        self.bins().contains(&bin).then(|| (bin - self.first_bin) as usize)
    }
}

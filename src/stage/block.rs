//! A block of consecutive RF bins on its way through the spectrum stages.
//!
//! A night's RF grid is finished block by block ([`BLOCK_BINS`] bins each, the last one
//! shorter): once every step touching a block has been combined, its combined values go
//! through the spectrum stages and out, so the per-bin arrays of the whole grid never exist
//! at once. The whole spectrum of an in-memory reduction is one block.
//!
//! Stages that read past a bin (the filter reads a kernel's length ahead) declare how far
//! ([`super::SpectrumStage::lookahead_bins`]); a block then carries that many combined bins
//! of the next one. Stages that find features spanning bins (the flag stage's runs above
//! threshold) carry an unfinished one to the next block in [`Block::open_run`].

use super::{Candidate, Spectrum};

/// Bins of one block (2^16: 6.6 MHz of 100 Hz bins; about 1.3 MB of combination sums and 2 MB
/// of per-bin outputs while a block is worked on). A multiple of the filter's and the
/// combination's pieces, so the pieces and their results are the same however the grid is
/// cut into blocks.
pub const BLOCK_BINS: usize = 1 << 16;

/// A run of bins above a threshold not yet closed at the end of a block.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct OpenRun {
    /// Grid index of the run's first bin.
    pub first_bin: usize,
    /// Grid index of its most significant bin so far.
    pub peak_bin: usize,
    /// Grand-spectrum value there.
    pub peak_value: f64,
}

/// Consecutive bins `first_bin .. first_bin + len` of an RF grid, with their combined values
/// and what the spectrum stages add.
#[derive(Debug, Clone, Default)]
pub struct Block {
    /// Bin-centre frequency of the grid's bin 0, Hz.
    pub origin_hz: f64,
    /// Bin width, Hz.
    pub bin_width_hz: f64,
    /// RF width of one step's band, (n_bins - 1) * bin width, Hz.
    pub step_span_hz: f64,
    /// Bins of the whole grid.
    pub grid_bins: usize,
    /// Grid index of the block's first bin.
    pub first_bin: usize,
    /// Bins the block owns (the stages' outputs cover these).
    pub len: usize,
    /// Combined excess power, reference-axion units (NaN = no data): the owned bins, then up
    /// to the stages' lookahead of the following ones (fewer at the grid's end).
    pub combined: Vec<f64>,
    /// Its standard deviation (infinite = no data), over the same bins.
    pub combined_sigma: Vec<f64>,
    /// Steps contributing, per owned bin.
    pub coverage: Vec<u32>,
    /// Filtered amplitude, reference-axion units, per owned bin.
    pub amplitude: Vec<f64>,
    /// Its standard deviation, reference-axion units.
    pub sigma_a: Vec<f64>,
    /// Predicted null spread of A / sigma_A.
    pub predicted_spread: Vec<f64>,
    /// Grand spectrum A / (sigma_A * predicted spread).
    pub grand: Vec<f64>,
    /// Candidates closed within this block.
    pub candidates: Vec<Candidate>,
    /// A run above threshold reaching the block's end, continued by the next block.
    pub open_run: Option<OpenRun>,
    /// Mean squared halo speed over c^2 assumed by the filter.
    pub mean_beta_sq: f64,
    /// Threshold of the flagging stage.
    pub threshold: Option<f64>,
}

impl Block {
    /// Whether the block ends the grid.
    pub fn is_last(&self) -> bool {
        self.first_bin + self.len >= self.grid_bins
    }

    /// Bin-centre RF frequency of grid bin `j`, Hz.
    pub fn freq_hz(&self, j: usize) -> f64 {
        self.origin_hz + j as f64 * self.bin_width_hz
    }

    /// The whole of `spectrum` as one block (its per-bin arrays and candidates moved out;
    /// [`Block::return_to`] moves them back).
    pub fn whole(spectrum: &mut Spectrum) -> Self {
        let sp = spectrum;
        Self {
            origin_hz: sp.rf_start_hz,
            bin_width_hz: sp.bin_width_hz,
            step_span_hz: sp.step_span_hz,
            grid_bins: sp.combined.len(),
            first_bin: 0,
            len: sp.combined.len(),
            combined: std::mem::take(&mut sp.combined),
            combined_sigma: std::mem::take(&mut sp.combined_sigma),
            coverage: std::mem::take(&mut sp.coverage),
            amplitude: std::mem::take(&mut sp.amplitude),
            sigma_a: std::mem::take(&mut sp.sigma_a),
            predicted_spread: std::mem::take(&mut sp.predicted_spread),
            grand: std::mem::take(&mut sp.grand),
            candidates: std::mem::take(&mut sp.candidates),
            open_run: None,
            mean_beta_sq: sp.mean_beta_sq,
            threshold: sp.threshold,
        }
    }

    /// Appends the bins the block owns to the per-bin arrays of `spectrum`, and its
    /// candidates.
    pub fn append_to(&self, spectrum: &mut Spectrum) {
        let n = self.len;
        spectrum.combined.extend_from_slice(&self.combined[..n]);
        spectrum.combined_sigma.extend_from_slice(&self.combined_sigma[..n]);
        spectrum.coverage.extend_from_slice(&self.coverage[..n.min(self.coverage.len())]);
        spectrum.amplitude.extend_from_slice(&self.amplitude[..n]);
        spectrum.sigma_a.extend_from_slice(&self.sigma_a[..n]);
        spectrum.predicted_spread.extend_from_slice(&self.predicted_spread[..n]);
        spectrum.grand.extend_from_slice(&self.grand[..n]);
        spectrum.candidates.extend_from_slice(&self.candidates);
    }

    /// Moves the per-bin arrays, candidates and stage facts of a block made by
    /// [`Block::whole`] back into `spectrum`.
    pub fn return_to(self, spectrum: &mut Spectrum) {
        let sp = spectrum;
        sp.combined = self.combined;
        sp.combined_sigma = self.combined_sigma;
        sp.coverage = self.coverage;
        sp.amplitude = self.amplitude;
        sp.sigma_a = self.sigma_a;
        sp.predicted_spread = self.predicted_spread;
        sp.grand = self.grand;
        sp.candidates = self.candidates;
        sp.mean_beta_sq = self.mean_beta_sq;
        sp.threshold = self.threshold;
    }
}

//! Stage traits, one per data shape, and the data that flows between stages.
//!
//! Shapes: per-step stages ([`StepStage`]) run independently on each tuning step; one
//! combining stage ([`Combiner`]) maps steps onto the RF grid; spectrum stages
//! ([`SpectrumStage`]) work on the combined spectrum. Each stage declares the [`Form`] it
//! consumes and produces, and the plan is checked against those when the config is loaded.

pub mod baseline;
pub mod block;
pub mod combine;
pub mod filter;
pub mod flag;
mod grid_sums;
pub mod ingest;
pub mod no_data;
pub mod rescale;

use crate::runfile::{RunHeader, StepMeta};
pub use block::{BLOCK_BINS, Block, OpenRun};

/// `x.is_finite()` written as a floating-point comparison. The standard form is compiled to
/// integer tests on the bits, which keeps the per-bin loops of the stages from vectorising.
#[inline]
pub(crate) fn finite(x: f64) -> bool {
    x.abs() <= f64::MAX
}

/// `n` zeros, written when allocated. A zeroed allocation (`vec![0.0; n]`) of a large array
/// gets pages that the first read maps to the kernel's shared zero page and the first write
/// then copies, a second page fault and a TLB flush on every core per page; an accumulator
/// that adds into each entry (read, then write) would take both inside its hot loop.
pub(crate) fn written_zeros<T: Copy + Default>(n: usize) -> Vec<T> {
    let mut v = Vec::with_capacity(n);
    v.resize(n, T::default());
    v
}

/// What the numbers in the data currently mean.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Form {
    /// Raw linear power per bin, straight from the run file.
    Raw,
    /// Raw power from steps that passed the ingest checks and cuts.
    Accepted,
    /// Baseline-free fluctuation delta = P / (G * SG) - 1 (dimensionless, sigma ~ 1/sqrt(N)).
    Normalised,
    /// Excess power in units of the reference axion's power, held standardised in
    /// [`Step::standard`] (significance and inverse sigma per bin).
    Rescaled,
    /// Maximum-likelihood combination on one RF grid.
    Combined,
    /// Optimally filtered grand spectrum (A / sigma_A, normalised).
    Grand,
}

/// Night-wide facts known before the stages are built.
#[derive(Debug, Clone)]
pub struct NightInfo {
    /// Bin width shared by all files, Hz.
    pub bin_width_hz: f64,
    /// Bins per step.
    pub n_bins: usize,
    /// Lowest and highest bin-centre RF frequency over all steps, Hz.
    pub rf_span_hz: (f64, f64),
    /// The header of each input file, by file index.
    pub headers: Vec<RunHeader>,
    /// Correlation of the noise power of bins 1, 2, ... apart, shared by all files
    /// ([`RunHeader::bin_correlation`]; empty: independent bins).
    pub bin_correlation: Vec<f64>,
}

/// One tuning step in flight through the per-step stages.
#[derive(Debug, Clone)]
pub struct Step {
    /// Index of the step over all input files, in input order.
    pub index: usize,
    /// Index of the file it came from.
    pub file: usize,
    /// Index within that file.
    pub index_in_file: usize,
    /// Its cavity and receiver parameters.
    pub meta: StepMeta,
    /// Per-bin values up to the [`Form::Normalised`] form; their meaning is given by the
    /// current [`Form`]. NaN = no data.
    pub values: Vec<f64>,
    /// The bins in the [`Form::Rescaled`] form, the one the accumulations take (filled by
    /// the rescaling stage from `values`).
    pub standard: Standardised,
    /// Its bins without data, by cause: `masked` set when the step is loaded, the others by
    /// the ingest stage.
    pub no_data: no_data::NoDataBins,
}

/// A step's bins as the accumulations take them: per bin the significance z = r / sigma and
/// the inverse standard deviation 1 / sigma, both 0 where the bin holds no valid sample (value
/// or sigma not finite, or sigma not > 0). Weight 1 / sigma^2 = inv^2, weighted value
/// r / sigma^2 = z inv and w r^2 = z^2 then follow by multiplication: the accumulations,
/// which run over every step of a chunk for each RF piece, need no division and no test, and
/// the one division per bin is made while the step is still in its core's cache, by the stage
/// that produces this form.
///
/// Both are held in single precision (relative rounding 6e-8, below that of the f32 spectra
/// on disk; sums are formed in f64): each accumulation reads every step's pair once, and half
/// the bytes halve the traffic that bounds them. The combined spectrum stays within 1e-6 of
/// its sigma of the double-precision formula (tests/fast_paths.rs).
#[derive(Debug, Clone, Default)]
pub struct Standardised {
    /// r / sigma (0 = no sample).
    pub z: Vec<f32>,
    /// 1 / sigma, in the inverse units of the values (0 = no sample).
    pub inverse_sigma: Vec<f32>,
}

impl Standardised {
    /// Number of standardised bins (the common length of the two buffers).
    pub(crate) fn len(&self) -> usize {
        self.z.len().min(self.inverse_sigma.len())
    }
}

/// Outcome of a per-step stage.
#[derive(Debug, Clone, PartialEq)]
pub enum Verdict {
    /// The step goes on.
    Keep,
    /// The step is dropped, with the reason reported in the summary.
    Cut(String),
}

/// A stage applied to every step independently (in parallel; must not depend on step order).
pub trait StepStage: Send + Sync {
    /// Whether [`StepStage::survey`] must see every accepted step before any is processed.
    fn needs_survey(&self) -> bool {
        false
    }
    /// Accumulates night-wide statistics from one step (called in step order).
    fn survey(&mut self, _step: &Step) {}
    /// Accumulates consecutive steps, given in step order: the same result, bit for bit, as
    /// [`StepStage::survey`] on each in turn, which is what this default does. A stage may
    /// override it to work on several bins at once.
    fn survey_all(&mut self, steps: &[&Step]) {
        for step in steps {
            self.survey(step);
        }
    }
    /// Closes the survey; errors if the night gave too little to work with.
    fn finish_survey(&mut self) -> Result<(), String> {
        Ok(())
    }
    /// Transforms one step in place.
    fn apply(&self, step: &mut Step, night: &NightInfo) -> Verdict;
}

/// The RF-grid spectrum after combination, and what later stages add to it.
#[derive(Debug, Clone, Default)]
pub struct Spectrum {
    /// Bin-centre frequency of RF bin 0, Hz.
    pub rf_start_hz: f64,
    /// RF bin width, Hz.
    pub bin_width_hz: f64,
    /// Combined excess power, reference-axion units (NaN = no data).
    pub combined: Vec<f64>,
    /// Its standard deviation (infinite = no data).
    pub combined_sigma: Vec<f64>,
    /// Number of steps that contributed to each bin.
    pub coverage: Vec<u32>,
    /// Filtered amplitude A_j for an axion whose line starts at the lower edge of bin j.
    pub amplitude: Vec<f64>,
    /// Standard deviation of A_j, reference-axion units.
    pub sigma_a: Vec<f64>,
    /// Predicted null spread of A/sigma_A before normalisation, per bin.
    pub predicted_spread: Vec<f64>,
    /// Normalised grand spectrum A / (sigma_A * predicted spread).
    pub grand: Vec<f64>,
    /// Rescan candidates found by flagging stages.
    pub candidates: Vec<Candidate>,
    /// RF width of one step's band, (n_bins - 1) * bin width, Hz.
    pub step_span_hz: f64,
    /// Mean squared halo speed over c^2 assumed by the filter.
    pub mean_beta_sq: f64,
    /// Threshold used by the flagging stage.
    pub threshold: Option<f64>,
}

impl Spectrum {
    /// Bin-centre RF frequency of bin `j`, Hz.
    pub fn freq_hz(&self, j: usize) -> f64 {
        self.rf_start_hz + j as f64 * self.bin_width_hz
    }
}

/// A group of adjacent grand-spectrum bins above threshold.
#[derive(Debug, Clone, PartialEq, serde::Serialize)]
pub struct Candidate {
    /// Axion frequency hypothesis of the most significant bin (line start), Hz.
    pub frequency_hz: f64,
    /// Grand-spectrum value of that bin.
    pub significance: f64,
    /// Grand-spectrum bin of the most significant value.
    pub peak_bin: usize,
    /// First and last flagged bin index.
    pub first_bin: usize,
    pub last_bin: usize,
    /// Cavity frequency to tune to for a rescan: the line's mean frequency, Hz.
    pub revisit_cavity_hz: f64,
    /// Input steps whose band covered the candidate (global step indices).
    pub covering_steps: Vec<usize>,
}

/// Maps steps onto one RF grid. Steps come standardised ([`Step::standard`] filled).
///
/// The grid is held in blocks of [`BLOCK_BINS`] bins, made when a step first touches them;
/// [`Combiner::finish_block`] hands a block's combined values out and drops its sums, so a
/// night whose steps move along the grid keeps only the blocks its current steps touch.
pub trait Combiner: Send {
    /// Adds one step (called in step order, so the sums are reproducible).
    fn add(&mut self, step: &Step) -> Result<(), String>;
    /// Adds consecutive steps, given in step order: the same result, bit for bit, as
    /// [`Combiner::add`] on each in turn, which is what this default does. A combiner may
    /// override it to work on several RF bins at once, each bin still summed in step order.
    fn add_all(&mut self, steps: &[&Step]) -> Result<(), String> {
        steps.iter().try_for_each(|step| self.add(step))
    }
    /// Bins of the whole grid.
    fn grid_bins(&self) -> usize;
    /// Appends the combined values of block `block` (bins `block * BLOCK_BINS ..`) to
    /// `combined` (NaN = no data) and `sigma` (infinite = no data), and its step counts to
    /// `coverage` if given, and drops its sums: no step may touch it afterwards.
    fn finish_block(&mut self, block: usize, combined: &mut Vec<f64>, sigma: &mut Vec<f64>, coverage: Option<&mut Vec<u32>>);
    /// Returns the combined spectrum (every block finished).
    fn finish(self: Box<Self>) -> Spectrum;
}

/// A stage on the combined spectrum, applied block by block in grid order.
pub trait SpectrumStage: Send + Sync {
    /// Combined bins past a block's end the stage reads (0: none).
    fn lookahead_bins(&self) -> usize {
        0
    }
    /// Transforms one block in place. Blocks come in grid order, each with
    /// [`SpectrumStage::lookahead_bins`] combined bins beyond its own (fewer at the grid's
    /// end), and with what the previous block left open.
    fn apply_block(&self, block: &mut Block, steps: &[(usize, StepMeta)]) -> Result<(), String>;
    /// Transforms a whole spectrum in place, as one block.
    fn apply(&self, spectrum: &mut Spectrum, steps: &[(usize, StepMeta)]) -> Result<(), String> {
        let mut block = Block::whole(spectrum);
        let applied = self.apply_block(&mut block, steps);
        block.return_to(spectrum);
        applied
    }
}

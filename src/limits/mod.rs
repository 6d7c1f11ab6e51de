//! Exclusion limits on the axion-photon coupling from a grand spectrum and a calibration.
//!
//! Method: where no candidate survives, a coupling g is excluded at confidence c when a
//! signal of that coupling would have exceeded the threshold Theta with probability c. A
//! signal of the reference coupling g_ref appears in the grand spectrum with mean
//! eta / sigma_eff, sigma_eff = sigma_A s (s the predicted null spread that makes the grand
//! spectrum unit), and its power scales as g^2, so
//!     g_lim = |g_ref| sqrt((Theta + z_c) sigma_eff / eta),
//! z_c the one-sided normal quantile of c (95%: Theta + z_c = 5 for Theta = 3.355).
//!
//! Coupling convention (one, used everywhere): the dimensionless g_gamma of the signal-power
//! formula, and g_agg = alpha g_gamma m_a / (pi Lambda^2) with Lambda = 77.6 MeV
//! ([`crate::physics::units::g_agg_from_g_gamma_per_gev`]); KSVZ is g_gamma = -0.97, DFSZ
//! +0.36. The mass is m_a = h nu / e (CODATA 2018).

pub mod forecast;
mod plot;

pub use plot::{ExclusionColumns, exclusion_plot};

use crate::physics::constants::{G_GAMMA_DFSZ, G_GAMMA_KSVZ};
use crate::physics::units::{g_agg_from_g_gamma_per_gev, mass_uev_from_freq_hz};
use crate::stage::Spectrum;
use statrs::distribution::{ContinuousCDF, Normal};

/// Default confidence of the limits.
pub const DEFAULT_CONFIDENCE: f64 = 0.95;

/// What the limits assume (written into every output that carries them).
#[derive(Debug, Clone, serde::Serialize)]
pub struct LimitAssumptions {
    /// Confidence level c.
    pub confidence: f64,
    /// Threshold Theta of the flag stage.
    pub threshold: f64,
    /// z_c.
    pub z_c: f64,
    /// Signal attenuation eta from the calibration.
    pub eta: f64,
    /// |g_gamma| of the reference coupling the spectrum is expressed in.
    pub reference_g_gamma: f64,
    /// Dark-matter density, GeV/cm^3.
    pub dm_density_gev_per_cm3: f64,
    /// The halo model of the filter, as written in the pipeline.
    pub lineshape: String,
    /// The coupling convention.
    pub convention: &'static str,
}

/// The limit in one grand-spectrum bin.
#[derive(Debug, Clone, Copy, PartialEq, serde::Serialize)]
pub struct BinLimit {
    /// Axion frequency (line start, the bin's lower edge), Hz.
    pub freq_hz: f64,
    /// Axion mass, micro-eV.
    pub mass_uev: f64,
    /// Upper limit on |g_gamma| (NaN where the bin is not excluded or not covered).
    /// Excluded: couplings above it.
    pub g_gamma: f64,
    /// Upper limit on |g_agg|, GeV^-1.
    pub g_agg_per_gev: f64,
    /// g_gamma limit / |g_gamma KSVZ|.
    pub rel_ksvz: f64,
    /// g_gamma limit / g_gamma DFSZ.
    pub rel_dfsz: f64,
    /// False where a candidate not cleared by rescans sits, or where there is no data.
    pub excluded: bool,
}

/// Per-bin limits of a reduction.
#[derive(Debug, Clone)]
pub struct Limits {
    /// The assumptions.
    pub assumptions: LimitAssumptions,
    /// One entry per grand-spectrum bin.
    pub bins: Vec<BinLimit>,
}

/// z_c, the one-sided normal quantile of confidence `c`.
pub fn z_quantile(c: f64) -> f64 {
    Normal::standard().inverse_cdf(c)
}

/// g_gamma limit for one bin: |g_ref| sqrt((Theta + z_c) sigma_eff / eta).
pub fn g_gamma_limit(reference_g_gamma: f64, threshold: f64, z_c: f64, sigma_eff: f64, eta: f64) -> f64 {
    reference_g_gamma.abs() * ((threshold + z_c) * sigma_eff / eta).sqrt()
}

/// What the limits of a pipeline and calibration assume, except the threshold (which the
/// reduction's flag stage sets): made before a reduction, completed by
/// [`LimitBasis::at_threshold`].
#[derive(Debug, Clone)]
pub struct LimitBasis {
    confidence: f64,
    eta: f64,
    reference_g_gamma: f64,
    dm_density_gev_per_cm3: f64,
    lineshape: String,
}

impl LimitBasis {
    /// The basis of limits at `confidence` from `plan` and its calibration `cal`.
    pub fn new(plan: &crate::config::Plan, cal: &crate::calib::Calibration, confidence: f64) -> Result<Self, String> {
        let info = crate::calib::PlanInfo::from_plan(plan)?;
        Ok(Self {
            confidence,
            eta: cal.attenuation.eta,
            reference_g_gamma: info.reference_g_gamma.abs(),
            dm_density_gev_per_cm3: info.dm_density_gev_per_cm3,
            lineshape: format!("{:?}", info.halo),
        })
    }

    /// The assumptions with the flag stage's `threshold` (None: the plan has no flag stage).
    pub fn at_threshold(&self, threshold: Option<f64>) -> Result<LimitAssumptions, String> {
        let threshold = threshold.ok_or("the plan has no flag stage")?;
        Ok(LimitAssumptions {
            confidence: self.confidence,
            threshold,
            z_c: z_quantile(self.confidence),
            eta: self.eta,
            reference_g_gamma: self.reference_g_gamma,
            dm_density_gev_per_cm3: self.dm_density_gev_per_cm3,
            lineshape: self.lineshape.clone(),
            convention: "g_agg = alpha g_gamma m_a / (pi Lambda^2), Lambda = 77.6 MeV; m_a = h nu / e (CODATA 2018)",
        })
    }
}

/// The limits of a reduction with its calibration, at confidence `confidence`, with every
/// candidate still standing (not yet cleared by a rescan).
pub fn for_reduction(plan: &crate::config::Plan, spectrum: &Spectrum, cal: &crate::calib::Calibration, confidence: f64) -> Result<Limits, String> {
    let assumptions = LimitBasis::new(plan, cal, confidence)?.at_threshold(spectrum.threshold)?;
    let all: Vec<usize> = (0..spectrum.candidates.len()).collect();
    Ok(limits(spectrum, assumptions, &all))
}

impl LimitAssumptions {
    /// The g_gamma limit of a covered bin that no candidate blocks, whose `sigma_eff` =
    /// sigma_A * predicted spread ([`g_gamma_limit`] with these assumptions).
    pub fn g_gamma_at(&self, sigma_eff: f64) -> f64 {
        g_gamma_limit(self.reference_g_gamma, self.threshold, self.z_c, sigma_eff, self.eta)
    }
}

/// The limit of one grand-spectrum bin: the line starting at `freq_hz` (the bin's lower
/// edge), `sigma_eff` = sigma_A * predicted spread and the `grand` value there; `blocked`
/// where a candidate not cleared by rescans sits. The one per-bin formula of every limit
/// output.
pub fn bin_limit(a: &LimitAssumptions, freq_hz: f64, sigma_eff: f64, grand: f64, blocked: bool) -> BinLimit {
    let mass = mass_uev_from_freq_hz(freq_hz);
    let covered = sigma_eff.is_finite() && grand.is_finite();
    let excluded = covered && !blocked;
    let g = if excluded { a.g_gamma_at(sigma_eff) } else { f64::NAN };
    BinLimit {
        freq_hz,
        mass_uev: mass,
        g_gamma: g,
        g_agg_per_gev: g_agg_from_g_gamma_per_gev(g, mass),
        rel_ksvz: g / G_GAMMA_KSVZ.abs(),
        rel_dfsz: g / G_GAMMA_DFSZ.abs(),
        excluded,
    }
}

/// Line-start frequency of grid bin `j` (its lower edge), Hz, for bin centres at
/// `origin_hz + j * bin_width_hz`.
pub fn line_start_hz(origin_hz: f64, bin_width_hz: f64, j: usize) -> f64 {
    origin_hz + j as f64 * bin_width_hz - bin_width_hz / 2.0
}

/// Computes the limits of every bin. Bins inside a candidate in `not_cleared` (by index into
/// `spectrum.candidates`) are marked not excluded.
pub fn limits(spectrum: &Spectrum, assumptions: LimitAssumptions, not_cleared: &[usize]) -> Limits {
    let mut blocked = vec![false; spectrum.grand.len()];
    for &c in not_cleared {
        let cand = &spectrum.candidates[c];
        blocked[cand.first_bin..=cand.last_bin].fill(true);
    }
    let a = &assumptions;
    let bins = (0..spectrum.grand.len())
        .map(|j| {
            let freq_hz = line_start_hz(spectrum.rf_start_hz, spectrum.bin_width_hz, j);
            bin_limit(a, freq_hz, spectrum.sigma_a[j] * spectrum.predicted_spread[j], spectrum.grand[j], blocked[j])
        })
        .collect();
    Limits { assumptions, bins }
}

/// Bins per task of [`single_night_limits`].
const LIMIT_PIECE_BINS: usize = 8192;

/// The limits of consecutive grid bins `first_bin ..` of a single night's reduction, as
/// [`for_reduction`] gives them, from the bins' own values: there every candidate is a run
/// of bins above the threshold and every candidate is blocked, so a bin is blocked exactly
/// when its grand-spectrum value is above `a.threshold`. Bin centres at `origin_hz + j *
/// bin_width_hz`; `sigma_a`, `predicted_spread` and `grand` of equal length. Computed in
/// parallel pieces, each bin on its own, so the result does not depend on the thread count.
pub fn single_night_limits(
    a: &LimitAssumptions,
    origin_hz: f64,
    bin_width_hz: f64,
    first_bin: usize,
    sigma_a: &[f64],
    predicted_spread: &[f64],
    grand: &[f64],
) -> Vec<BinLimit> {
    use rayon::prelude::*;
    let n = grand.len().min(sigma_a.len()).min(predicted_spread.len());
    let mut out = Vec::with_capacity(n);
    (0..n)
        .into_par_iter()
        .with_min_len(LIMIT_PIECE_BINS)
        .map(|i| {
            let freq_hz = line_start_hz(origin_hz, bin_width_hz, first_bin + i);
            bin_limit(a, freq_hz, sigma_a[i] * predicted_spread[i], grand[i], grand[i] > a.threshold)
        })
        .collect_into_vec(&mut out);
    out
}

/// A coarse summary row over a block of frequency.
#[derive(Debug, Clone, serde::Serialize)]
pub struct LimitBlock {
    /// Lower and upper edge of the block, Hz.
    pub start_hz: f64,
    pub stop_hz: f64,
    /// Fraction of its bins excluded.
    pub excluded_fraction: f64,
    /// Median and best (lowest) limit relative to KSVZ over the excluded bins (NaN if none).
    pub median_rel_ksvz: f64,
    pub best_rel_ksvz: f64,
    /// Median |g_agg| limit, GeV^-1.
    pub median_g_agg_per_gev: f64,
}

/// The coarse block summary ([`LimitBlock`]) of bins given in grid order, in as many calls
/// as convenient: the block open at the end of one run of bins is continued by the next.
/// Holds the excluded values of the open block only.
#[derive(Debug, Clone)]
pub struct BlockSummariser {
    block_hz: f64,
    /// Lower edge of the open block, Hz (None before the first bin).
    start_hz: Option<f64>,
    /// Bins of the open block.
    n_bins: usize,
    /// Limits relative to KSVZ and |g_agg| limits of the open block's excluded bins.
    rel: Vec<f64>,
    gagg: Vec<f64>,
}

impl BlockSummariser {
    /// A summary in consecutive blocks of `block_hz`, the first starting at the first bin.
    pub fn new(block_hz: f64) -> Self {
        Self { block_hz, start_hz: None, n_bins: 0, rel: Vec::new(), gagg: Vec::new() }
    }

    /// Takes in the next bins; appends the rows of the blocks they complete to `out`.
    pub fn add(&mut self, bins: &[BinLimit], out: &mut Vec<LimitBlock>) {
        for b in bins {
            let start = *self.start_hz.get_or_insert(b.freq_hz);
            if b.freq_hz >= start + self.block_hz {
                self.flush(start, out);
                self.start_hz = Some(start + ((b.freq_hz - start) / self.block_hz).floor() * self.block_hz);
            }
            self.n_bins += 1;
            if b.excluded {
                self.rel.push(b.rel_ksvz);
                self.gagg.push(b.g_agg_per_gev.abs());
            }
        }
    }

    /// Appends the row of the last, open block (if it holds a bin) to `out`.
    pub fn finish(mut self, out: &mut Vec<LimitBlock>) {
        if let Some(start) = self.start_hz {
            self.flush(start, out);
        }
    }

    fn flush(&mut self, start: f64, out: &mut Vec<LimitBlock>) {
        if self.n_bins == 0 {
            return;
        }
        // The element of index len / 2 in ascending `total_cmp` order (the upper median), by
        // selection: values equal in that order have the same bits, so it is the element a
        // sort puts there.
        let median = |v: &mut [f64]| {
            let half = v.len() / 2;
            if v.is_empty() { f64::NAN } else { *v.select_nth_unstable_by(half, f64::total_cmp).1 }
        };
        let best = self.rel.iter().copied().min_by(f64::total_cmp).unwrap_or(f64::NAN);
        out.push(LimitBlock {
            start_hz: start,
            stop_hz: start + self.block_hz,
            excluded_fraction: self.rel.len() as f64 / self.n_bins as f64,
            median_rel_ksvz: median(&mut self.rel),
            best_rel_ksvz: best,
            median_g_agg_per_gev: median(&mut self.gagg),
        });
        self.n_bins = 0;
        self.rel.clear();
        self.gagg.clear();
    }
}

impl Limits {
    /// Summarises the limits in consecutive blocks of `block_hz`.
    pub fn blocks(&self, block_hz: f64) -> Vec<LimitBlock> {
        let mut out = Vec::new();
        let mut summary = BlockSummariser::new(block_hz);
        summary.add(&self.bins, &mut out);
        summary.finish(&mut out);
        out
    }
}

/// Header of `limits.csv`, one row per bin ([`BinLimit::csv_row`]).
pub const BIN_CSV_HEADER: [&str; 7] = ["freq_hz", "mass_uev", "excluded", "g_gamma_limit", "g_agg_limit_per_gev", "limit_rel_ksvz", "limit_rel_dfsz"];

/// Header of `limit_blocks.csv`, one row per coarse block ([`LimitBlock::csv_row`]).
pub const BLOCK_CSV_HEADER: [&str; 6] =
    ["start_hz", "stop_hz", "excluded_fraction", "median_limit_rel_ksvz", "best_limit_rel_ksvz", "median_g_agg_limit_per_gev"];

impl BinLimit {
    /// The bin's row of `limits.csv`.
    pub fn csv_row(&self) -> [String; 7] {
        [
            format!("{:.3}", self.freq_hz),
            format!("{:.9}", self.mass_uev),
            self.excluded.to_string(),
            format!("{:.5e}", self.g_gamma),
            format!("{:.5e}", self.g_agg_per_gev.abs()),
            format!("{:.5}", self.rel_ksvz),
            format!("{:.5}", self.rel_dfsz),
        ]
    }
}

impl LimitBlock {
    /// The block's row of `limit_blocks.csv`.
    pub fn csv_row(&self) -> [String; 6] {
        [
            format!("{:.1}", self.start_hz),
            format!("{:.1}", self.stop_hz),
            format!("{:.4}", self.excluded_fraction),
            format!("{:.4}", self.median_rel_ksvz),
            format!("{:.4}", self.best_rel_ksvz),
            format!("{:.4e}", self.median_g_agg_per_gev),
        ]
    }
}

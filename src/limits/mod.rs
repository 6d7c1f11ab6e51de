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

pub use plot::exclusion_plot;

use crate::physics::constants::{G_GAMMA_DFSZ, G_GAMMA_KSVZ};
use crate::physics::units::{g_agg_from_g_gamma_per_gev, mass_uev_from_freq_hz};
use crate::stage::Spectrum;
use statrs::distribution::{ContinuousCDF, Normal};
use std::path::Path;

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

/// The limits of a reduction with its calibration, at confidence `confidence`, with every
/// candidate still standing (not yet cleared by a rescan).
pub fn for_reduction(plan: &crate::config::Plan, spectrum: &Spectrum, cal: &crate::calib::Calibration, confidence: f64) -> Result<Limits, String> {
    let info = crate::calib::PlanInfo::from_plan(plan)?;
    let threshold = spectrum.threshold.ok_or("the plan has no flag stage")?;
    let assumptions = LimitAssumptions {
        confidence,
        threshold,
        z_c: z_quantile(confidence),
        eta: cal.attenuation.eta,
        reference_g_gamma: info.reference_g_gamma.abs(),
        dm_density_gev_per_cm3: info.dm_density_gev_per_cm3,
        lineshape: format!("{:?}", info.halo),
        convention: "g_agg = alpha g_gamma m_a / (pi Lambda^2), Lambda = 77.6 MeV; m_a = h nu / e (CODATA 2018)",
    };
    let all: Vec<usize> = (0..spectrum.candidates.len()).collect();
    Ok(limits(spectrum, assumptions, &all))
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
            let freq_hz = spectrum.freq_hz(j) - spectrum.bin_width_hz / 2.0;
            let mass = mass_uev_from_freq_hz(freq_hz);
            let sigma_eff = spectrum.sigma_a[j] * spectrum.predicted_spread[j];
            let covered = sigma_eff.is_finite() && spectrum.grand[j].is_finite();
            let excluded = covered && !blocked[j];
            let g = if excluded { g_gamma_limit(a.reference_g_gamma, a.threshold, a.z_c, sigma_eff, a.eta) } else { f64::NAN };
            BinLimit {
                freq_hz,
                mass_uev: mass,
                g_gamma: g,
                g_agg_per_gev: g_agg_from_g_gamma_per_gev(g, mass),
                rel_ksvz: g / G_GAMMA_KSVZ.abs(),
                rel_dfsz: g / G_GAMMA_DFSZ.abs(),
                excluded,
            }
        })
        .collect();
    Limits { assumptions, bins }
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

impl Limits {
    /// Summarises the limits in consecutive blocks of `block_hz`.
    pub fn blocks(&self, block_hz: f64) -> Vec<LimitBlock> {
        let Some(first) = self.bins.first() else { return Vec::new() };
        let mut out: Vec<LimitBlock> = Vec::new();
        let mut current: Vec<&BinLimit> = Vec::new();
        let mut block_start = first.freq_hz;
        let flush = |bins: &[&BinLimit], start: f64, out: &mut Vec<LimitBlock>| {
            if bins.is_empty() {
                return;
            }
            let mut rel: Vec<f64> = bins.iter().filter(|b| b.excluded).map(|b| b.rel_ksvz).collect();
            let mut gagg: Vec<f64> = bins.iter().filter(|b| b.excluded).map(|b| b.g_agg_per_gev.abs()).collect();
            rel.sort_by(f64::total_cmp);
            gagg.sort_by(f64::total_cmp);
            let median = |v: &[f64]| v.get(v.len() / 2).copied().unwrap_or(f64::NAN);
            out.push(LimitBlock {
                start_hz: start,
                stop_hz: start + block_hz,
                excluded_fraction: rel.len() as f64 / bins.len() as f64,
                median_rel_ksvz: median(&rel),
                best_rel_ksvz: rel.first().copied().unwrap_or(f64::NAN),
                median_g_agg_per_gev: median(&gagg),
            });
        };
        for b in &self.bins {
            if b.freq_hz >= block_start + block_hz {
                flush(&current, block_start, &mut out);
                current.clear();
                block_start += ((b.freq_hz - block_start) / block_hz).floor() * block_hz;
            }
            current.push(b);
        }
        flush(&current, block_start, &mut out);
        out
    }

    /// Writes the per-bin table to `limits_csv` and the block summary (blocks of `block_hz`)
    /// to `blocks_csv`.
    pub fn write_tables(&self, limits_csv: &Path, blocks_csv: &Path, block_hz: f64) -> anyhow::Result<()> {
        let mut w = csv::Writer::from_path(limits_csv)?;
        w.write_record(["freq_hz", "mass_uev", "excluded", "g_gamma_limit", "g_agg_limit_per_gev", "limit_rel_ksvz", "limit_rel_dfsz"])?;
        for b in &self.bins {
            w.write_record([
                format!("{:.3}", b.freq_hz),
                format!("{:.9}", b.mass_uev),
                b.excluded.to_string(),
                format!("{:.5e}", b.g_gamma),
                format!("{:.5e}", b.g_agg_per_gev.abs()),
                format!("{:.5}", b.rel_ksvz),
                format!("{:.5}", b.rel_dfsz),
            ])?;
        }
        w.flush()?;
        let mut w = csv::Writer::from_path(blocks_csv)?;
        w.write_record(["start_hz", "stop_hz", "excluded_fraction", "median_limit_rel_ksvz", "best_limit_rel_ksvz", "median_g_agg_limit_per_gev"])?;
        for b in self.blocks(block_hz) {
            w.write_record([
                format!("{:.1}", b.start_hz),
                format!("{:.1}", b.stop_hz),
                format!("{:.4}", b.excluded_fraction),
                format!("{:.4}", b.median_rel_ksvz),
                format!("{:.4}", b.best_rel_ksvz),
                format!("{:.4e}", b.median_g_agg_per_gev),
            ])?;
        }
        w.flush()?;
        Ok(())
    }
}

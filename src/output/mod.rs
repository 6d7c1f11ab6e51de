//! Writing a reduction's outputs: results HDF5, candidates CSV, summary JSON and a plot.
//!
//! Every file is written under a temporary name in the output folder and renamed into
//! place only after all of them were written, so a failed run never replaces good results.

pub mod console;
mod plot;

use crate::calib::Calibration;
use crate::limits::Limits;
use crate::pipeline::Reduction;
use crate::stats::mean_std;
use hdf5::types::VarLenUnicode;
use sha2::{Digest, Sha256};
use std::path::{Path, PathBuf};
use std::str::FromStr;

/// Width of the blocks of the coarse limit summary, Hz.
pub const LIMIT_BLOCK_HZ: f64 = 1e6;

/// Outputs written only by a calibrated reduction (earlier ones are removed by an uncalibrated one).
const LIMIT_OUTPUTS: [&str; 4] = ["limits.csv", "limit_blocks.csv", "exclusion.png", "exclusion.svg"];

/// Provenance written into every output.
#[derive(Debug, Clone, serde::Serialize)]
pub struct Provenance {
    /// axsift version.
    pub tool_version: String,
    /// SHA-256 of the pipeline file's text.
    pub config_sha256: String,
    /// Input run files with their SHA-256.
    pub inputs: Vec<(String, String)>,
}

impl Provenance {
    /// Hashes the config text and the input files.
    pub fn new(config_text: &str, inputs: &[PathBuf]) -> std::io::Result<Self> {
        let inputs = inputs
            .iter()
            .map(|p| {
                // Streamed through the hasher: a run file may be larger than the memory the
                // reduction itself needs.
                let mut hasher = Sha256::new();
                std::io::copy(&mut std::io::BufReader::with_capacity(1 << 20, std::fs::File::open(p)?), &mut hasher)?;
                Ok((p.display().to_string(), hex(&hasher.finalize())))
            })
            .collect::<std::io::Result<_>>()?;
        Ok(Self::of_hashed(config_text, inputs))
    }

    /// The provenance of input files hashed already (path as given and SHA-256 in hex, as
    /// [`Provenance::new`] makes them); hashes only the config text.
    pub fn of_hashed(config_text: &str, inputs: Vec<(String, String)>) -> Self {
        Self { tool_version: env!("CARGO_PKG_VERSION").into(), config_sha256: hex(&Sha256::digest(config_text)), inputs }
    }
}

fn hex(bytes: &[u8]) -> String {
    bytes.iter().map(|b| format!("{b:02x}")).collect()
}

/// The `summary.json` content.
#[derive(Debug, serde::Serialize)]
pub struct Summary<'a> {
    pub n_steps_in: usize,
    pub n_steps_used: usize,
    pub n_rf_bins: usize,
    /// Bins holding a finite grand-spectrum value.
    pub n_valid_bins: usize,
    pub rf_start_hz: f64,
    pub rf_stop_hz: f64,
    pub grand_mean: f64,
    pub grand_std: f64,
    pub predicted_raw_spread: f64,
    pub measured_raw_spread: f64,
    pub threshold: f64,
    /// Grand-spectrum bins above the threshold.
    pub n_bins_above_threshold: usize,
    /// Bins above the threshold expected from noise alone, n_valid_bins * (1 - Phi(threshold)).
    pub expected_null_bins_above: f64,
    pub n_candidates: usize,
    pub candidates: &'a [crate::stage::Candidate],
    pub cuts: &'a [crate::pipeline::CutStep],
    /// Bins without data in the steps read, by cause (masked, non-finite, non-positive; bins
    /// and steps), and the files holding unmasked ones with their worst steps.
    pub no_data: &'a crate::stage::no_data::NoDataTally,
    pub provenance: &'a Provenance,
    /// The calibration applied, if `reduce` was given one.
    pub calibration: Option<CalibrationUse>,
    /// The range of the limits (with a calibration only).
    pub limits: Option<LimitRange>,
}

/// The span of a reduction's limits.
#[derive(Debug, Clone, serde::Serialize)]
pub struct LimitRange {
    /// Confidence level.
    pub confidence: f64,
    /// Fraction of the grand-spectrum bins excluded.
    pub excluded_fraction: f64,
    /// Best, median and worst limit relative to KSVZ over the excluded bins.
    pub best_rel_ksvz: f64,
    pub median_rel_ksvz: f64,
    pub worst_rel_ksvz: f64,
    /// The assumptions behind them.
    pub assumptions: crate::limits::LimitAssumptions,
}

impl LimitRange {
    /// Summarises the limits.
    pub fn from(l: &Limits) -> Self {
        let mut rel: Vec<f64> = l.bins.iter().filter(|b| b.excluded).map(|b| b.rel_ksvz).collect();
        rel.sort_by(f64::total_cmp);
        let at = |q: f64| if rel.is_empty() { f64::NAN } else { rel[((rel.len() - 1) as f64 * q) as usize] };
        Self {
            confidence: l.assumptions.confidence,
            excluded_fraction: rel.len() as f64 / l.bins.len().max(1) as f64,
            best_rel_ksvz: at(0.0),
            median_rel_ksvz: at(0.5),
            worst_rel_ksvz: at(1.0),
            assumptions: l.assumptions.clone(),
        }
    }
}

/// What a calibration contributes to a reduction's summary.
#[derive(Debug, Clone, serde::Serialize)]
pub struct CalibrationUse {
    /// Signal attenuation eta applied to implied couplings.
    pub eta: f64,
    /// Its standard error.
    pub eta_standard_error: f64,
    /// Null spread of the grand spectrum measured by the calibration.
    pub null_spread: f64,
    /// Measured detection efficiency at the injected SNR closest to 5.
    pub efficiency_near_snr5: Option<(f64, f64)>,
}

impl CalibrationUse {
    /// Extracts the figures a reduction reports.
    pub fn from(cal: &Calibration) -> Self {
        let near5 = cal.efficiency.iter().min_by(|a, b| (a.snr - 5.0).abs().total_cmp(&(b.snr - 5.0).abs())).map(|p| (p.snr, p.efficiency));
        Self { eta: cal.attenuation.eta, eta_standard_error: cal.attenuation.standard_error, null_spread: cal.null.std, efficiency_near_snr5: near5 }
    }
}

/// Per-candidate figures that need eta: (implied |g|/g_ref, SNR a reference axion has there).
pub fn implied_coupling(sp: &crate::stage::Spectrum, c: &crate::stage::Candidate, eta: f64) -> (f64, f64) {
    let j = c.peak_bin;
    let rel = (sp.amplitude[j].max(0.0) / eta).sqrt();
    (rel, eta / (sp.sigma_a[j] * sp.predicted_spread[j]))
}

impl Reduction {
    /// Builds the summary of this reduction.
    pub fn summary<'a>(&'a self, provenance: &'a Provenance, calibration: Option<&Calibration>, limits: Option<&Limits>) -> Summary<'a> {
        let sp = &self.spectrum;
        let (grand_mean, grand_std) = mean_std(&sp.grand);
        let raw: Vec<f64> = sp.amplitude.iter().zip(&sp.sigma_a).map(|(a, s)| a / s).collect();
        let (_, measured_raw_spread) = mean_std(&raw);
        let (predicted_raw_spread, _) = mean_std(&sp.predicted_spread);
        let threshold = sp.threshold.unwrap_or(f64::NAN);
        let n_valid_bins = sp.grand.iter().filter(|v| v.is_finite()).count();
        let tail = 1.0 - statrs::distribution::ContinuousCDF::cdf(&statrs::distribution::Normal::standard(), threshold);
        Summary {
            n_steps_in: self.n_steps_in,
            n_steps_used: self.used_steps.len(),
            n_rf_bins: sp.grand.len(),
            rf_start_hz: sp.rf_start_hz,
            rf_stop_hz: sp.freq_hz(sp.grand.len().saturating_sub(1)),
            n_valid_bins,
            grand_mean,
            grand_std,
            predicted_raw_spread,
            measured_raw_spread,
            threshold,
            n_bins_above_threshold: sp.grand.iter().filter(|&&v| v > threshold).count(),
            expected_null_bins_above: n_valid_bins as f64 * tail,
            n_candidates: sp.candidates.len(),
            candidates: &sp.candidates,
            cuts: &self.cuts,
            no_data: &self.no_data,
            provenance,
            calibration: calibration.map(CalibrationUse::from),
            limits: limits.map(LimitRange::from),
        }
    }

    /// Writes all outputs into `dir` (created if needed). Returns the written paths.
    pub fn write(&self, dir: &Path, config_text: &str, provenance: &Provenance, calibrated: Option<(&Calibration, &Limits)>) -> anyhow::Result<Vec<PathBuf>> {
        use anyhow::Context;
        std::fs::create_dir_all(dir).with_context(|| format!("cannot create output folder {}", dir.display()))?;
        let mut names = vec!["results.h5", "candidates.csv", "summary.json", "grand_spectrum.png", "grand_spectrum.svg"];
        // Temporary names keep the extension: the image encoder picks its format from it.
        let tmp = |n: &str| dir.join(format!(".tmp.{n}"));
        let calibration = calibrated.map(|c| c.0);
        let limits = calibrated.map(|c| c.1);
        // Tables and plots are drawn side by side (the plots make no HDF5 call).
        let (tables, plots) = rayon::join(
            || -> anyhow::Result<()> {
                self.write_hdf5(&tmp(names[0]), config_text, provenance, limits).context("writing results.h5")?;
                self.write_csv(&tmp(names[1]), calibration).context("writing candidates.csv")?;
                std::fs::write(tmp(names[2]), serde_json::to_string_pretty(&self.summary(provenance, calibration, limits))?).context("writing summary.json")?;
                if let Some(limits) = limits {
                    limits.write_tables(&tmp(LIMIT_OUTPUTS[0]), &tmp(LIMIT_OUTPUTS[1]), LIMIT_BLOCK_HZ).context("writing the limit tables")?;
                }
                Ok(())
            },
            || -> anyhow::Result<()> {
                plot::grand_spectrum(&self.spectrum, &tmp(names[3]), &tmp(names[4])).context("drawing the grand spectrum")?;
                if let Some(limits) = limits {
                    let points: Vec<(f64, f64)> = limits.bins.iter().map(|b| (b.mass_uev, b.g_agg_per_gev)).collect();
                    let title = format!("Exclusion at {:.0}% confidence (eta = {:.3})", 100.0 * limits.assumptions.confidence, limits.assumptions.eta);
                    crate::limits::exclusion_plot(&points, &title, &tmp(LIMIT_OUTPUTS[2]), &tmp(LIMIT_OUTPUTS[3])).context("drawing the exclusion plot")?;
                }
                Ok(())
            },
        );
        let staged = tables.and(plots);
        if limits.is_some() {
            names.extend(LIMIT_OUTPUTS);
        }
        if let Err(e) = staged {
            // Earlier results stay as they were; the partial temporary files go.
            for n in names.iter().chain(LIMIT_OUTPUTS.iter()) {
                let _ = std::fs::remove_file(tmp(n));
            }
            return Err(e);
        }
        let written = names
            .iter()
            .map(|n| {
                let to = dir.join(n);
                std::fs::rename(tmp(n), &to).with_context(|| format!("renaming into {}", to.display()))?;
                Ok(to)
            })
            .collect::<anyhow::Result<Vec<PathBuf>>>()?;
        if limits.is_none() {
            // Limits of an earlier, calibrated reduction would not describe this one.
            for n in LIMIT_OUTPUTS {
                let stale = dir.join(n);
                if stale.exists() {
                    std::fs::remove_file(&stale).with_context(|| format!("removing the earlier {}", stale.display()))?;
                    tracing::info!("removed {} of an earlier reduction: this one has no calibration, hence no limits", stale.display());
                }
            }
        }
        Ok(written)
    }

    /// One row per candidate; with a calibration also the implied coupling |g|/g_ref and the
    /// SNR a reference axion has at that frequency (both use eta).
    fn write_csv(&self, path: &Path, calibration: Option<&Calibration>) -> anyhow::Result<()> {
        let mut w = csv::Writer::from_path(path)?;
        let mut header = vec!["frequency_hz", "significance", "first_bin", "last_bin", "revisit_cavity_hz", "n_covering_steps"];
        if calibration.is_some() {
            header.extend(["implied_coupling_rel_ref", "reference_axion_snr"]);
        }
        w.write_record(&header)?;
        for c in &self.spectrum.candidates {
            let mut row = vec![
                format!("{:.3}", c.frequency_hz),
                format!("{:.4}", c.significance),
                c.first_bin.to_string(),
                c.last_bin.to_string(),
                format!("{:.3}", c.revisit_cavity_hz),
                c.covering_steps.len().to_string(),
            ];
            if let Some(cal) = calibration {
                let (rel, snr) = implied_coupling(&self.spectrum, c, cal.attenuation.eta);
                row.extend([format!("{rel:.4}"), format!("{snr:.3}")]);
            }
            w.write_record(&row)?;
        }
        w.flush()?;
        Ok(())
    }

    fn write_hdf5(&self, path: &Path, config_text: &str, provenance: &Provenance, limits: Option<&Limits>) -> anyhow::Result<()> {
        let sp = &self.spectrum;
        let file = hdf5::File::create(path)?;
        let text = |s: &str| VarLenUnicode::from_str(s).unwrap_or_default();
        let freq: Vec<f64> = (0..sp.grand.len()).map(|j| sp.freq_hz(j)).collect();
        let datasets: [(&str, &[f64], &str, &str); 7] = [
            ("rf_freq_hz", &freq, "Hz", "bin-centre RF frequency"),
            ("combined", &sp.combined, "reference-axion power", "maximum-likelihood combined excess power"),
            ("combined_sigma", &sp.combined_sigma, "reference-axion power", "standard deviation of combined"),
            ("amplitude", &sp.amplitude, "reference-axion power", "filtered amplitude A for a line starting at the bin's lower edge"),
            ("sigma_a", &sp.sigma_a, "reference-axion power", "standard deviation of the filtered amplitude"),
            ("predicted_spread", &sp.predicted_spread, "1", "predicted null spread of A/sigma_A"),
            ("grand", &sp.grand, "1", "grand spectrum A / (sigma_A * predicted spread)"),
        ];
        for (name, data, units, description) in datasets {
            let ds = file.new_dataset_builder().with_data(data).create(name)?;
            ds.new_attr::<VarLenUnicode>().create("units")?.write_scalar(&text(units))?;
            ds.new_attr::<VarLenUnicode>().create("description")?.write_scalar(&text(description))?;
        }
        if let Some(l) = limits {
            let column = |f: fn(&crate::limits::BinLimit) -> f64| l.bins.iter().map(f).collect::<Vec<f64>>();
            let limit_sets: [(&str, Vec<f64>, &str, &str); 5] = [
                ("mass_uev", column(|b| b.mass_uev), "ueV", "axion mass of the line starting at the bin's lower edge"),
                ("limit_g_gamma", column(|b| b.g_gamma), "1", "upper limit on |g_gamma| (NaN: not excluded)"),
                ("limit_g_agg_per_gev", column(|b| b.g_agg_per_gev.abs()), "GeV^-1", "upper limit on |g_agg| (NaN: not excluded)"),
                ("limit_rel_ksvz", column(|b| b.rel_ksvz), "1", "limit on |g_gamma| relative to KSVZ"),
                ("limit_rel_dfsz", column(|b| b.rel_dfsz), "1", "limit on |g_gamma| relative to DFSZ"),
            ];
            for (name, data, units, description) in limit_sets {
                let ds = file.new_dataset_builder().with_data(&data).create(name)?;
                ds.new_attr::<VarLenUnicode>().create("units")?.write_scalar(&text(units))?;
                ds.new_attr::<VarLenUnicode>().create("description")?.write_scalar(&text(description))?;
            }
            let assumptions = serde_json::to_string(&l.assumptions)?;
            file.new_attr::<VarLenUnicode>().create("limit_assumptions")?.write_scalar(&text(&assumptions))?;
        }
        let cand_f: Vec<f64> = sp.candidates.iter().map(|c| c.frequency_hz).collect();
        let cand_s: Vec<f64> = sp.candidates.iter().map(|c| c.significance).collect();
        let g = file.create_group("candidates")?;
        for (name, data, units, description) in [
            ("frequency_hz", &cand_f, "Hz", "axion frequency hypothesis (line start) of each candidate's most significant bin"),
            ("significance", &cand_s, "1", "grand-spectrum value of each candidate's most significant bin"),
        ] {
            let ds = g.new_dataset_builder().with_data(data).create(name)?;
            ds.new_attr::<VarLenUnicode>().create("units")?.write_scalar(&text(units))?;
            ds.new_attr::<VarLenUnicode>().create("description")?.write_scalar(&text(description))?;
        }
        file.new_attr::<VarLenUnicode>().create("tool_version")?.write_scalar(&text(&provenance.tool_version))?;
        file.new_attr::<VarLenUnicode>().create("config_sha256")?.write_scalar(&text(&provenance.config_sha256))?;
        file.new_attr::<VarLenUnicode>().create("config_text")?.write_scalar(&text(config_text))?;
        let inputs = serde_json::to_string(&provenance.inputs)?;
        file.new_attr::<VarLenUnicode>().create("inputs")?.write_scalar(&text(&inputs))?;
        file.close()?;
        Ok(())
    }
}

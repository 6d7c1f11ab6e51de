//! Writing a reduction's outputs: results HDF5, candidates CSV, summary JSON and a plot.
//!
//! Every file is written under a temporary name in the output folder and renamed into
//! place only after all of them were written, so a failed run never replaces good results.

mod bins;
pub mod console;
mod plot;
mod results_file;
mod stats;

use crate::calib::Calibration;
use crate::limits::Limits;
use crate::pipeline::Reduction;
use crate::stage::Candidate;
use sha2::{Digest, Sha256};
use std::path::{Path, PathBuf};

pub use bins::Bins;
pub use plot::Columns;
pub use results_file::{CHUNK_BINS, ResultBlock, ResultsFile};
pub use stats::{GrandStats, Moments};

/// Candidates listed in `summary.json`: the strongest, by significance (all of them are in
/// `candidates.csv` and `results.h5`).
pub const SUMMARY_CANDIDATES: usize = 100;

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
    /// The [`SUMMARY_CANDIDATES`] most significant candidates, strongest first.
    pub candidates: Vec<&'a Candidate>,
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
    /// Builds the summary of this reduction from its in-memory spectrum.
    pub fn summary<'a>(&'a self, provenance: &'a Provenance, calibration: Option<&Calibration>, limits: Option<&Limits>) -> Summary<'a> {
        self.summary_with(&GrandStats::of_spectrum(&self.spectrum), provenance, calibration, limits)
    }

    /// Builds the summary of this reduction with the grand-spectrum statistics `stats`
    /// (gathered while a streamed reduction's blocks went by).
    pub fn summary_with<'a>(
        &'a self,
        stats: &GrandStats,
        provenance: &'a Provenance,
        calibration: Option<&Calibration>,
        limits: Option<&Limits>,
    ) -> Summary<'a> {
        let sp = &self.spectrum;
        let threshold = sp.threshold.unwrap_or(f64::NAN);
        let n_valid_bins = stats.grand.count();
        let tail = 1.0 - statrs::distribution::ContinuousCDF::cdf(&statrs::distribution::Normal::standard(), threshold);
        let mut strongest: Vec<&Candidate> = sp.candidates.iter().collect();
        strongest.sort_by(|a, b| b.significance.total_cmp(&a.significance));
        strongest.truncate(SUMMARY_CANDIDATES);
        Summary {
            n_steps_in: self.n_steps_in,
            n_steps_used: self.used_steps.len(),
            n_rf_bins: stats.n_bins,
            rf_start_hz: sp.rf_start_hz,
            rf_stop_hz: sp.freq_hz(stats.n_bins.saturating_sub(1)),
            n_valid_bins,
            grand_mean: stats.grand.mean(),
            grand_std: stats.grand.std(),
            predicted_raw_spread: stats.predicted_spread.mean(),
            measured_raw_spread: stats.raw.std(),
            threshold,
            n_bins_above_threshold: stats.n_above,
            expected_null_bins_above: n_valid_bins as f64 * tail,
            n_candidates: sp.candidates.len(),
            candidates: strongest,
            cuts: &self.cuts,
            no_data: &self.no_data,
            provenance,
            calibration: calibration.map(CalibrationUse::from),
            limits: limits.map(LimitRange::from),
        }
    }

    /// Writes all outputs of this in-memory reduction into `dir` (created if needed).
    /// Returns the written paths.
    pub fn write(&self, dir: &Path, config_text: &str, provenance: &Provenance, calibrated: Option<(&Calibration, &Limits)>) -> anyhow::Result<Vec<PathBuf>> {
        let mut outputs = BlockOutputs::new(dir)?;
        let mut results = outputs.results_sink();
        for bins in Bins::blocks_of(&self.spectrum) {
            results.write(outputs.take(&bins))?;
        }
        outputs.finish(self, results, config_text, provenance, calibrated).map(|(written, _)| written)
    }
}

/// Temporary name of output `name` in `dir` (the extension kept: the image encoder picks
/// its format from it).
fn staged(dir: &Path, name: &str) -> PathBuf {
    dir.join(format!(".tmp.{name}"))
}

/// The outputs of a reduction gathered run of bins by run of bins (blocks in grid order):
/// the summary's statistics and the plot's columns, kept here, and the values for
/// `results.h5`, handed on to a [`ResultsSink`]. Every file is written under a temporary name
/// in the output folder and renamed into place by [`BlockOutputs::finish`] only after all of
/// them were written, so a failed run never replaces good results.
pub struct BlockOutputs {
    dir: PathBuf,
    stats: GrandStats,
    columns: Option<Columns>,
}

/// Where the per-bin values go: `results.h5` under its temporary name, made with the first
/// run of bins. Removed if dropped before [`BlockOutputs::finish`] takes it.
pub struct ResultsSink {
    path: PathBuf,
    file: Option<ResultsFile>,
}

impl ResultsSink {
    /// Writes one run of bins (the first one makes the file).
    pub fn write(&mut self, block: ResultBlock) -> hdf5::Result<()> {
        match &self.file {
            Some(file) => file.write(&block),
            None => {
                self.file = Some(ResultsFile::create(&self.path, &block)?);
                Ok(())
            }
        }
    }
}

impl Drop for ResultsSink {
    fn drop(&mut self) {
        if let Some(file) = self.file.take() {
            drop(file);
            let _ = std::fs::remove_file(&self.path);
        }
    }
}

impl BlockOutputs {
    /// Outputs to be written into `dir` (created if needed).
    pub fn new(dir: &Path) -> anyhow::Result<Self> {
        use anyhow::Context;
        std::fs::create_dir_all(dir).with_context(|| format!("cannot create output folder {}", dir.display()))?;
        Ok(Self { dir: dir.to_path_buf(), stats: GrandStats::default(), columns: None })
    }

    /// The sink for `results.h5`.
    pub fn results_sink(&self) -> ResultsSink {
        ResultsSink { path: staged(&self.dir, "results.h5"), file: None }
    }

    /// Takes in one run of bins (in grid order): the statistics and plot columns here, and
    /// the values for `results.h5`, returned.
    pub fn take(&mut self, bins: &Bins<'_>) -> ResultBlock {
        self.stats.add(bins);
        self.columns.get_or_insert_with(|| Columns::new(bins.grid_bins)).add(bins);
        ResultBlock::of(bins)
    }

    /// Writes the remaining outputs of `reduction` (whose bins all went through
    /// [`BlockOutputs::take`], and into `results`) and renames every file into place.
    /// Returns the written paths and the grand-spectrum statistics.
    pub fn finish(
        self,
        reduction: &Reduction,
        mut results: ResultsSink,
        config_text: &str,
        provenance: &Provenance,
        calibrated: Option<(&Calibration, &Limits)>,
    ) -> anyhow::Result<(Vec<PathBuf>, GrandStats)> {
        use anyhow::Context;
        let dir = &self.dir;
        let mut names = vec!["results.h5", "candidates.csv", "summary.json", "grand_spectrum.png", "grand_spectrum.svg"];
        let tmp = |n: &str| staged(dir, n);
        let calibration = calibrated.map(|c| c.0);
        let limits = calibrated.map(|c| c.1);
        let sp = &reduction.spectrum;
        let columns = self.columns.unwrap_or_else(|| Columns::new(0));
        let facts = plot::PlotFacts { origin_hz: sp.rf_start_hz, bin_width_hz: sp.bin_width_hz, threshold: sp.threshold, candidates: &sp.candidates };
        let file = results.file.take().context("writing results.h5: the reduction gave no RF bin")?;
        // Tables and plots are drawn side by side (the plots make no HDF5 call).
        let (tables, plots) = rayon::join(
            || -> anyhow::Result<()> {
                finish_hdf5(file, sp, config_text, provenance, limits).context("writing results.h5")?;
                reduction.write_csv(&tmp(names[1]), calibration).context("writing candidates.csv")?;
                let summary = reduction.summary_with(&self.stats, provenance, calibration, limits);
                std::fs::write(tmp(names[2]), serde_json::to_string_pretty(&summary)?).context("writing summary.json")?;
                if let Some(limits) = limits {
                    limits.write_tables(&tmp(LIMIT_OUTPUTS[0]), &tmp(LIMIT_OUTPUTS[1]), LIMIT_BLOCK_HZ).context("writing the limit tables")?;
                }
                Ok(())
            },
            || -> anyhow::Result<()> {
                plot::grand_spectrum(&columns, &facts, &tmp(names[3]), &tmp(names[4])).context("drawing the grand spectrum")?;
                if let Some(limits) = limits {
                    let points: Vec<(f64, f64)> = limits.bins.iter().map(|b| (b.mass_uev, b.g_agg_per_gev)).collect();
                    let title = format!("Exclusion at {:.0}% confidence (eta = {:.3})", 100.0 * limits.assumptions.confidence, limits.assumptions.eta);
                    crate::limits::exclusion_plot(&points, &title, &tmp(LIMIT_OUTPUTS[2]), &tmp(LIMIT_OUTPUTS[3])).context("drawing the exclusion plot")?;
                }
                Ok(())
            },
        );
        let staged_all = tables.and(plots);
        if limits.is_some() {
            names.extend(LIMIT_OUTPUTS);
        }
        if let Err(e) = staged_all {
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
        Ok((written, self.stats))
    }
}

impl Reduction {
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
}

/// Completes a results file whose per-bin datasets are written: the limit datasets (with a
/// calibration), the candidates and the provenance; closes it.
fn finish_hdf5(results: ResultsFile, sp: &crate::stage::Spectrum, config_text: &str, provenance: &Provenance, limits: Option<&Limits>) -> anyhow::Result<()> {
    let file = results.file();
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
            ResultsFile::described(file, name, &data, units, description)?;
        }
        results.text_attr("limit_assumptions", &serde_json::to_string(&l.assumptions)?)?;
    }
    let cand_f: Vec<f64> = sp.candidates.iter().map(|c| c.frequency_hz).collect();
    let cand_s: Vec<f64> = sp.candidates.iter().map(|c| c.significance).collect();
    let g = file.create_group("candidates")?;
    ResultsFile::described(&g, "frequency_hz", &cand_f, "Hz", "axion frequency hypothesis (line start) of each candidate's most significant bin")?;
    ResultsFile::described(&g, "significance", &cand_s, "1", "grand-spectrum value of each candidate's most significant bin")?;
    results.text_attr("tool_version", &provenance.tool_version)?;
    results.text_attr("config_sha256", &provenance.config_sha256)?;
    results.text_attr("config_text", config_text)?;
    results.text_attr("inputs", &serde_json::to_string(&provenance.inputs)?)?;
    results.close()?;
    Ok(())
}

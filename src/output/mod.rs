//! Writing a reduction's outputs: results HDF5, candidates CSV, summary JSON and a plot.
//!
//! Every file is written under a temporary name in the output folder and renamed into
//! place only after all of them were written, so a failed run never replaces good results.

mod bins;
pub mod console;
mod limit_outputs;
mod plot;
mod rank;
mod results_file;
mod stats;

use crate::calib::Calibration;
use crate::limits::BinLimit;
use crate::limits::{LimitBasis, Limits};
use crate::pipeline::Reduction;
use crate::stage::Candidate;
use anyhow::Context;
use sha2::{Digest, Sha256};
use std::path::{Path, PathBuf};

pub use bins::Bins;
pub use limit_outputs::LIMITS_CSV_MAX_BINS;
use limit_outputs::{LIMIT_BLOCKS_CSV, LIMITS_CSV, LimitOutputs};
pub use plot::Columns;
pub use results_file::{CHUNK_BINS, ResultBlock, ResultsFile, SPREAD_GROUP, SpreadRuns};
pub use stats::{GrandStats, Moments};

/// Candidates listed in `summary.json`: the strongest, by significance (all of them are in
/// `candidates.csv` and `results.h5`).
pub const SUMMARY_CANDIDATES: usize = 100;

/// Width of the blocks of the coarse limit summary, Hz.
pub const LIMIT_BLOCK_HZ: f64 = 1e6;

/// Outputs written only by a calibrated reduction (earlier ones are removed by an uncalibrated
/// one; `limits.csv` also by one whose grid is too large for it, [`LIMITS_CSV_MAX_BINS`]).
const LIMIT_OUTPUTS: [&str; 4] = [LIMITS_CSV, LIMIT_BLOCKS_CSV, "exclusion.png", "exclusion.svg"];

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
        let inputs = inputs.iter().map(|p| Ok((p.display().to_string(), hex(&sha256_of_file(p)?)))).collect::<std::io::Result<_>>()?;
        Ok(Self::of_hashed(config_text, inputs))
    }

    /// The provenance of input files hashed already (path as given and SHA-256 in hex, as
    /// [`Provenance::new`] makes them); hashes only the config text.
    pub fn of_hashed(config_text: &str, inputs: Vec<(String, String)>) -> Self {
        Self { tool_version: env!("CARGO_PKG_VERSION").into(), config_sha256: hex(&Sha256::digest(config_text)), inputs }
    }
}

/// SHA-256 of a file's bytes, read through a memory map in pieces of [`HASHED_PIECE_BYTES`]:
/// the hasher reads the page cache itself, where reading into a buffer would copy every byte
/// once more (a third of the copying of a wide night's reduction, which reads its input
/// twice besides), and only the piece being hashed need be resident, whatever the file's
/// size. An empty file is hashed without a map (a map of length zero is refused), and a file
/// that cannot be mapped (some network or special file systems) through buffered reads.
fn sha256_of_file(path: &Path) -> std::io::Result<Vec<u8>> {
    let mut file = std::fs::File::open(path)?;
    let mut hasher = Sha256::new();
    if file.metadata()?.len() > 0 {
        // SAFETY: the map is read only and lives while it is read. A run file rewritten by
        // another process meanwhile gives a hash of neither version, as buffered reads would;
        // one truncated meanwhile ends the process (SIGBUS) before any output is renamed
        // into place.
        let Ok(map) = (unsafe { memmap2::Mmap::map(&file) }) else {
            std::io::copy(&mut std::io::BufReader::with_capacity(1 << 20, &mut file), &mut hasher)?;
            return Ok(hasher.finalize().to_vec());
        };
        #[cfg(unix)]
        let _ = map.advise(memmap2::Advice::Sequential);
        for (i, piece) in map.chunks(HASHED_PIECE_BYTES).enumerate() {
            hasher.update(piece);
            // Hashed pages leave the process (they stay in the page cache, which the reduction
            // reads), so the map adds at most one piece to the resident memory.
            // SAFETY: the map is shared and read only: a page dropped from it is read again
            // from the file if touched, never replaced by zeros.
            #[cfg(unix)]
            let _ = unsafe { map.unchecked_advise_range(memmap2::UncheckedAdvice::DontNeed, i * HASHED_PIECE_BYTES, piece.len()) };
        }
    }
    Ok(hasher.finalize().to_vec())
}

/// Bytes hashed between releases of the mapped pages (16 MiB).
const HASHED_PIECE_BYTES: usize = 1 << 24;

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
    /// Best (smallest), median and worst (largest) limit relative to KSVZ over the n excluded
    /// bins; the median is the lower one, the value of 0-based rank floor((n - 1) / 2) in
    /// ascending order.
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
    implied_coupling_of([sp.amplitude[j], sp.sigma_a[j], sp.predicted_spread[j]], eta)
}

/// (implied |g|/g_ref, reference-axion SNR) of a bin's [amplitude, sigma_A, predicted spread].
fn implied_coupling_of([amplitude, sigma_a, predicted_spread]: [f64; 3], eta: f64) -> (f64, f64) {
    ((amplitude.max(0.0) / eta).sqrt(), eta / (sigma_a * predicted_spread))
}

/// The values the implied couplings need at the candidates' peak bins (amplitude, sigma_A,
/// predicted spread), by grid bin in increasing order: kept for every bin above the
/// threshold as a block-wise reduction's bins go by (a candidate's peak is one of them), or
/// read from an in-memory spectrum.
#[derive(Debug, Clone, Default)]
pub struct PeakValues {
    bins: Vec<(usize, [f64; 3])>,
}

impl PeakValues {
    /// The values at the peaks of an in-memory spectrum's candidates.
    pub fn of_spectrum(sp: &crate::stage::Spectrum) -> Self {
        let mut bins: Vec<(usize, [f64; 3])> =
            sp.candidates.iter().map(|c| c.peak_bin).map(|j| (j, [sp.amplitude[j], sp.sigma_a[j], sp.predicted_spread[j]])).collect();
        bins.sort_by_key(|b| b.0);
        bins.dedup_by_key(|b| b.0);
        Self { bins }
    }

    /// Keeps the values of the bins of `b` above its threshold (runs of bins in grid order).
    fn keep_above(&mut self, b: &Bins<'_>) {
        for (i, _) in b.grand.iter().enumerate().filter(|(_, g)| **g > b.threshold) {
            self.bins.push((b.first_bin + i, [b.amplitude[i], b.sigma_a[i], b.predicted_spread[i]]));
        }
    }

    /// (implied |g|/g_ref, reference-axion SNR) of candidate `c` with attenuation `eta`; NaN
    /// if its peak bin was not kept.
    pub fn implied(&self, c: &crate::stage::Candidate, eta: f64) -> (f64, f64) {
        match self.bins.binary_search_by_key(&c.peak_bin, |b| b.0) {
            Ok(k) => implied_coupling_of(self.bins[k].1, eta),
            Err(_) => (f64::NAN, f64::NAN),
        }
    }
}

impl Reduction {
    /// Builds the summary of this reduction from its in-memory spectrum.
    pub fn summary<'a>(&'a self, provenance: &'a Provenance, calibration: Option<&Calibration>, limits: Option<&Limits>) -> Summary<'a> {
        self.summary_with(&GrandStats::of_spectrum(&self.spectrum), provenance, calibration, limits.map(LimitRange::from))
    }

    /// Builds the summary of this reduction with the grand-spectrum statistics `stats` and
    /// the limit range `limits` (gathered while a streamed reduction's blocks went by).
    pub fn summary_with<'a>(
        &'a self,
        stats: &GrandStats,
        provenance: &'a Provenance,
        calibration: Option<&Calibration>,
        limits: Option<LimitRange>,
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
            limits,
        }
    }

    /// Writes all outputs of this in-memory reduction into `dir` (created if needed); with a
    /// calibration, `calibrated` gives it and the limits of every bin. Returns the written
    /// paths.
    pub fn write(&self, dir: &Path, config_text: &str, provenance: &Provenance, calibrated: Option<(&Calibration, &Limits)>) -> anyhow::Result<Vec<PathBuf>> {
        let mut outputs = BlockOutputs::new(dir)?;
        let mut results = outputs.results_sink();
        for bins in Bins::blocks_of(&self.spectrum) {
            let block = match calibrated {
                Some((_, limits)) => outputs.take_limited(&bins, limits)?,
                None => outputs.take(&bins)?,
            };
            results.write(block)?;
        }
        outputs.peaks = PeakValues::of_spectrum(&self.spectrum);
        outputs.finish(self, results, config_text, provenance, calibrated.map(|c| c.0)).map(|done| done.written)
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
    /// With a calibration, what the limits assume (for limits computed here, [`BlockOutputs::take`]).
    basis: Option<LimitBasis>,
    /// With a calibration, the limit outputs, made with the first run of bins.
    limits: Option<LimitOutputs>,
    /// With a calibration, the values the candidates' implied couplings need (kept at every
    /// bin above the threshold by [`BlockOutputs::take`]).
    peaks: PeakValues,
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
        match &mut self.file {
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
        std::fs::create_dir_all(dir).with_context(|| format!("cannot create output folder {}", dir.display()))?;
        Ok(Self { dir: dir.to_path_buf(), stats: GrandStats::default(), columns: None, basis: None, limits: None, peaks: PeakValues::default() })
    }

    /// Outputs of a single night's calibrated reduction, into `dir`: [`BlockOutputs::take`]
    /// also computes each bin's limit from its own values, with `basis` and the flag stage's
    /// threshold ([`crate::limits::single_night_limits`]), and the limit outputs are written.
    pub fn calibrated(dir: &Path, basis: LimitBasis) -> anyhow::Result<Self> {
        Ok(Self { basis: Some(basis), ..Self::new(dir)? })
    }

    /// The sink for `results.h5`.
    pub fn results_sink(&self) -> ResultsSink {
        ResultsSink { path: staged(&self.dir, "results.h5"), file: None }
    }

    /// Takes in one run of bins (in grid order): the statistics, plot columns and (made by
    /// [`BlockOutputs::calibrated`]) the limit outputs here, and the values for `results.h5`,
    /// returned.
    pub fn take(&mut self, bins: &Bins<'_>) -> anyhow::Result<ResultBlock> {
        let Some(basis) = &self.basis else {
            self.add_spectrum(bins);
            return Ok(ResultBlock::of(bins));
        };
        let assumptions = match &self.limits {
            Some(open) => open.assumptions.clone(),
            None => basis.at_threshold(Some(bins.threshold).filter(|t| !t.is_nan())).map_err(anyhow::Error::msg)?,
        };
        let limits = crate::limits::single_night_limits(
            &assumptions,
            bins.origin_hz,
            bins.bin_width_hz,
            bins.first_bin,
            bins.sigma_a,
            bins.predicted_spread,
            bins.grand,
        );
        let block = self.take_with(bins, assumptions, &limits)?;
        self.peaks.keep_above(bins);
        Ok(block)
    }

    /// Takes in one run of bins as [`BlockOutputs::take`] does, with the limits of a whole
    /// in-memory reduction (those of these bins are used).
    pub fn take_limited(&mut self, bins: &Bins<'_>, limits: &Limits) -> anyhow::Result<ResultBlock> {
        let own = limits.bins.get(bins.first_bin..bins.first_bin + bins.grand.len()).context("the limits do not cover the reduction's grid")?;
        self.take_with(bins, limits.assumptions.clone(), own)
    }

    fn add_spectrum(&mut self, bins: &Bins<'_>) {
        self.stats.add(bins);
        self.columns.get_or_insert_with(|| Columns::new(bins.grid_bins)).add(bins);
    }

    /// Takes in `bins` with their `limits` (made with `assumptions`).
    fn take_with(&mut self, bins: &Bins<'_>, assumptions: crate::limits::LimitAssumptions, limits: &[BinLimit]) -> anyhow::Result<ResultBlock> {
        self.add_spectrum(bins);
        let open = match &mut self.limits {
            Some(open) => open,
            None => self.limits.insert(LimitOutputs::open(&self.dir, assumptions, bins.grid_bins)?),
        };
        open.add(bins.first_bin, limits)?;
        Ok(ResultBlock::of(bins).with_limits(limits))
    }

    /// Writes the remaining outputs of `reduction` (whose bins all went through
    /// [`BlockOutputs::take`], and into `results`) and renames every file into place.
    /// `calibration` is the one the limits were made with (None without).
    pub fn finish(
        self,
        reduction: &Reduction,
        mut results: ResultsSink,
        config_text: &str,
        provenance: &Provenance,
        calibration: Option<&Calibration>,
    ) -> anyhow::Result<Finished> {
        let dir = &self.dir;
        let mut names = vec!["results.h5", "candidates.csv", "summary.json", "grand_spectrum.png", "grand_spectrum.svg"];
        let tmp = |n: &str| staged(dir, n);
        let clean = || {
            // Earlier results stay as they were; the partial temporary files go.
            for n in names.iter().chain(LIMIT_OUTPUTS.iter()) {
                let _ = std::fs::remove_file(tmp(n));
            }
        };
        anyhow::ensure!(calibration.is_some() == self.limits.is_some(), "writing the outputs: a calibration needs limits and limits a calibration");
        let has_table = self.limits.as_ref().is_some_and(LimitOutputs::has_table);
        let (limits, exclusion) = match self.limits.map(LimitOutputs::finish).transpose() {
            Ok(done) => done.unzip(),
            Err(e) => {
                clean();
                return Err(e);
            }
        };
        let sp = &reduction.spectrum;
        let columns = self.columns.unwrap_or_else(|| Columns::new(0));
        let facts = plot::PlotFacts { origin_hz: sp.rf_start_hz, bin_width_hz: sp.bin_width_hz, threshold: sp.threshold, candidates: &sp.candidates };
        let file = results.file.take().context("writing results.h5: the reduction gave no RF bin")?;
        // Tables and plots are drawn side by side (the plots make no HDF5 call).
        let (tables, plots) = rayon::join(
            || -> anyhow::Result<()> {
                finish_hdf5(file, sp, config_text, provenance, limits.as_ref().map(|l| &l.assumptions)).context("writing results.h5")?;
                reduction.write_csv(&tmp(names[1]), calibration.map(|c| (c, &self.peaks))).context("writing candidates.csv")?;
                let summary = reduction.summary_with(&self.stats, provenance, calibration, limits.clone());
                std::fs::write(tmp(names[2]), serde_json::to_string_pretty(&summary)?).context("writing summary.json")?;
                Ok(())
            },
            || -> anyhow::Result<()> {
                plot::grand_spectrum(&columns, &facts, &tmp(names[3]), &tmp(names[4])).context("drawing the grand spectrum")?;
                if let (Some(limits), Some(exclusion)) = (&limits, &exclusion) {
                    let title = format!("Exclusion at {:.0}% confidence (eta = {:.3})", 100.0 * limits.confidence, limits.assumptions.eta);
                    crate::limits::exclusion_plot(exclusion, &title, &tmp(LIMIT_OUTPUTS[2]), &tmp(LIMIT_OUTPUTS[3])).context("drawing the exclusion plot")?;
                }
                Ok(())
            },
        );
        if let Err(e) = tables.and(plots) {
            clean();
            return Err(e);
        }
        if limits.is_some() {
            names.extend(LIMIT_OUTPUTS.iter().filter(|&&n| has_table || n != LIMITS_CSV));
        }
        let written = names
            .iter()
            .map(|n| {
                let to = dir.join(n);
                std::fs::rename(tmp(n), &to).with_context(|| format!("renaming into {}", to.display()))?;
                Ok(to)
            })
            .collect::<anyhow::Result<Vec<PathBuf>>>()?;
        // Limits of an earlier reduction would not describe this one.
        for n in LIMIT_OUTPUTS.iter().filter(|n| !names.contains(n)) {
            let stale = dir.join(n);
            if stale.exists() {
                std::fs::remove_file(&stale).with_context(|| format!("removing the earlier {}", stale.display()))?;
                match limits {
                    None => tracing::info!("removed {} of an earlier reduction: this one has no calibration, hence no limits", stale.display()),
                    Some(_) => tracing::info!("removed {} of an earlier reduction: this one's per-bin limits are in results.h5 only", stale.display()),
                }
            }
        }
        Ok(Finished { written, stats: self.stats, limits, peaks: self.peaks })
    }
}

/// What [`BlockOutputs::finish`] gives back for the console.
pub struct Finished {
    /// The written paths.
    pub written: Vec<PathBuf>,
    /// The grand-spectrum statistics.
    pub stats: GrandStats,
    /// With a calibration, the limit range.
    pub limits: Option<LimitRange>,
    /// With a calibration, the values the candidates' implied couplings need.
    pub peaks: PeakValues,
}

impl Reduction {
    /// One row per candidate; with a calibration also the implied coupling |g|/g_ref and the
    /// SNR a reference axion has at that frequency (both use eta).
    fn write_csv(&self, path: &Path, calibration: Option<(&Calibration, &PeakValues)>) -> anyhow::Result<()> {
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
            if let Some((cal, peaks)) = calibration {
                let (rel, snr) = peaks.implied(c, cal.attenuation.eta);
                row.extend([format!("{rel:.4}"), format!("{snr:.3}")]);
            }
            w.write_record(&row)?;
        }
        w.flush()?;
        Ok(())
    }
}

/// Completes a results file whose per-bin datasets (the limits' too) are written: the limit
/// assumptions (with a calibration), the candidates and the provenance; closes it.
fn finish_hdf5(
    results: ResultsFile,
    sp: &crate::stage::Spectrum,
    config_text: &str,
    provenance: &Provenance,
    limits: Option<&crate::limits::LimitAssumptions>,
) -> anyhow::Result<()> {
    let file = results.file();
    if let Some(assumptions) = limits {
        results.text_attr("limit_assumptions", &serde_json::to_string(assumptions)?)?;
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

#[cfg(test)]
mod tests {
    use super::{HASHED_PIECE_BYTES, hex, sha256_of_file};
    use sha2::{Digest, Sha256};

    /// Published vectors (FIPS 180-2, appendix B.1, "abc"; the empty message, NIST's SHA
    /// examples), and a file of two pieces and a few bytes against the sha2 crate's one-shot
    /// hash of the same bytes, so the pieces join up.
    #[test]
    fn files_hash_to_their_sha256() {
        let dir = tempfile::tempdir().unwrap();
        let hash_of = |name: &str, bytes: &[u8]| {
            let path = dir.path().join(name);
            std::fs::write(&path, bytes).unwrap();
            hex(&sha256_of_file(&path).unwrap())
        };
        assert_eq!(hash_of("empty", b""), "e3b0c44298fc1c149afbf4c8996fb92427ae41e4649b934ca495991b7852b855");
        assert_eq!(hash_of("abc", b"abc"), "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad");
        let long: Vec<u8> = (0..2 * HASHED_PIECE_BYTES + 5).map(|i| (i.wrapping_mul(2_654_435_761) >> 13) as u8).collect();
        assert_eq!(hash_of("long", &long), hex(&Sha256::digest(&long)));
    }
}

//! What the report shows, gathered either from a reduction in memory or from the files a
//! reduction wrote (`summary.json` and `results.h5`), so both paths draw the same page.

use super::diagnostics::{self, StepDiagnostics};
use super::plots::GrandDigest;
use crate::calib::Calibration;
use crate::limits::{ExclusionColumns, Limits};
use crate::output::Provenance;
use crate::physics::units::{g_agg_from_g_gamma_per_gev, mass_uev_from_freq_hz};
use crate::pipeline::Reduction;
use serde::Deserialize;
use std::path::{Path, PathBuf};

/// Everything the page is drawn from.
#[derive(Debug, Clone)]
pub struct ReportData {
    /// Run labels of the input files.
    pub run_labels: Vec<String>,
    /// The summary as written to `summary.json` (counts, spreads, cuts, candidates, provenance).
    pub summary: SummaryView,
    /// Bin-centre RF frequency of grand-spectrum bin 0, Hz.
    pub rf_start_hz: f64,
    /// RF bin width, Hz.
    pub bin_width_hz: f64,
    /// What the figures draw of the grand spectrum.
    pub grand: GrandDigest,
    /// Per candidate (same order as `summary.candidates`): implied |g|/g_ref and the SNR a
    /// reference axion has there (with a calibration only).
    pub implied: Vec<Option<(f64, f64)>>,
    /// Per-step diagnostics, or why they are missing.
    pub steps: Result<StepDiagnostics, String>,
    /// Exclusion limits, when the reduction had a calibration.
    pub limits: Option<LimitView>,
    /// The full calibration, when given.
    pub calibration: Option<Calibration>,
    /// The pipeline file's text.
    pub config_text: String,
    /// The analysis state after this reduction, when it was made with a state folder
    /// (set with [`ReportData::with_state`]).
    pub state: Option<crate::state::StatusSummary>,
}

/// The fields of `summary.json` the report uses (NaN values are written as null there).
#[derive(Debug, Clone, Deserialize)]
pub struct SummaryView {
    /// Steps read.
    pub n_steps_in: usize,
    /// Steps combined.
    pub n_steps_used: usize,
    /// Grand-spectrum bins.
    pub n_rf_bins: usize,
    /// Bins with a finite grand-spectrum value.
    pub n_valid_bins: usize,
    /// First bin-centre frequency, Hz.
    pub rf_start_hz: f64,
    /// Last bin-centre frequency, Hz.
    pub rf_stop_hz: f64,
    /// Mean of the grand spectrum.
    pub grand_mean: Option<f64>,
    /// Its standard deviation.
    pub grand_std: Option<f64>,
    /// Predicted raw spread of A / sigma_A.
    pub predicted_raw_spread: Option<f64>,
    /// Measured raw spread of A / sigma_A.
    pub measured_raw_spread: Option<f64>,
    /// Flag threshold, sigma.
    pub threshold: Option<f64>,
    /// Bins above the threshold.
    pub n_bins_above_threshold: usize,
    /// Bins above it expected from noise alone.
    pub expected_null_bins_above: Option<f64>,
    /// Rescan candidates.
    pub candidates: Vec<CandidateView>,
    /// All rescan candidates (`candidates` lists the strongest of them).
    pub n_candidates: usize,
    /// Steps cut, with reasons.
    pub cuts: Vec<CutView>,
    /// Bins without data, by cause.
    pub no_data: crate::stage::no_data::NoDataTally,
    /// Tool version, config hash, inputs.
    pub provenance: ProvenanceView,
    /// The calibration figures the reduction applied.
    pub calibration: Option<CalibrationUseView>,
    /// The range of the limits.
    pub limits: Option<LimitRangeView>,
}

/// One rescan candidate.
#[derive(Debug, Clone, Deserialize)]
pub struct CandidateView {
    /// Axion frequency of the most significant bin (line start), Hz.
    pub frequency_hz: f64,
    /// Grand-spectrum value there, sigma.
    pub significance: f64,
    /// Most significant bin.
    pub peak_bin: usize,
    /// First flagged bin.
    pub first_bin: usize,
    /// Last flagged bin.
    pub last_bin: usize,
    /// Cavity frequency to retune to, Hz.
    pub revisit_cavity_hz: f64,
    /// Steps whose band covered it.
    pub covering_steps: Vec<usize>,
}

/// One cut step.
#[derive(Debug, Clone, Deserialize)]
pub struct CutView {
    /// Global step index.
    pub step: usize,
    /// Input file.
    pub file: PathBuf,
    /// Row in that file.
    pub row: usize,
    /// Stage kind that cut it.
    pub stage: String,
    /// Why.
    pub reason: String,
}

/// Provenance as written in the summary.
#[derive(Debug, Clone, Deserialize)]
pub struct ProvenanceView {
    /// axsift version.
    pub tool_version: String,
    /// SHA-256 of the pipeline text.
    pub config_sha256: String,
    /// (path, SHA-256) of every input run file.
    pub inputs: Vec<(String, String)>,
}

/// The calibration figures of the summary.
#[derive(Debug, Clone, Deserialize)]
pub struct CalibrationUseView {
    /// Signal attenuation.
    pub eta: f64,
    /// Its standard error.
    pub eta_standard_error: f64,
    /// Null spread of the grand spectrum.
    pub null_spread: f64,
    /// (SNR, efficiency) at the injected SNR nearest 5.
    pub efficiency_near_snr5: Option<(f64, f64)>,
}

/// The range of the limits in the summary.
#[derive(Debug, Clone, Deserialize)]
pub struct LimitRangeView {
    /// Confidence level.
    pub confidence: f64,
    /// Fraction of the bins excluded.
    pub excluded_fraction: f64,
    /// Best limit relative to KSVZ.
    pub best_rel_ksvz: Option<f64>,
    /// Median limit relative to KSVZ.
    pub median_rel_ksvz: Option<f64>,
    /// Worst limit relative to KSVZ.
    pub worst_rel_ksvz: Option<f64>,
}

/// The exclusion curve.
#[derive(Debug, Clone)]
pub struct LimitView {
    /// The limit on |g_agg| against axion mass, per pixel column.
    pub columns: ExclusionColumns,
    /// Signal attenuation the limits use.
    pub eta: f64,
}

impl ReportData {
    /// Gathers the report of a reduction held in memory. `runs` are its input files, read
    /// again for the per-step residual spreads.
    pub fn from_reduction(
        r: &Reduction,
        plan: &crate::config::Plan,
        runs: &[PathBuf],
        provenance: &Provenance,
        config_text: &str,
        calibrated: Option<(&Calibration, &Limits)>,
    ) -> anyhow::Result<Self> {
        let (calibration, limits) = (calibrated.map(|c| c.0), calibrated.map(|c| c.1));
        let summary: SummaryView = serde_json::from_value(serde_json::to_value(r.summary(provenance, calibration, limits))?)?;
        let sp = &r.spectrum;
        let implied = sp.candidates.iter().map(|c| calibration.map(|cal| crate::output::implied_coupling(sp, c, cal.attenuation.eta))).collect();
        Ok(Self {
            run_labels: r.night.headers.iter().map(|h| h.run_label.clone()).collect(),
            summary,
            rf_start_hz: sp.rf_start_hz,
            bin_width_hz: sp.bin_width_hz,
            grand: GrandDigest::of(&sp.grand, sp.rf_start_hz, sp.bin_width_hz),
            implied,
            steps: diagnostics::measure(plan, runs),
            limits: limits.map(|l| {
                let points: Vec<(f64, f64)> = l.bins.iter().map(|b| (b.mass_uev, b.g_agg_per_gev.abs())).collect();
                LimitView { columns: ExclusionColumns::of_points(&points), eta: l.assumptions.eta }
            }),
            calibration: calibration.cloned(),
            config_text: config_text.to_string(),
            state: None,
        })
    }

    /// Gathers the report from an output folder written by `reduce` (`summary.json` and
    /// `results.h5`). The run files named in the provenance are read again for the per-step
    /// diagnostics if they are still where they were; `calibration`, if given, is checked
    /// against the pipeline stored in `results.h5` and adds the full calibration section.
    /// Adds the nightly-state section: the state folder's nights, candidate classes with
    /// their evidence and rescan plan, and the limit range. Errors when a candidate file of
    /// the state cannot be read.
    pub fn with_state(mut self, state: &crate::state::State) -> Result<Self, crate::state::StateError> {
        self.state = Some(crate::state::StatusSummary::of(state)?);
        Ok(self)
    }

    pub fn from_folder(dir: &Path, calibration: Option<&Path>) -> anyhow::Result<Self> {
        use anyhow::Context;
        let summary_path = dir.join("summary.json");
        let text = std::fs::read_to_string(&summary_path).with_context(|| format!("cannot read {}", summary_path.display()))?;
        let summary: SummaryView = serde_json::from_str(&text).with_context(|| format!("{}: not a summary written by reduce", summary_path.display()))?;
        let results = dir.join("results.h5");
        let file = hdf5::File::open(&results).with_context(|| format!("cannot open {}", results.display()))?;
        let dataset = |name: &str| file.dataset(name).with_context(|| format!("{}: dataset `{name}`", results.display()));
        // Bins `r` of a per-bin dataset (every one is read in runs: a wide night's would not
        // fit in the report's memory whole).
        let read = |ds: &hdf5::Dataset, r: std::ops::Range<usize>| -> anyhow::Result<Vec<f64>> {
            Ok(ds.read_slice_1d::<f64, _>(r).with_context(|| format!("{}: dataset `{}`", results.display(), ds.name()))?.to_vec())
        };
        let grand_ds = dataset("grand")?;
        let n_bins = grand_ds.size();
        let axis = |name: &str| -> anyhow::Result<f64> {
            file.attr(name).and_then(|a| a.read_scalar::<f64>()).with_context(|| format!("{}: attribute `{name}`", results.display()))
        };
        let (rf_start_hz, bin_width_hz) = (axis("rf_start_hz")?, axis("bin_width_hz")?);
        let grand = GrandDigest::read(n_bins, rf_start_hz, bin_width_hz, crate::output::CHUNK_BINS, |r| read(&grand_ds, r))?;
        let config_text = file.attr("config_text").and_then(|a| a.read_scalar::<hdf5::types::VarLenUnicode>()).map(|s| s.to_string()).unwrap_or_default();
        let eta = summary.calibration.as_ref().map(|c| c.eta);
        let implied = match eta {
            Some(eta) => {
                let (amp, sigma_a) = (dataset("amplitude")?, dataset("sigma_a")?);
                let spread =
                    crate::output::SpreadRuns::read(&file).with_context(|| format!("{}: group `{}`", results.display(), crate::output::SPREAD_GROUP))?;
                let at = |ds: &hdf5::Dataset, j: usize| read(ds, j..j + 1).map(|v| v[0]);
                let implied_at = |j: usize| -> anyhow::Result<Option<(f64, f64)>> {
                    let spread = spread.at(j).with_context(|| format!("{}: group `{}` has no runs", results.display(), crate::output::SPREAD_GROUP))?;
                    Ok(Some(((at(&amp, j)?.max(0.0) / eta).sqrt(), eta / (at(&sigma_a, j)? * spread))))
                };
                summary.candidates.iter().map(|c| implied_at(c.peak_bin)).collect::<anyhow::Result<_>>()?
            }
            None => vec![None; summary.candidates.len()],
        };
        let limits = match (file.link_exists("limit_g_gamma"), eta) {
            (true, Some(eta)) => {
                // Each bin's mass and |g_agg| limit follow from its frequency and |g_gamma| limit.
                let g_gamma = dataset("limit_g_gamma")?;
                let mut columns = ExclusionColumns::new(n_bins);
                for first in (0..n_bins).step_by(crate::output::CHUNK_BINS) {
                    let r = first..(first + crate::output::CHUNK_BINS).min(n_bins);
                    let points = read(&g_gamma, r)?.into_iter().enumerate().map(|(i, g)| {
                        let mass = mass_uev_from_freq_hz(crate::limits::line_start_hz(rf_start_hz, bin_width_hz, first + i));
                        (mass, g_agg_from_g_gamma_per_gev(g, mass).abs())
                    });
                    columns.add(first, points);
                }
                Some(LimitView { columns, eta })
            }
            _ => None,
        };
        drop(file);
        let plan = crate::config::load(&config_text, "config_text of results.h5").map_err(|e| e.to_string());
        let calibration = match (calibration, &plan) {
            (Some(path), Ok(plan)) => Some(Calibration::load_for(path, plan).map_err(anyhow::Error::msg)?),
            (Some(_), Err(e)) => anyhow::bail!("{}: cannot check the calibration against its pipeline: {e}", results.display()),
            (None, _) => None,
        };
        let runs: Vec<PathBuf> = summary.provenance.inputs.iter().map(|(p, _)| PathBuf::from(p)).collect();
        let steps = match runs.iter().find(|p| !p.is_file()) {
            Some(missing) => Err(format!("run file {} is no longer there", missing.display())),
            None => plan.and_then(|plan| diagnostics::measure(&plan, &runs)),
        };
        let run_labels = runs.iter().filter_map(|p| crate::runfile::RunReader::open(p).ok()).map(|r| r.header().run_label.clone()).collect();
        Ok(Self { run_labels, rf_start_hz, bin_width_hz, grand, implied, steps, limits, calibration, config_text, summary, state: None })
    }
}

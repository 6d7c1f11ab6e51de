//! Calibration by signal injection: how much of an axion survives the configured chain.
//!
//! A campaign reduces many realisations of a night with synthetic axions added to the raw
//! spectra (at random, seeded frequencies; see [`crate::inject`]) and measures:
//! - the null spread of the grand spectrum (and the correction 1/spread that would make it
//!   unit), with a Kolmogorov-Smirnov test of the thinned null grand spectrum against N(0,1);
//! - the signal attenuation eta = recovered / injected filtered amplitude, at the bin where the
//!   line starts (so eta also holds the average loss from a line that starts inside a bin);
//! - the detection efficiency at the configured threshold versus the injected SNR, beside the
//!   ideal Phi(SNR - Theta); the injected SNR is the grand-spectrum value the signal would have
//!   on average once eta is accounted for: amplitude = SNR sigma_A s / eta, s the predicted spread;
//! - the radiometer check: 1/sigma_A from the chain against the Dicke SNR of a reference axion,
//!   from the step metadata alone.
//!
//! Noise comes from simulated nights (a fresh seed per realisation) or from recorded run files
//! (the same noise every time; only the injected frequencies change).

mod ks;
mod plan_info;
mod plot;
mod radiometer;

pub use ks::{KsResult, kolmogorov_q, ks_unit_normal};
pub use plan_info::{PlanInfo, stage_hash};

use crate::config::Plan;
use crate::inject::SyntheticAxion;
use crate::pipeline::{Injection, ReduceError, Reduction, reduce_injected};
use crate::sim::{Scenario, simulate};
use rand::rngs::StdRng;
use rand::{RngExt, SeedableRng};
use rayon::prelude::*;
use statrs::distribution::{ContinuousCDF, Normal};
use std::path::{Path, PathBuf};

/// Version of the calibration file layout.
pub const CALIBRATION_VERSION: u32 = 1;
/// Null grand-spectrum bins are thinned to one in this many before the KS test, so that the
/// samples are nearly independent (the filter correlates neighbours over about a line width).
pub const KS_THINNING_BINS: usize = 128;

/// How big a campaign is.
#[derive(Debug, Clone, serde::Serialize, serde::Deserialize)]
pub struct CampaignSpec {
    /// Seed of the noise realisations and of the injected frequencies.
    pub seed: u64,
    /// Realisations without injections (null spread, KS test).
    pub null_realisations: usize,
    /// Realisations with strong injections for eta.
    pub eta_realisations: usize,
    /// Injected SNR (before eta) of the eta injections.
    pub eta_snr: f64,
    /// Injected SNRs of the efficiency curve.
    pub snr_grid: Vec<f64>,
    /// Realisations per SNR of the efficiency curve.
    pub realisations_per_snr: usize,
    /// Largest number of axions injected into one realisation (they are kept several
    /// Savitzky-Golay windows apart, so they do not disturb each other).
    pub max_injections_per_realisation: usize,
}

impl CampaignSpec {
    /// The campaign `axsift calibrate` runs by default: enough for ~1% on eta and ~2% on the
    /// efficiency near 95% for a night like the demo.
    pub fn standard(seed: u64) -> Self {
        Self {
            seed,
            null_realisations: 4,
            eta_realisations: 4,
            eta_snr: 20.0,
            snr_grid: vec![1.0, 2.0, 3.0, 3.5, 4.0, 4.5, 5.0, 6.0, 7.0],
            realisations_per_snr: 6,
            max_injections_per_realisation: 40,
        }
    }
}

/// Where the noise of each realisation comes from.
pub enum NoiseSource<'a> {
    /// Simulate the scenario afresh for every realisation (seed = scenario seed + realisation).
    Simulated {
        /// The night to simulate.
        scenario: &'a Scenario,
        /// Folder for the temporary run files.
        scratch: &'a Path,
    },
    /// Recorded run files: the same noise each time.
    Recorded(&'a [PathBuf]),
}

/// Signal attenuation measured by injection.
#[derive(Debug, Clone, serde::Serialize, serde::Deserialize)]
pub struct Attenuation {
    /// Mean recovered / injected filtered amplitude.
    pub eta: f64,
    /// Standard deviation of the individual ratios.
    pub spread: f64,
    /// Standard error of the mean.
    pub standard_error: f64,
    /// Number of injections.
    pub n: usize,
}

/// One point of the efficiency curve.
#[derive(Debug, Clone, serde::Serialize, serde::Deserialize)]
pub struct EfficiencyPoint {
    /// Injected SNR (expected grand-spectrum value with eta accounted for).
    pub snr: f64,
    /// Injections.
    pub n: usize,
    /// Injections whose bin rose above the threshold.
    pub detected: usize,
    /// detected / n.
    pub efficiency: f64,
    /// Binomial standard error sqrt(e (1 - e) / n) (with e the ideal value, so it is never 0).
    pub standard_error: f64,
    /// The ideal Phi(SNR - Theta).
    pub ideal: f64,
}

/// The null grand spectrum of the campaign.
#[derive(Debug, Clone, serde::Serialize, serde::Deserialize)]
pub struct NullSpread {
    /// Mean of the grand spectrum over all null realisations.
    pub mean: f64,
    /// Its standard deviation.
    pub std: f64,
    /// Correction 1/std that makes it unit (reported; the grand spectrum is normalised by the
    /// predicted spread).
    pub correction: f64,
    /// Bins used.
    pub n_bins: usize,
    /// KS test of the thinned grand spectrum against N(0, 1).
    pub ks: KsResult,
}

/// The radiometer check (medians over the injected bins of the first null realisation).
#[derive(Debug, Clone, serde::Serialize, serde::Deserialize)]
pub struct RadiometerCheck {
    /// Dicke SNR of a reference axion from the metadata: sqrt(sum_i (P_sig,i / k_B T_i)^2 t_i / dnu_a),
    /// t_i = N_i / dnu_b, dnu_a = nu <beta^2>.
    pub dicke_snr: f64,
    /// 1/sigma_A of the chain for the same axion (ideal filter, before the baseline's loss).
    pub filter_snr: f64,
    /// filter_snr / dicke_snr.
    pub ratio: f64,
    /// Expected grand-spectrum value of a reference axion: eta / (sigma_A s).
    pub grand_snr: f64,
}

/// A finished calibration: what `reduce` reads.
#[derive(Debug, Clone, serde::Serialize, serde::Deserialize)]
pub struct Calibration {
    /// File layout version ([`CALIBRATION_VERSION`]).
    pub version: u32,
    /// axsift version that made it.
    pub tool_version: String,
    /// Hash of the stages that shape the grand spectrum and the threshold ([`stage_hash`]).
    pub stage_hash: String,
    /// "simulated" or "recorded".
    pub noise: String,
    /// Threshold of the configured flag stage.
    pub threshold: f64,
    /// The campaign's size.
    pub spec: CampaignSpec,
    /// Null spread and KS test.
    pub null: NullSpread,
    /// Signal attenuation.
    pub attenuation: Attenuation,
    /// Efficiency curve.
    pub efficiency: Vec<EfficiencyPoint>,
    /// Radiometer check.
    pub radiometer: RadiometerCheck,
    /// Every injection (RF frequency, Hz; injected SNR; recovered grand value). Only this file
    /// knows them: nothing else the campaign writes lists the frequencies.
    pub injections: Vec<InjectionRecord>,
}

/// One injected axion and what came out.
#[derive(Debug, Clone, serde::Serialize, serde::Deserialize)]
pub struct InjectionRecord {
    /// Axion frequency, Hz.
    pub freq_hz: f64,
    /// Injected amplitude in reference-axion units.
    pub amplitude: f64,
    /// Injected SNR (0 for the eta injections, whose SNR is `spec.eta_snr` before eta).
    pub snr: f64,
    /// Recovered filtered amplitude at the line's start bin.
    pub recovered: f64,
    /// Grand-spectrum value there.
    pub grand: f64,
}

/// Errors of a campaign.
#[derive(Debug, thiserror::Error)]
pub enum CalibrationError {
    /// A reduction failed.
    #[error(transparent)]
    Reduce(#[from] ReduceError),
    /// A simulated night could not be written.
    #[error(transparent)]
    RunFile(#[from] crate::runfile::RunFileError),
    /// The plan or the night cannot be calibrated.
    #[error("{0}")]
    Unusable(String),
}

/// The per-bin reference for injections, from the first null reduction.
#[derive(Debug, Clone, serde::Serialize, serde::Deserialize)]
struct Reference {
    rf_start_hz: f64,
    bin_width_hz: f64,
    /// sigma_A * predicted spread per bin (NaN where not covered), stored as IEEE-754 bits.
    #[serde(with = "crate::shard::bits")]
    sigma_eff: Vec<f64>,
    /// Bins in which a line may start: fully covered, away from the edges.
    slots: Vec<usize>,
}

impl Reference {
    fn from_null(r: &Reduction, spacing_bins: usize) -> Result<Self, CalibrationError> {
        let sp = &r.spectrum;
        let sigma_eff: Vec<f64> = sp.sigma_a.iter().zip(&sp.predicted_spread).map(|(s, p)| s * p).collect();
        let covered = |j: usize| sp.coverage.get(j).is_some_and(|&c| c > 0) && sigma_eff[j].is_finite();
        let n = sigma_eff.len();
        let slots: Vec<usize> = (spacing_bins..n.saturating_sub(spacing_bins)).step_by(spacing_bins).filter(|&j| covered(j)).collect();
        if slots.is_empty() {
            return Err(CalibrationError::Unusable(format!("the night's RF span ({n} bins) is too short for injections {spacing_bins} bins apart")));
        }
        Ok(Self { rf_start_hz: sp.rf_start_hz, bin_width_hz: sp.bin_width_hz, sigma_eff, slots })
    }

    /// Random axion frequencies for one realisation: one per slot, jittered by up to a quarter
    /// slot, then a random start inside the bin. Returns (bin, frequency).
    fn draw(&self, rng: &mut StdRng, spacing_bins: usize, count: usize) -> Vec<(usize, f64)> {
        let mut slots = self.slots.clone();
        for i in (1..slots.len()).rev() {
            slots.swap(i, rng.random_range(0..=i));
        }
        let jitter = (spacing_bins / 4) as i64;
        slots
            .into_iter()
            .take(count)
            .filter_map(|s| {
                let j = (s as i64 + rng.random_range(-jitter..=jitter)) as usize;
                self.sigma_eff.get(j).filter(|v| v.is_finite())?;
                let lower_edge_hz = self.rf_start_hz + (j as f64 - 0.5) * self.bin_width_hz;
                Some((j, lower_edge_hz + rng.random::<f64>() * self.bin_width_hz))
            })
            .collect()
    }
}

/// One reduction of the campaign with injections.
struct Job {
    /// Realisation index (seeds the noise of simulated nights and the injected frequencies).
    realisation: usize,
    kind: JobKind,
}

#[derive(Clone, Copy)]
enum JobKind {
    /// Strong injections for eta.
    Eta,
    /// Injections at this SNR for the efficiency curve.
    Efficiency(f64),
}

/// What a campaign knows once its null and eta realisations are reduced: everything except
/// the efficiency curve. The efficiency realisations need it (their injected amplitudes
/// depend on the reference and on eta), so a sharded campaign computes it first, in one shard.
#[derive(Debug, Clone, serde::Serialize, serde::Deserialize)]
pub struct CampaignHead {
    reference: Reference,
    /// Threshold of the configured flag stage.
    pub threshold: f64,
    /// Null spread and KS test.
    pub null: NullSpread,
    /// Signal attenuation.
    pub attenuation: Attenuation,
    /// Radiometer check.
    pub radiometer: RadiometerCheck,
    /// Records of the eta injections, in realisation order.
    pub eta_records: Vec<InjectionRecord>,
}

/// Reductions of a campaign: (null and eta realisations, efficiency realisations).
pub fn campaign_size(spec: &CampaignSpec) -> (usize, usize) {
    (spec.null_realisations.max(1) + spec.eta_realisations, spec.snr_grid.len() * spec.realisations_per_snr)
}

/// Runs a campaign. `progress` is called with (reductions done, total).
pub fn calibrate(plan: &Plan, noise: &NoiseSource, spec: &CampaignSpec, progress: &(dyn Fn(usize, usize) + Sync)) -> Result<Calibration, CalibrationError> {
    let (head_count, efficiency_count) = campaign_size(spec);
    let total = head_count + efficiency_count;
    let done = std::sync::atomic::AtomicUsize::new(0);
    let tick = || progress(done.fetch_add(1, std::sync::atomic::Ordering::Relaxed) + 1, total);
    let head = head_with(plan, noise, spec, &tick)?;
    let efficiency_records = efficiency_with(plan, noise, spec, &head, 0..efficiency_count, &tick)?;
    Ok(assemble(plan, noise, spec, head, efficiency_records))
}

/// Reduces the null and eta realisations of a campaign. `progress` as for [`calibrate`].
pub fn campaign_head(
    plan: &Plan,
    noise: &NoiseSource,
    spec: &CampaignSpec,
    progress: &(dyn Fn(usize, usize) + Sync),
) -> Result<CampaignHead, CalibrationError> {
    let total = campaign_size(spec).0;
    let done = std::sync::atomic::AtomicUsize::new(0);
    head_with(plan, noise, spec, &|| progress(done.fetch_add(1, std::sync::atomic::Ordering::Relaxed) + 1, total))
}

/// Reduces the efficiency realisations `jobs` (indices into the campaign's efficiency jobs,
/// SNR-major: job k has SNR `snr_grid[k / realisations_per_snr]`) and returns their
/// injection records in job order; each job is seeded by its realisation alone, so any
/// split of the jobs gives the same records.
pub fn campaign_efficiency(
    plan: &Plan,
    noise: &NoiseSource,
    spec: &CampaignSpec,
    head: &CampaignHead,
    jobs: std::ops::Range<usize>,
    progress: &(dyn Fn(usize, usize) + Sync),
) -> Result<Vec<InjectionRecord>, CalibrationError> {
    let total = jobs.len();
    let done = std::sync::atomic::AtomicUsize::new(0);
    efficiency_with(plan, noise, spec, head, jobs, &|| progress(done.fetch_add(1, std::sync::atomic::Ordering::Relaxed) + 1, total))
}

fn head_with(plan: &Plan, noise: &NoiseSource, spec: &CampaignSpec, tick: &(dyn Fn() + Sync)) -> Result<CampaignHead, CalibrationError> {
    let info = PlanInfo::from_plan(plan).map_err(CalibrationError::Unusable)?;
    let spacing = info.injection_spacing_bins();
    // Null realisations (at least one: it fixes the per-bin reference).
    let nulls: Vec<Reduction> = (0..spec.null_realisations.max(1))
        .into_par_iter()
        .map(|r| {
            let out = reduce_realisation(plan, noise, r, None);
            tick();
            out
        })
        .collect::<Result<_, _>>()?;
    let reference = Reference::from_null(&nulls[0], spacing)?;
    let threshold = nulls[0].spectrum.threshold.ok_or_else(|| CalibrationError::Unusable("the plan has no flag stage".into()))?;
    let null = null_spread(&nulls);
    let jobs: Vec<Job> = (0..spec.eta_realisations).map(|i| Job { realisation: spec.null_realisations.max(1) + i, kind: JobKind::Eta }).collect();
    let eta_records = run_jobs(plan, noise, spec, &info, &reference, &jobs, 1.0, tick)?;
    let attenuation = attenuation(&eta_records)?;
    let radiometer = radiometer::check(&nulls[0], &info, &reference.slots, attenuation.eta);
    Ok(CampaignHead { reference, threshold, null, attenuation, radiometer, eta_records })
}

fn efficiency_with(
    plan: &Plan,
    noise: &NoiseSource,
    spec: &CampaignSpec,
    head: &CampaignHead,
    jobs: std::ops::Range<usize>,
    tick: &(dyn Fn() + Sync),
) -> Result<Vec<InjectionRecord>, CalibrationError> {
    let info = PlanInfo::from_plan(plan).map_err(CalibrationError::Unusable)?;
    let first_efficiency = campaign_size(spec).0;
    let per_snr = spec.realisations_per_snr.max(1);
    let jobs: Vec<Job> =
        jobs.filter_map(|k| spec.snr_grid.get(k / per_snr).map(|&snr| Job { realisation: first_efficiency + k, kind: JobKind::Efficiency(snr) })).collect();
    run_jobs(plan, noise, spec, &info, &head.reference, &jobs, head.attenuation.eta, tick)
}

/// The calibration from a campaign's head and all its efficiency records (in job order).
pub fn assemble(plan: &Plan, noise: &NoiseSource, spec: &CampaignSpec, head: CampaignHead, efficiency_records: Vec<InjectionRecord>) -> Calibration {
    let efficiency = efficiency_curve(&spec.snr_grid, &efficiency_records, head.threshold);
    Calibration {
        version: CALIBRATION_VERSION,
        tool_version: env!("CARGO_PKG_VERSION").into(),
        stage_hash: stage_hash(plan),
        noise: match noise {
            NoiseSource::Simulated { .. } => "simulated".into(),
            NoiseSource::Recorded(_) => "recorded".into(),
        },
        threshold: head.threshold,
        spec: spec.clone(),
        null: head.null,
        attenuation: head.attenuation,
        efficiency,
        radiometer: head.radiometer,
        injections: head.eta_records.into_iter().chain(efficiency_records).collect(),
    }
}

/// Runs injection jobs in parallel; the records come back in job order.
#[allow(clippy::too_many_arguments)]
fn run_jobs(
    plan: &Plan,
    noise: &NoiseSource,
    spec: &CampaignSpec,
    info: &PlanInfo,
    reference: &Reference,
    jobs: &[Job],
    eta: f64,
    tick: &(dyn Fn() + Sync),
) -> Result<Vec<InjectionRecord>, CalibrationError> {
    let spacing = info.injection_spacing_bins();
    let per_job: Vec<Vec<InjectionRecord>> = jobs
        .par_iter()
        .map(|job| {
            let mut rng = StdRng::seed_from_u64(spec.seed ^ 0xA5A5_5A5A_0000_0000 ^ job.realisation as u64);
            let (snr, record_snr) = match job.kind {
                JobKind::Eta => (spec.eta_snr, 0.0),
                JobKind::Efficiency(snr) => (snr, snr),
            };
            let placed = reference.draw(&mut rng, spacing, spec.max_injections_per_realisation);
            let amplitudes: Vec<f64> = placed.iter().map(|&(j, _)| snr * reference.sigma_eff[j] / eta).collect();
            let injection = Injection {
                axions: placed.iter().zip(&amplitudes).map(|(&(_, f), &a)| SyntheticAxion { freq_hz: f, g_gamma: info.reference_g_gamma * a.sqrt() }).collect(),
                model: info.signal_model(),
            };
            let r = reduce_realisation(plan, noise, job.realisation, Some(&injection))?;
            tick();
            Ok(placed
                .iter()
                .zip(&amplitudes)
                .map(|(&(j, f), &a)| InjectionRecord {
                    freq_hz: f,
                    amplitude: a,
                    snr: record_snr,
                    recovered: r.spectrum.amplitude[j],
                    grand: r.spectrum.grand[j],
                })
                .collect())
        })
        .collect::<Result<_, CalibrationError>>()?;
    Ok(per_job.into_iter().flatten().collect())
}

fn reduce_realisation(plan: &Plan, noise: &NoiseSource, realisation: usize, injection: Option<&Injection>) -> Result<Reduction, CalibrationError> {
    match noise {
        NoiseSource::Recorded(paths) => Ok(reduce_injected(plan, paths, injection, &|_, _| {})?),
        NoiseSource::Simulated { scenario, scratch } => {
            let mut sc = (*scenario).clone();
            sc.seed = scenario.seed.wrapping_add(realisation as u64);
            sc.axion.clear();
            let path = scratch.join(format!("realisation-{realisation}.h5"));
            simulate(&sc, &path)?;
            let out = reduce_injected(plan, std::slice::from_ref(&path), injection, &|_, _| {});
            let _ = std::fs::remove_file(&path);
            Ok(out?)
        }
    }
}

fn null_spread(nulls: &[Reduction]) -> NullSpread {
    let all: Vec<f64> = nulls.iter().flat_map(|r| r.spectrum.grand.iter().copied().filter(|v| v.is_finite())).collect();
    let (mean, std) = crate::stats::mean_std(&all);
    let thinned: Vec<f64> = nulls.iter().flat_map(|r| r.spectrum.grand.iter().copied().filter(|v| v.is_finite()).step_by(KS_THINNING_BINS)).collect();
    NullSpread { mean, std, correction: 1.0 / std, n_bins: all.len(), ks: ks_unit_normal(&thinned) }
}

fn attenuation(records: &[InjectionRecord]) -> Result<Attenuation, CalibrationError> {
    let ratios: Vec<f64> = records.iter().map(|r| r.recovered / r.amplitude).filter(|v| v.is_finite()).collect();
    if ratios.is_empty() {
        return Err(CalibrationError::Unusable("no eta injection was recovered: give eta_realisations > 0".into()));
    }
    let (eta, spread) = crate::stats::mean_std(&ratios);
    Ok(Attenuation { eta, spread, standard_error: spread / (ratios.len() as f64).sqrt(), n: ratios.len() })
}

fn efficiency_curve(grid: &[f64], records: &[InjectionRecord], threshold: f64) -> Vec<EfficiencyPoint> {
    let normal = Normal::standard();
    grid.iter()
        .map(|&snr| {
            let at: Vec<&InjectionRecord> = records.iter().filter(|r| r.snr == snr).collect();
            let n = at.len();
            let detected = at.iter().filter(|r| r.grand > threshold).count();
            let ideal = normal.cdf(snr - threshold);
            EfficiencyPoint {
                snr,
                n,
                detected,
                efficiency: detected as f64 / n.max(1) as f64,
                standard_error: (ideal * (1.0 - ideal) / n.max(1) as f64).sqrt(),
                ideal,
            }
        })
        .collect()
}

impl Calibration {
    /// Writes `calibration.json`, `efficiency.csv` and the efficiency plot (PNG and SVG) into
    /// `dir`, each under a temporary name first. Returns the written paths.
    pub fn write(&self, dir: &Path) -> anyhow::Result<Vec<PathBuf>> {
        use anyhow::Context;
        std::fs::create_dir_all(dir).with_context(|| format!("cannot create {}", dir.display()))?;
        let names = ["calibration.json", "efficiency.csv", "efficiency.png", "efficiency.svg"];
        let tmp = |n: &str| dir.join(format!(".tmp.{n}"));
        std::fs::write(tmp(names[0]), serde_json::to_string_pretty(self)?)?;
        let mut w = csv::Writer::from_path(tmp(names[1]))?;
        w.write_record(["snr", "n", "detected", "efficiency", "standard_error", "ideal"])?;
        for p in &self.efficiency {
            w.write_record([
                p.snr.to_string(),
                p.n.to_string(),
                p.detected.to_string(),
                format!("{:.4}", p.efficiency),
                format!("{:.4}", p.standard_error),
                format!("{:.4}", p.ideal),
            ])?;
        }
        w.flush()?;
        drop(w);
        plot::efficiency(self, &tmp(names[2]), &tmp(names[3]))?;
        names
            .iter()
            .map(|n| {
                let to = dir.join(n);
                std::fs::rename(tmp(n), &to).with_context(|| format!("renaming into {}", to.display()))?;
                Ok(to)
            })
            .collect()
    }

    /// Reads a calibration file and checks it belongs to `plan`.
    pub fn load_for(path: &Path, plan: &Plan) -> Result<Self, String> {
        let text = std::fs::read_to_string(path).map_err(|e| format!("{}: {e}", path.display()))?;
        let cal: Calibration = serde_json::from_str(&text).map_err(|e| format!("{}: not a calibration file: {e}", path.display()))?;
        if cal.version != CALIBRATION_VERSION {
            return Err(format!("{}: calibration version {} (this build reads {CALIBRATION_VERSION})", path.display(), cal.version));
        }
        let here = stage_hash(plan);
        if cal.stage_hash != here {
            return Err(format!(
                "{}: made with a different pipeline (baseline, filter or flag options differ: stage hash {} here, {} in the calibration); rerun the calibration with this pipeline",
                path.display(),
                &here[..12],
                &cal.stage_hash[..cal.stage_hash.len().min(12)]
            ));
        }
        Ok(cal)
    }
}

//! Runs a plan over run files: a survey pass if a stage needs one, then streaming per-step
//! processing in chunks (parallel within a chunk, combined in step order so results do not
//! depend on the thread count), then the spectrum stages.

use crate::config::{Built, Plan};
use crate::inject::{SignalModel, SyntheticAxion};
use crate::physics::constants::BOLTZMANN_J_PER_K;
use crate::physics::signal::{CavityState, Haloscope};
use crate::runfile::{RunFileError, RunReader, StepMeta};
use crate::stage::{Combiner, NightInfo, Spectrum, SpectrumStage, Step, StepStage, Verdict};
use rayon::prelude::*;
use std::path::PathBuf;

/// Steps read and processed together.
const CHUNK_STEPS: usize = 64;

/// A step removed by a stage, with the reason.
#[derive(Debug, Clone, serde::Serialize)]
pub struct CutStep {
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

/// The result of a reduction.
#[derive(Debug)]
pub struct Reduction {
    /// The combined and filtered spectrum with candidates.
    pub spectrum: Spectrum,
    /// Steps read.
    pub n_steps_in: usize,
    /// Steps that reached the combination.
    pub used_steps: Vec<(usize, StepMeta)>,
    /// Steps cut, with reasons.
    pub cuts: Vec<CutStep>,
    /// Night-wide facts.
    pub night: NightInfo,
}

/// Errors of a reduction run.
#[derive(Debug, thiserror::Error)]
pub enum ReduceError {
    /// A run file could not be read.
    #[error(transparent)]
    RunFile(#[from] RunFileError),
    /// Files that cannot be reduced together, or a stage failure.
    #[error("{0}")]
    Night(String),
}

/// Opens every run file and gathers the night-wide facts.
///
/// Night-level rules, checked before any spectrum is read: at least one file; no file given
/// twice; every file has the same `bin_width_hz` and number of bins as the first; no step
/// appears in two files (same `timestamp_s` and `start_freq_hz`: a copied or re-exported
/// file); and the RF
/// grid spanned by all steps stays within [`crate::runfile::MAX_RF_BINS`] bins. Whether each
/// step lies on the bin grid is checked by the combining stage, with its configured tolerance.
pub fn open_night(paths: &[PathBuf]) -> Result<(Vec<RunReader>, NightInfo), ReduceError> {
    if paths.is_empty() {
        return Err(ReduceError::Night("no run files given".into()));
    }
    for (i, p) in paths.iter().enumerate() {
        let same = |q: &PathBuf| q == p || matches!((std::fs::canonicalize(q), std::fs::canonicalize(p)), (Ok(a), Ok(b)) if a == b);
        if let Some(q) = paths[..i].iter().find(|q| same(q)) {
            return Err(ReduceError::Night(format!("{}: given twice (also as {}); each run file may be reduced once", p.display(), q.display())));
        }
    }
    let readers = paths.iter().map(|p| RunReader::open(p)).collect::<Result<Vec<_>, _>>()?;
    let first = &readers[0];
    let (bw, n_bins) = (first.header().bin_width_hz, first.n_bins());
    for r in &readers[1..] {
        if r.header().bin_width_hz != bw {
            return Err(ReduceError::Night(format!(
                "{}: field `bin_width_hz` = {} Hz differs from {} ({} Hz); files of one reduction must share the bin width",
                r.path().display(),
                r.header().bin_width_hz,
                first.path().display(),
                bw
            )));
        }
        if r.n_bins() != n_bins {
            return Err(ReduceError::Night(format!(
                "{}: field `spectra` has {} bins per step, {} has {}; files of one reduction must share the number of bins",
                r.path().display(),
                r.n_bins(),
                first.path().display(),
                n_bins
            )));
        }
    }
    let mut seen = std::collections::HashMap::new();
    for r in &readers {
        for (i, m) in r.steps().iter().enumerate() {
            if let Some((q, j)) = seen.insert((m.timestamp_s.to_bits(), m.start_freq_hz.to_bits()), (r.path(), i)) {
                return Err(ReduceError::Night(format!(
                    "{}: field `steps/timestamp_s`, step {i}: duplicate of step {j} of {} (same timestamp_s = {} and start_freq_hz = {} Hz); each step may be reduced once",
                    r.path().display(),
                    q.display(),
                    m.timestamp_s,
                    m.start_freq_hz
                )));
            }
        }
    }
    let starts = readers.iter().flat_map(|r| r.steps().iter().map(|s| s.start_freq_hz));
    let (lo, hi) = starts.fold((f64::INFINITY, f64::NEG_INFINITY), |(lo, hi), f| (lo.min(f), hi.max(f)));
    let rf_bins = (hi - lo) / bw + n_bins as f64;
    if !(rf_bins <= crate::runfile::MAX_RF_BINS as f64) {
        let locate = |f: f64| {
            readers
                .iter()
                .find_map(|r| r.steps().iter().position(|s| s.start_freq_hz == f).map(|i| format!("{} step {i}", r.path().display())))
                .unwrap_or_default()
        };
        return Err(ReduceError::Night(format!(
            "field `steps/start_freq_hz`: the steps span {lo} Hz ({}) to {hi} Hz ({}), {rf_bins:.0} bins of {bw} Hz, more than the {} accepted; a corrupt frequency?",
            locate(lo),
            locate(hi),
            crate::runfile::MAX_RF_BINS
        )));
    }
    let night = NightInfo {
        bin_width_hz: bw,
        n_bins,
        rf_span_hz: (lo, hi + (n_bins - 1) as f64 * bw),
        headers: readers.iter().map(|r| r.header().clone()).collect(),
    };
    Ok((readers, night))
}

/// Synthetic axions added to every raw step as it is read, before any stage sees it.
#[derive(Debug, Clone)]
pub struct Injection {
    /// The axions.
    pub axions: Vec<SyntheticAxion>,
    /// Their lineshape and density.
    pub model: SignalModel,
}

impl Injection {
    fn apply(&self, step: &mut Step, night: &NightInfo) {
        let h = &night.headers[step.file];
        let scope = Haloscope { magnet_field_t: h.magnet_field_t, cavity_volume_m3: h.cavity_volume_m3, form_factor: h.form_factor };
        let m = step.meta;
        let cavity = CavityState { cavity_freq_hz: m.cavity_freq_hz, loaded_q: m.loaded_q, coupling_beta: m.coupling_beta };
        let noise_w = BOLTZMANN_J_PER_K * m.noise_temp_k * night.bin_width_hz;
        self.model.inject_into_raw(&self.axions, &scope, &cavity, m.start_freq_hz, night.bin_width_hz, noise_w, &mut step.values);
    }
}

/// Reduces the given run files with a plan. `progress` is called with (steps done, total).
pub fn reduce(plan: &Plan, paths: &[PathBuf], progress: &dyn Fn(usize, usize)) -> Result<Reduction, ReduceError> {
    reduce_injected(plan, paths, None, progress)
}

/// As [`reduce`], with synthetic axions added to the raw spectra first (for calibration).
pub fn reduce_injected(plan: &Plan, paths: &[PathBuf], injection: Option<&Injection>, progress: &dyn Fn(usize, usize)) -> Result<Reduction, ReduceError> {
    let (readers, night) = open_night(paths)?;
    let mut step_stages: Vec<(String, Box<dyn StepStage>)> = Vec::new();
    let mut combiner: Option<Box<dyn Combiner>> = None;
    let mut spectrum_stages: Vec<Box<dyn SpectrumStage>> = Vec::new();
    for (built, planned) in plan.build(&night).map_err(ReduceError::Night)?.into_iter().zip(&plan.stages) {
        match built {
            Built::Step(s) => step_stages.push((planned.entry.kind.to_string(), s)),
            Built::Combine(c) => combiner = Some(c),
            Built::Spectrum(s) => spectrum_stages.push(s),
        }
    }
    let mut combiner = combiner.ok_or_else(|| ReduceError::Night("the plan has no combine stage".into()))?;
    let total: usize = readers.iter().map(|r| r.steps().len()).sum();
    let mut cuts = Vec::new();

    // Survey passes: each surveying stage sees the output of the stages before it.
    for s in 0..step_stages.len() {
        if !step_stages[s].1.needs_survey() {
            continue;
        }
        let mut cut_here = Vec::new();
        for_each_chunk(&readers, &night, injection, |chunk| {
            let (before, rest) = step_stages.split_at_mut(s);
            let kept = run_stages(before, chunk, &night, &mut cut_here, paths);
            for step in kept {
                rest[0].1.survey(step);
            }
            Ok(())
        })?;
        step_stages[s].1.finish_survey().map_err(|e| ReduceError::Night(format!("stage \"{}\": {e}", step_stages[s].0)))?;
    }

    let mut used_steps = Vec::new();
    let mut done = 0;
    for_each_chunk(&readers, &night, injection, |chunk| {
        let n = chunk.len();
        let kept = run_stages(&mut step_stages, chunk, &night, &mut cuts, paths);
        for step in kept {
            combiner.add(step).map_err(ReduceError::Night)?;
            used_steps.push((step.index, step.meta));
        }
        done += n;
        progress(done, total);
        Ok(())
    })?;
    let mut spectrum = combiner.finish();
    for stage in &spectrum_stages {
        stage.apply(&mut spectrum, &used_steps).map_err(ReduceError::Night)?;
    }
    Ok(Reduction { spectrum, n_steps_in: total, used_steps, cuts, night })
}

/// Applies `stages` to a chunk in parallel; returns the kept steps in order and records cuts.
fn run_stages<'a>(
    stages: &mut [(String, Box<dyn StepStage>)],
    chunk: &'a mut [Step],
    night: &NightInfo,
    cuts: &mut Vec<CutStep>,
    paths: &[PathBuf],
) -> Vec<&'a Step> {
    let stages: &[(String, Box<dyn StepStage>)] = stages;
    let verdicts: Vec<Option<(String, String)>> = chunk
        .par_iter_mut()
        .map(|step| {
            stages.iter().find_map(|(kind, stage)| match stage.apply(step, night) {
                Verdict::Keep => None,
                Verdict::Cut(reason) => Some((kind.clone(), reason)),
            })
        })
        .collect();
    let mut kept = Vec::new();
    for (step, verdict) in chunk.iter().zip(verdicts) {
        match verdict {
            None => kept.push(step),
            Some((stage, reason)) => {
                if !cuts.iter().any(|c| c.step == step.index) {
                    cuts.push(CutStep { step: step.index, file: paths[step.file].clone(), row: step.index_in_file, stage, reason });
                }
            }
        }
    }
    kept
}

/// Reads every file in chunks of rows, adds the injection if any, and hands each chunk of
/// fresh steps to `f`.
fn for_each_chunk(
    readers: &[RunReader],
    night: &NightInfo,
    injection: Option<&Injection>,
    mut f: impl FnMut(&mut [Step]) -> Result<(), ReduceError>,
) -> Result<(), ReduceError> {
    let mut index = 0;
    for (file, reader) in readers.iter().enumerate() {
        let n = reader.steps().len();
        for start in (0..n).step_by(CHUNK_STEPS) {
            let end = (start + CHUNK_STEPS).min(n);
            let rows = reader.read_rows(start..end)?;
            let mut chunk: Vec<Step> = rows
                .outer_iter()
                .enumerate()
                .map(|(r, row)| Step {
                    index: index + r,
                    file,
                    index_in_file: start + r,
                    meta: reader.steps()[start + r],
                    values: row.to_vec(),
                    sigma: Vec::new(),
                })
                .collect();
            index += end - start;
            if let Some(injection) = injection {
                chunk.par_iter_mut().for_each(|step| injection.apply(step, night));
            }
            f(&mut chunk)?;
        }
    }
    Ok(())
}

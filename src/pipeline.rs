//! Runs a plan over run files: a survey pass if a stage needs one, then streaming per-step
//! processing in chunks (parallel within a chunk, combined in step order so results do not
//! depend on the thread count), then the spectrum stages.

use crate::config::{Built, Plan};
use crate::inject::{SignalModel, SyntheticAxion};
use crate::physics::constants::BOLTZMANN_J_PER_K;
use crate::physics::signal::{CavityState, Haloscope};
use crate::runfile::{RunFileError, RunReader, StepMeta, StoredPower, StoredRows};
use crate::simd::per_bin_loop;
use crate::stage::no_data::{NoDataBins, NoDataTally};
use crate::stage::{Combiner, NightInfo, Spectrum, SpectrumStage, Step, StepStage, Verdict};
use rayon::prelude::*;
use std::path::PathBuf;
use std::sync::mpsc;

mod finisher;
mod schedule;
mod streamed;

pub use streamed::{ProfiledBlockDone, reduce_streamed, reduce_streamed_profiled};

/// Steps read and processed together per thread of the pool: a chunk holds this many times
/// the number of threads (4 steps of 32768 bins on 2 cores: 0.5 MB as f32 on disk, 2 MB of
/// step buffers as f64 values and f32 z and 1 / sigma in each of the two buffer sets). Small
/// chunks keep the steps in the processor's caches between the stages and the accumulations
/// (16 steps per chunk took 13 % more CPU time on 2 cores); the results do not depend on the
/// chunk size, since every accumulation takes the steps in their order.
const STEPS_PER_THREAD: usize = 2;
/// Chunks read ahead of the computation; with the chunk being processed and the one being
/// absorbed this bounds the spectra in memory to (2 + this) chunks, whatever the number of
/// steps.
const READ_AHEAD_CHUNKS: usize = 2;

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
    /// The night's IF profile (interference fixed in IF) over the combined steps.
    pub if_scan: crate::state::IfScan,
    /// Bins without data in the steps read, by cause.
    pub no_data: NoDataTally,
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
        if r.header().bin_correlation != first.header().bin_correlation {
            return Err(ReduceError::Night(format!(
                "{}: field `bin_correlation` = {:?} differs from {} ({:?}); files of one reduction must come from the same spectrum estimator (window and overlap)",
                r.path().display(),
                r.header().bin_correlation,
                first.path().display(),
                first.header().bin_correlation
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
        bin_correlation: first.header().bin_correlation.clone(),
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

/// Reduces the given run files with a plan. `progress` is called with (steps done, total),
/// from a thread of the pool.
pub fn reduce(plan: &Plan, paths: &[PathBuf], progress: &(dyn Fn(usize, usize) + Sync)) -> Result<Reduction, ReduceError> {
    reduce_injected(plan, paths, None, progress)
}

/// As [`reduce`], with synthetic axions added to the raw spectra first (for calibration).
pub fn reduce_injected(
    plan: &Plan,
    paths: &[PathBuf],
    injection: Option<&Injection>,
    progress: &(dyn Fn(usize, usize) + Sync),
) -> Result<Reduction, ReduceError> {
    let mut buffers: [Vec<Step>; 2] = Default::default();
    let Prepared { readers, night, step_stages, mut combiner, spectrum_stages, total } = prepare(plan, paths, injection, &mut buffers)?;
    let mut cuts = Vec::new();
    let mut used_steps = Vec::new();
    let mut no_data = NoDataTally::default();
    let mut if_profile = crate::state::IfProfile::new(&night);
    let mut done = 0;
    stream_chunks::<()>(
        &readers,
        &night,
        injection,
        &mut buffers,
        |chunk, fresh| run_stages(&step_stages, chunk, fresh, &night, &mut cuts, &mut no_data, paths),
        |kept, _| {
            let (combined, ()) = rayon::join(|| combiner.add_all(kept).map_err(ReduceError::Night), || if_profile.add_all(kept));
            used_steps.extend(kept.iter().map(|step| (step.index, step.meta)));
            combined.map(|()| Vec::new())
        },
        |n| {
            done += n;
            progress(done, total);
        },
        None,
    )?;
    drop(buffers);
    let mut spectrum = combiner.finish();
    for stage in &spectrum_stages {
        stage.apply(&mut spectrum, &used_steps).map_err(ReduceError::Night)?;
    }
    Ok(Reduction { spectrum, n_steps_in: total, used_steps, cuts, night, if_scan: if_profile.finish(), no_data })
}

/// A night opened, its plan built and its survey passes made: ready for the main pass.
struct Prepared {
    readers: Vec<RunReader>,
    night: NightInfo,
    step_stages: Vec<(String, Box<dyn StepStage>)>,
    combiner: Box<dyn Combiner>,
    spectrum_stages: Vec<Box<dyn SpectrumStage>>,
    /// Steps in all files.
    total: usize,
}

/// Opens the night, builds the plan and runs the survey passes (each surveying stage sees
/// the output of the stages before it), with `buffers` as step buffers. The survey passes'
/// cuts are not kept: the main pass makes them again.
fn prepare(plan: &Plan, paths: &[PathBuf], injection: Option<&Injection>, buffers: &mut [Vec<Step>; 2]) -> Result<Prepared, ReduceError> {
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
    let combiner = combiner.ok_or_else(|| ReduceError::Night("the plan has no combine stage".into()))?;
    let total: usize = readers.iter().map(|r| r.steps().len()).sum();
    for s in 0..step_stages.len() {
        if !step_stages[s].1.needs_survey() {
            continue;
        }
        let mut cut_here = Vec::new();
        // The main pass below counts the no-data bins; the survey's count is not kept.
        let mut no_data_here = NoDataTally::default();
        let (before, rest) = step_stages.split_at_mut(s);
        let surveyor = &mut rest[0].1;
        stream_chunks::<()>(
            &readers,
            &night,
            injection,
            buffers,
            |chunk, fresh| run_stages(before, chunk, fresh, &night, &mut cut_here, &mut no_data_here, paths),
            |kept, _| {
                surveyor.survey_all(kept);
                Ok(Vec::new())
            },
            |_| {},
            None,
        )?;
        step_stages[s].1.finish_survey().map_err(|e| ReduceError::Night(format!("stage \"{}\": {e}", step_stages[s].0)))?;
    }
    Ok(Prepared { readers, night, step_stages, combiner, spectrum_stages, total })
}

/// Loads each step of a chunk from `fresh` and applies `stages` to it, in parallel (loading
/// and stages in one task per step, so the step's bins are still in that core's cache);
/// returns which steps were kept and records cuts and, in step order, no-data bins.
fn run_stages(
    stages: &[(String, Box<dyn StepStage>)],
    chunk: &mut [Step],
    fresh: &Fresh<'_>,
    night: &NightInfo,
    cuts: &mut Vec<CutStep>,
    no_data: &mut NoDataTally,
    paths: &[PathBuf],
) -> Vec<bool> {
    let verdicts: Vec<Option<(String, String)>> = chunk
        .par_iter_mut()
        .enumerate()
        .map(|(r, step)| {
            fresh.load(r, step);
            stages.iter().find_map(|(kind, stage)| match stage.apply(step, night) {
                Verdict::Keep => None,
                Verdict::Cut(reason) => Some((kind.clone(), reason)),
            })
        })
        .collect();
    let mut kept = Vec::with_capacity(chunk.len());
    for (step, verdict) in chunk.iter().zip(verdicts) {
        kept.push(verdict.is_none());
        no_data.add(&paths[step.file], step.index_in_file, step.no_data);
        // A step is cut once, by the first stage that cuts it.
        if let Some((stage, reason)) = verdict
            && !cuts.iter().any(|c| c.step == step.index)
        {
            cuts.push(CutStep { step: step.index, file: paths[step.file].clone(), row: step.index_in_file, stage, reason });
        }
    }
    kept
}

/// Replaces `out` with row `r` of `power`, as f64 (f32 rows stay narrow until widened into
/// a step, which halves what waits in the read-ahead queue).
fn widen_row_into(power: &StoredPower, r: usize, out: &mut Vec<f64>) {
    out.clear();
    // Rows of a freshly read array are contiguous; the slice form lets the loop vectorise.
    match power {
        StoredPower::F32(a) => match a.row(r).as_slice() {
            Some(row) => widen(row, out),
            None => out.extend(a.row(r).iter().map(|&p| f64::from(p))),
        },
        StoredPower::F64(a) => match a.row(r).as_slice() {
            Some(row) => out.extend_from_slice(row),
            None => out.extend(a.row(r).iter().copied()),
        },
    }
}

per_bin_loop! {
    /// Appends `row` to `out`, widened to f64.
    fn widen(row: &[f32], out: &mut Vec<f64>) {
        out.extend(row.iter().map(|&p| f64::from(p)));
    }
}

/// A chunk of rows in flight from the reading thread.
struct RawChunk {
    /// Index of the file.
    file: usize,
    /// Row of the chunk's first step in that file.
    first_row: usize,
    /// Global index of the chunk's first step.
    first_index: usize,
    rows: StoredRows,
}

/// The stored rows of a chunk, and how to turn row `r` into the values of a fresh step.
struct Fresh<'a> {
    raw: &'a RawChunk,
    night: &'a NightInfo,
    injection: Option<&'a Injection>,
}

impl Fresh<'_> {
    /// Replaces the values of `step` (row `r` of the chunk, its metadata already set) with the
    /// stored row widened to f64, and adds the injection if any.
    fn load(&self, r: usize, step: &mut Step) {
        widen_row_into(&self.raw.rows.power, r, &mut step.values);
        step.no_data = NoDataBins { masked: self.raw.rows.masked_per_row[r], ..NoDataBins::default() };
        if let Some(injection) = self.injection {
            injection.apply(step, self.night);
        }
    }
}

/// Output work handed to the reading thread, so that every HDF5 call of a pass happens
/// there: `write` is called with each job in the order they were made, between reads.
type Writer<'a, J> = &'a mut (dyn FnMut(J) -> Result<(), String> + Send);

/// Reads every file in chunks of rows ([`STEPS_PER_THREAD`] per thread of the pool) on one
/// thread (every HDF5 call of the pass happens there) and streams them through two stages of
/// work. Each chunk's steps (buffers reused, alternating between the two sets of `buffers`)
/// get their metadata here and go to
/// `process` with the rows they are to be loaded from ([`Fresh`]); `process` says which were
/// kept. Meanwhile the previous chunk's kept steps, in step order, go to `absorb` with the
/// global index of the chunk's last step: the two run side by side on the thread pool, so no
/// core waits at the end of either. Every chunk reaches `absorb` in order, so whatever
/// `absorb` accumulates does not depend on the thread count. The jobs `absorb` returns go
/// to `write` on the reading thread (none may be returned without a `write`).
/// `done` is told the number of steps of each chunk processed. Reading runs ahead of the
/// computation by at most [`READ_AHEAD_CHUNKS`] chunks.
#[allow(clippy::too_many_arguments)]
fn stream_chunks<J: Send>(
    readers: &[RunReader],
    night: &NightInfo,
    injection: Option<&Injection>,
    buffers: &mut [Vec<Step>; 2],
    mut process: impl FnMut(&mut [Step], &Fresh<'_>) -> Vec<bool> + Send,
    mut absorb: impl FnMut(&[&Step], usize) -> Result<Vec<J>, ReduceError> + Send,
    mut done: impl FnMut(usize) + Send,
    write: Option<Writer<'_, J>>,
) -> Result<(), ReduceError> {
    let chunk_steps = STEPS_PER_THREAD * rayon::current_num_threads();
    std::thread::scope(|scope| {
        let (sender, receiver) = mpsc::sync_channel::<Result<RawChunk, RunFileError>>(READ_AHEAD_CHUNKS);
        let (jobs, job_queue) = mpsc::channel::<J>();
        let reading = scope.spawn(move || -> Result<(), String> {
            let mut write = write;
            let mut write_one = |job: J| write.as_mut().map_or(Ok(()), |w| w(job));
            let mut first_index = 0;
            for (file, reader) in readers.iter().enumerate() {
                let n = reader.steps().len();
                for first_row in (0..n).step_by(chunk_steps) {
                    job_queue.try_iter().try_for_each(&mut write_one)?;
                    let rows = first_row..(first_row + chunk_steps).min(n);
                    let count = rows.len();
                    let read = reader.read_stored_rows(rows);
                    let failed = read.is_err();
                    // A closed channel means the consumer stopped on an error of its own.
                    if sender.send(read.map(|rows| RawChunk { file, first_row, first_index, rows })).is_err() || failed {
                        return Ok(());
                    }
                    first_index += count;
                }
            }
            drop(sender);
            // The jobs of the last chunks, until the computation is over.
            job_queue.iter().try_for_each(&mut write_one)
        });
        // Moves `jobs` in, so the queue closes when the computation ends.
        // On a worker of the pool: each chunk's join then hands one half to the other worker
        // directly, where from outside the pool every join would put the calling thread to
        // sleep and wake it again (2.5x the context switches and 10-20 % more CPU time on the
        // wide night).
        let computed = rayon::scope(move |_| -> Result<(), ReduceError> {
            let [even, odd] = buffers;
            // The previous chunk: its first global index, number of steps and which were kept.
            let mut previous_chunk: Option<(usize, usize, Vec<bool>)> = None;
            let mut current_is_odd = false;
            let send = |made: Vec<J>| {
                made.into_iter().for_each(|job| {
                    // A closed queue means the writer stopped on an error, reported below.
                    let _ = jobs.send(job);
                })
            };
            for raw in receiver {
                let raw = raw?;
                let n = raw.rows.masked_per_row.len();
                let (current, previous) = if current_is_odd { (&mut *odd, &*even) } else { (&mut *even, &*odd) };
                place_steps(current, &raw, &readers[raw.file]);
                let fresh = Fresh { raw: &raw, night, injection };
                let (kept, absorbed) = rayon::join(|| process(&mut current[..n], &fresh), || absorb_kept(previous, previous_chunk.as_ref(), &mut absorb));
                send(absorbed?);
                done(n);
                previous_chunk = Some((raw.first_index, n, kept));
                current_is_odd = !current_is_odd;
            }
            let last = if current_is_odd { &*even } else { &*odd };
            send(absorb_kept(last, previous_chunk.as_ref(), &mut absorb)?);
            Ok(())
        });
        let written = reading.join().unwrap_or_else(|panic| std::panic::resume_unwind(panic));
        computed?;
        written.map_err(|e| ReduceError::Night(format!("writing the outputs: {e}")))
    })
}

/// Hands the kept steps of a processed chunk (the first `n` of `steps`, `kept` saying which,
/// the first of them global step `first`) to `absorb`, in step order, with the chunk's last
/// global index; nothing if there is no such chunk.
fn absorb_kept<J>(
    steps: &[Step],
    chunk: Option<&(usize, usize, Vec<bool>)>,
    absorb: &mut impl FnMut(&[&Step], usize) -> Result<Vec<J>, ReduceError>,
) -> Result<Vec<J>, ReduceError> {
    let Some((first, n, kept)) = chunk else { return Ok(Vec::new()) };
    absorb(&steps[..*n].iter().zip(kept).filter(|(_, kept)| **kept).map(|(step, _)| step).collect::<Vec<_>>(), first + n - 1)
}

/// Sets index and metadata of the first rows of `steps` (grown if needed) for a chunk; the
/// values are loaded later, by [`Fresh::load`].
fn place_steps(steps: &mut Vec<Step>, raw: &RawChunk, reader: &RunReader) {
    let n = raw.rows.masked_per_row.len();
    let meta = &reader.steps()[raw.first_row..raw.first_row + n];
    if steps.len() < n {
        steps.resize_with(n, || Step {
            index: 0,
            file: 0,
            index_in_file: 0,
            meta: meta[0],
            values: Vec::new(),
            standard: Default::default(),
            no_data: Default::default(),
        });
    }
    for (r, (step, meta)) in steps[..n].iter_mut().zip(meta).enumerate() {
        step.index = raw.first_index + r;
        step.file = raw.file;
        step.index_in_file = raw.first_row + r;
        step.meta = *meta;
    }
}

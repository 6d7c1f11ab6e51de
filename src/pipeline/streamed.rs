//! A night reduced with its RF grid finished block by block, for outputs written as they go.

use super::finisher::Finisher;
use super::schedule::Schedule;
use super::{Prepared, ReduceError, Reduction, Writer, prepare, run_stages, stream_chunks};
use crate::config::Plan;
use crate::stage::no_data::NoDataTally;
use crate::stage::{BLOCK_BINS, Block, Spectrum, Step};
use crate::state::{IfProfile, TopSamples};
use std::path::PathBuf;

/// Reduces run files as [`super::reduce`] does, with the same results, but finishes the RF
/// grid block by block while the steps stream in: a block goes through the spectrum stages
/// as soon as the last step touching it (in file order) is combined, and then to `finished`
/// (on the computing side, blocks in grid order). Whatever `finished` returns goes to
/// `write`, called on the thread that reads the run files, between reads (so output to HDF5
/// stays on the one thread that makes HDF5 calls), in the order made. Memory: the blocks
/// the current steps touch (see [`super::finisher`] for scans that do not move up the grid).
///
/// The returned reduction's spectrum holds the grid's origin, bin width, stage facts and
/// every candidate, but no per-bin arrays (they went to `finished`), and its IF profile is
/// empty (see [`reduce_streamed_profiled`]).
pub fn reduce_streamed<J: Send>(
    plan: &Plan,
    paths: &[PathBuf],
    progress: &(dyn Fn(usize, usize) + Sync),
    finished: &mut (dyn FnMut(&Block) -> Result<Option<J>, String> + Send),
    write: Writer<'_, J>,
) -> Result<Reduction, ReduceError> {
    reduce_blocks(plan, paths, progress, false, &mut |block, _| finished(block), write)
}

/// What [`reduce_streamed_profiled`] calls with each finished block and its most
/// significant samples; returns the output job for the reading thread, if any.
pub type ProfiledBlockDone<'a, J> = dyn FnMut(&Block, Option<TopSamples>) -> Result<Option<J>, String> + Send + 'a;

/// As [`reduce_streamed`], also making the night's IF profile (for the analysis state):
/// `finished` gets each block with its most significant single-step samples (None where no
/// step touched the block), and the returned reduction's IF scan holds the profile and its
/// lines but no RF samples (they went to `finished`: [`crate::state::TopSamples::in_lines`]
/// picks those of the lines).
pub fn reduce_streamed_profiled<J: Send>(
    plan: &Plan,
    paths: &[PathBuf],
    progress: &(dyn Fn(usize, usize) + Sync),
    finished: &mut ProfiledBlockDone<'_, J>,
    write: Writer<'_, J>,
) -> Result<Reduction, ReduceError> {
    reduce_blocks(plan, paths, progress, true, finished, write)
}

fn reduce_blocks<J: Send>(
    plan: &Plan,
    paths: &[PathBuf],
    progress: &(dyn Fn(usize, usize) + Sync),
    with_profile: bool,
    finished: &mut ProfiledBlockDone<'_, J>,
    write: Writer<'_, J>,
) -> Result<Reduction, ReduceError> {
    let mut buffers: [Vec<Step>; 2] = Default::default();
    let Prepared { readers, night, step_stages, mut combiner, spectrum_stages, total } = prepare(plan, paths, None, &mut buffers)?;
    let schedule = Schedule::new(&readers, &night, combiner.grid_bins());
    let mut finisher = Finisher::new(schedule, &spectrum_stages, &*combiner, &night).map_err(ReduceError::Night)?;
    let mut profile = with_profile.then(|| IfProfile::new(&night));
    let (mut cuts, mut used_steps, mut candidates) = (Vec::new(), Vec::new(), Vec::new());
    let mut no_data = NoDataTally::default();
    let mut done = 0;
    let mut complete = false;
    stream_chunks(
        &readers,
        &night,
        None,
        &mut buffers,
        |chunk, fresh| run_stages(&step_stages, chunk, fresh, &night, &mut cuts, &mut no_data, paths),
        |kept, through| {
            match profile.as_mut() {
                Some(p) => rayon::join(|| combiner.add_all(kept).map_err(ReduceError::Night), || p.add_all(kept)).0?,
                None => combiner.add_all(kept).map_err(ReduceError::Night)?,
            }
            used_steps.extend(kept.iter().map(|step| (step.index, step.meta)));
            let mut jobs = Vec::new();
            complete = finisher
                .advance(&mut *combiner, through, &used_steps, &mut |block| {
                    candidates.extend_from_slice(&block.candidates);
                    let top = profile.as_mut().and_then(|p| p.take_block(block.first_bin / BLOCK_BINS));
                    jobs.extend(finished(block, top)?);
                    Ok(())
                })
                .map_err(ReduceError::Night)?;
            Ok(jobs)
        },
        |n| {
            done += n;
            progress(done, total);
        },
        Some(write),
    )?;
    if !complete {
        return Err(ReduceError::Night("the night's steps did not reach every block of its RF grid".into()));
    }
    drop(buffers);
    let last = finisher.last_block();
    let spectrum = Spectrum {
        rf_start_hz: last.origin_hz,
        bin_width_hz: last.bin_width_hz,
        step_span_hz: last.step_span_hz,
        mean_beta_sq: last.mean_beta_sq,
        threshold: last.threshold,
        candidates,
        ..Spectrum::default()
    };
    let if_scan = profile.map(|p| p.profile()).unwrap_or_default();
    Ok(Reduction { spectrum, n_steps_in: total, used_steps, cuts, night, if_scan, no_data })
}

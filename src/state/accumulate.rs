//! Adding nights to the state: per-night combination, accumulation into the blocks of the
//! state's RF grid that the night covers, the spectrum stages on the span that changed, and
//! candidate tracking there.

use super::interference::IfScan;
use super::night_sums::{self, NightCoverage, SumsMerger};
use super::profile_file::IfProfileRecord;
use super::rescan;
use super::span::{SparseSpectrum, Tiler};
use super::store::{FileRecord, NightRecord, State, StateError};
use super::sums::Sums;
use super::tiles::Stages;
use super::top_spill::TopSpill;
use crate::calib::PlanInfo;
use crate::config::{Plan, load};
use crate::output::Provenance;
use crate::physics::constants::BOLTZMANN_J_PER_K;
use crate::physics::signal::{CavityState, Haloscope, signal_power_w};
use crate::pipeline::{Reduction, reduce};
use crate::stage::{BLOCK_BINS, Block, Spectrum};
use sha2::{Digest, Sha256};
use std::ops::Range;
use std::path::PathBuf;

/// Target SNR of a rescan step.
pub const RESCAN_TARGET_SNR: f64 = 5.0;

/// The outcome of adding one night.
#[derive(Debug)]
pub struct Update {
    /// The accumulated spectrum (all nights so far) over the span the update recomputed,
    /// with this night's steps and cuts.
    pub reduction: Reduction,
    /// Index of the night just added.
    pub night: usize,
    /// Changes of candidate class.
    pub changes: Vec<String>,
    /// Distance within which a tracked candidate matches a grand-spectrum one (a line's
    /// mean width), Hz.
    pub match_hz: f64,
}

/// SHA-256 over every stage's kind and resolved options, in order.
pub fn plan_hash(plan: &Plan) -> String {
    let mut h = Sha256::new();
    for s in &plan.stages {
        h.update(format!("{}:{:?};", s.entry.kind, s.config));
    }
    h.finalize().iter().map(|b| format!("{b:02x}")).collect()
}

/// Adds each night (a list of run files) in order, each update's recomputed span collected
/// into its spectrum ([`collecting_span`]). The state is changed in memory only; save it
/// with [`State::save`].
pub fn add_nights(state: &mut State, plan: &Plan, nights: &[Vec<PathBuf>]) -> Result<Vec<Update>, StateError> {
    nights.iter().map(|paths| collecting_span(|out| add_night(state, plan, paths, &|_, _| {}, out))).collect()
}

/// Runs `update` (an [`add_night`] or [`add_reduced_night`]) with the tiles it hands out
/// collected into the returned update's spectrum, which then holds the per-bin arrays of
/// the whole recomputed span (memory in proportion to that span).
pub fn collecting_span(update: impl FnOnce(&mut dyn FnMut(&Block) -> Result<(), String>) -> Result<Update, StateError>) -> Result<Update, StateError> {
    let mut span = Spectrum::default();
    let mut done = update(&mut |block| {
        block.append_to(&mut span);
        Ok(())
    })?;
    let facts = &mut done.reduction.spectrum;
    (span.candidates, span.rf_start_hz, span.bin_width_hz) = (std::mem::take(&mut facts.candidates), facts.rf_start_hz, facts.bin_width_hz);
    (span.step_span_hz, span.mean_beta_sq, span.threshold) = (facts.step_span_hz, facts.mean_beta_sq, facts.threshold);
    *facts = span;
    Ok(done)
}

fn refused(msg: String) -> StateError {
    StateError::Refused(msg)
}

/// A night reduced up to and including the combination, not yet added to a state: what one
/// shard of a sharded reprocessing computes ([`crate::shard`]).
#[derive(Debug)]
pub struct ReducedNight {
    /// Each run file as given, with the SHA-256 of its content.
    pub inputs: Vec<(String, String)>,
    /// Steps read from each file, in the same order.
    pub n_steps: Vec<usize>,
    /// The night's reduction through the combine stage (no spectrum stage applied).
    pub reduction: Reduction,
}

/// Reduces one night (its run files, in acquisition order) through the combine stage of
/// `plan`, without touching any state; add it with [`add_reduced_night`].
pub fn reduce_night(plan: &Plan, paths: &[PathBuf]) -> Result<ReducedNight, StateError> {
    let inputs = hash_inputs(plan, paths)?;
    reduce_hashed(plan, paths, inputs)
}

fn hash_inputs(plan: &Plan, paths: &[PathBuf]) -> Result<Vec<(String, String)>, StateError> {
    Ok(Provenance::new(&plan.text, paths).map_err(|e| refused(format!("cannot hash the run files: {e}")))?.inputs)
}

fn reduce_hashed(plan: &Plan, paths: &[PathBuf], inputs: Vec<(String, String)>) -> Result<ReducedNight, StateError> {
    let front = up_to_combine(plan)?;
    let reduction = reduce(&front, paths, &|_, _| {}).map_err(|e| refused(e.to_string()))?;
    let n_steps = paths.iter().map(|path| crate::runfile::RunReader::open(path).map(|r| r.steps().len()).unwrap_or(0)).collect();
    Ok(ReducedNight { inputs, n_steps, reduction })
}

pub(super) fn check_config(state: &State, plan: &Plan) -> Result<(), StateError> {
    let hash = plan_hash(plan);
    if state.config_hash != hash {
        return Err(refused(format!(
            "the state was built with another pipeline (config hash {} there, {} here); use its pipeline file or start a new state folder",
            &state.config_hash[..12.min(state.config_hash.len())],
            &hash[..12]
        )));
    }
    Ok(())
}

fn check_new(state: &State, inputs: &[(String, String)]) -> Result<(), StateError> {
    for (path, sha) in inputs {
        if let Some((night, f)) = state.holder_of(sha) {
            return Err(refused(format!("{path}: already in the state (night {night}, as {}); a run file is added once", f.path)));
        }
    }
    Ok(())
}

/// Adds one night (its run files, in acquisition order) to the state, handing each tile of
/// the span the update recomputes to `out` as it is made, in grid order (see
/// [`add_reduced_night`], whose result this is, bit for bit). The state is changed in memory
/// only (save it with [`State::save`]); with [`State::stage_in`] the blocks of the sums are
/// written to the state's folder as they are finished, so memory stays bounded whatever the
/// night's RF span: the night streams through the combination block by block
/// ([`crate::pipeline::reduce_streamed_profiled`]) into the sums, its most significant
/// samples set aside on disk until its IF profile tells which are IF-line samples. On an
/// error the state in memory may hold part of the night: load it again from its folder.
/// `progress` is called with (steps done, total) as the night streams through.
pub fn add_night(
    state: &mut State,
    plan: &Plan,
    paths: &[PathBuf],
    progress: &(dyn Fn(usize, usize) + Sync),
    out: &mut dyn FnMut(&Block) -> Result<(), String>,
) -> Result<Update, StateError> {
    check_config(state, plan)?;
    let front = up_to_combine(plan)?;
    // The run files are hashed beside the streaming (the hash reads them once more), and
    // checked against the state's files before the first block is merged into its sums.
    std::thread::scope(|scope| {
        let hashing = scope.spawn(|| hash_inputs(plan, paths));
        stream_night(state, plan, &front, paths, hashing, progress, out)
    })
}

/// The body of [`add_night`], with the run files' hashes coming from `hashing`.
fn stream_night(
    state: &mut State,
    plan: &Plan,
    front: &Plan,
    paths: &[PathBuf],
    hashing: std::thread::ScopedJoinHandle<'_, Result<Vec<(String, String)>, StateError>>,
    progress: &(dyn Fn(usize, usize) + Sync),
    out: &mut dyn FnMut(&Block) -> Result<(), String>,
) -> Result<Update, StateError> {
    let mut hashing = Some(hashing);
    let mut inputs: Option<Vec<(String, String)>> = None;
    // Waits for the hashes (once) and refuses files the state holds already.
    let mut hashed = |state: &State| -> Result<(), StateError> {
        if let Some(handle) = hashing.take() {
            let hashes = handle.join().unwrap_or_else(|panic| std::panic::resume_unwind(panic))?;
            check_new(state, &hashes)?;
            inputs = Some(hashes);
        }
        Ok(())
    };
    let started = std::time::Instant::now();
    let (readers, info) = crate::pipeline::open_night(paths).map_err(|e| refused(e.to_string()))?;
    let n_steps: Vec<usize> = readers.iter().map(|r| r.steps().len()).collect();
    drop(readers);
    let night_index = state.nights.len();
    let n_rf = ((info.rf_span_hz.1 - info.rf_span_hz.0) / info.bin_width_hz).round() as usize + 1;
    let night_bins = night_sums::place(state, info.rf_span_hz.0, info.bin_width_hz, &info.bin_correlation, n_rf)?;
    let mut merger = SumsMerger::new(&night_bins);
    let mut spill = TopSpill::new()?;
    // A failure of the merge (reading or writing the state's blocks), with its file.
    let mut failed: Option<StateError> = None;
    let reduced = crate::pipeline::reduce_streamed_profiled(
        front,
        paths,
        progress,
        &mut |block, top| {
            Ok(Some((block.first_bin, block.combined[..block.len].to_vec(), block.combined_sigma[..block.len].to_vec(), block.coverage.clone(), top)))
        },
        &mut |(first, combined, sigma, coverage, top)| {
            let merged =
                hashed(state).and_then(|()| merger.add(state, first, &combined, &sigma, &coverage)).and_then(|()| spill.push(first / BLOCK_BINS, top.as_ref()));
            merged.map_err(|e| {
                let message = e.to_string();
                failed = Some(e);
                message
            })
        },
    );
    let mut night_red = match (reduced, failed) {
        (Err(_), Some(e)) => return Err(e),
        (reduced, _) => reduced.map_err(|e| refused(e.to_string()))?,
    };
    hashed(state)?;
    let inputs = inputs.expect("the hashes were taken");
    let coverage = merger.finish(state)?;
    tracing::debug!("night streamed into the state's sums in {:.2} s", started.elapsed().as_secs_f64());
    let in_line = night_red.if_scan.in_line();
    if in_line.contains(&true) {
        let (sigma, first) = (std::mem::take(&mut night_red.if_scan.if_profile_sigma), night_bins.start);
        spill.read_back(|block, top| {
            let samples = top.in_lines(&in_line).map(|(j, w, ws, k)| (block * BLOCK_BINS + j, w, ws, k));
            night_sums::add_line_samples(state, first, samples, night_index, &sigma)
        })?;
        night_red.if_scan.if_profile_sigma = sigma;
    }
    finish_update(state, plan, (inputs, n_steps), night_red, night_bins, &coverage, out)
}

/// Adds a night reduced by [`reduce_night`] to the state: the same operations, in the same
/// order, as adding it from its run files, so the sums and the grand spectrum are
/// bit-identical whichever way (or on whichever machine) the night was reduced.
///
/// The work is proportional to the RF span the night covers: its bins are added to the
/// blocks they fall in, the grand spectrum is recomputed on the tiles whose input those
/// blocks are ([`tiles`](super::tiles)), one more tile on each side (so a candidate at the
/// edge of the changed tiles is seen whole), and further out while a run of bins above
/// threshold reaches the edge; each recomputed tile goes to `out` as a block of that span
/// ([`span`](super::span)), and candidates are tracked on the span, reading and changing
/// only the candidate blocks there ([`candidates`](super::candidates)). Everywhere else the
/// grand spectrum and the candidates are unchanged, because their data are. The returned
/// update's spectrum holds the span's grid, stage facts and candidates, not its per-bin
/// arrays (those went to `out`).
pub fn add_reduced_night(state: &mut State, plan: &Plan, night: ReducedNight, out: &mut dyn FnMut(&Block) -> Result<(), String>) -> Result<Update, StateError> {
    check_config(state, plan)?;
    check_new(state, &night.inputs)?;
    let ReducedNight { inputs, n_steps, reduction: mut night_red } = night;
    let night_index = state.nights.len();
    let (night_bins, coverage) = merge(state, &night_red.spectrum, &night_red.if_scan, &night_red.night.bin_correlation, night_index)?;
    // What follows needs the night's facts, not its per-bin arrays.
    night_red.spectrum = Spectrum { combined: Vec::new(), combined_sigma: Vec::new(), coverage: Vec::new(), ..night_red.spectrum };
    night_red.if_scan = IfScan { removed_weight: Vec::new(), removed_weighted_sum: Vec::new(), removed_if_bin: Vec::new(), ..night_red.if_scan };
    finish_update(state, plan, (inputs, n_steps), night_red, night_bins, &coverage, out)
}

/// After a night's sums are merged (over grid bins `night_bins`, `coverage` telling which of
/// them tonight's data reached): records the night (its run files as given with their
/// SHA-256, and the steps read from each), recomputes the span and tracks the candidates
/// there.
fn finish_update(
    state: &mut State,
    plan: &Plan,
    (inputs, n_steps): (Vec<(String, String)>, Vec<usize>),
    night_red: Reduction,
    night_bins: Range<i64>,
    coverage: &NightCoverage,
    out: &mut dyn FnMut(&Block) -> Result<(), String>,
) -> Result<Update, StateError> {
    let night_index = state.nights.len();
    state.nights.push(NightRecord {
        index: night_index,
        files: inputs.into_iter().zip(n_steps).map(|((path, sha256), n_steps)| FileRecord { path, sha256, n_steps }).collect(),
        n_steps_used: night_red.used_steps.len(),
        if_lines: night_red.if_scan.lines.clone(),
    });
    let covered = |bin: i64| usize::try_from(bin - night_bins.start).is_ok_and(|k| coverage.get(k));
    let profile = IfProfileRecord { if_profile_sigma: night_red.if_scan.if_profile_sigma.clone(), if_steps: night_red.if_scan.if_steps.clone() };
    state.put_profile(night_index, profile);

    let stages = Stages::new(plan).map_err(refused)?;
    let plan_info = PlanInfo::from_plan(plan).map_err(refused)?;
    let grid = state.grid_bins.map(|(a, b)| state.block_of(a)..=state.block_of(b - 1)).ok_or_else(|| refused("the state's grid is empty".into()))?;
    let changed = stages.tiles_reading(state, night_bins.clone());
    let planned = (*changed.start() - 1).max(*grid.start())..=(*changed.end() + 1).min(*grid.end());
    let mut tiler = Tiler::new(&stages, &night_red.used_steps, night_red.spectrum.step_span_hz);
    let tiles = tiler.extent(state, planned)?;
    // Grid bin of the span's first bin, and its length.
    let first_bin = state.block_range(*tiles.start()).start;
    let span_bins = tiles.clone().count() as i64 * state.block_bins as i64;
    let match_hz = state.freq_hz(first_bin) * plan_info.halo.mean_beta_sq();
    let reach = (match_hz / state.bin_width_hz).ceil() as i64;
    // The candidates of the span and of the blocks within a line width of it: the tracked
    // ones a candidate flagged in the span can match.
    let (blocks, mut tracked) = state.take_candidates(first_bin..first_bin + span_bins, reach)?;
    let (origin_hz, bin_width_hz) = (state.rf_origin_hz, state.bin_width_hz);
    let tracked_bins: Vec<i64> = tracked.iter().map(|c| ((c.frequency_hz + bin_width_hz / 2.0 - origin_hz) / bin_width_hz).round() as i64).collect();
    let started = std::time::Instant::now();
    let span = tiler.pass(state, tiles, &tracked_bins, reach as usize, out)?;
    tracing::debug!("span of {span_bins} bins recomputed and handed out in {:.2} s", started.elapsed().as_secs_f64());
    let covered_here = |j: usize| covered(first_bin + j as i64);
    // A candidate that only the spectrum without the IF-line samples shows (a negative line
    // sample hid it) has no positive amplitude in the full one: its amplitude there counts.
    let integration = |j: usize| {
        let t = rescan_integration_s(&span.full, &night_red, &plan_info, j);
        match &span.without {
            Some(w) if !t.is_finite() => rescan_integration_s(w, &night_red, &plan_info, j),
            _ => t,
        }
    };
    let explain = |j: usize| {
        let bin = first_bin + j as i64;
        span.sums_around(bin).and_then(|sums| line_sources(sums, bin, reach, bin_width_hz))
    };
    let view = span.without.as_ref().map(|without| rescan::LineView { without, explain: &explain });
    let changes = rescan::update(&mut tracked, &span.full, view.as_ref(), night_index, match_hz, &covered_here, &integration);
    state.put_candidates(&blocks, tracked)?;
    let spectrum = Spectrum {
        rf_start_hz: span.full.rf_start_hz,
        bin_width_hz,
        step_span_hz: night_red.spectrum.step_span_hz,
        mean_beta_sq: span.mean_beta_sq,
        threshold: span.full.threshold,
        candidates: span.full.candidates.clone(),
        ..Spectrum::default()
    };
    let reduction = Reduction { spectrum, ..night_red };
    Ok(Update { reduction, night: night_index, changes, match_hz })
}

/// The plan up to and including the combine stage.
fn up_to_combine(plan: &Plan) -> Result<Plan, StateError> {
    let mut front = load(&plan.text, "pipeline").map_err(|e| refused(e.to_string()))?;
    let at = front.stages.iter().position(|s| s.entry.kind == "combine").ok_or_else(|| refused("the pipeline has no combine stage".into()))?;
    front.stages.truncate(at + 1);
    Ok(front)
}

/// The IF lines with samples in the filter window of an axion line starting at grid bin
/// `bin`, and the number of steps those samples came from (the latest night's, where nights
/// overlap). The window runs from `reach` bins (the line's mean width) below to six times
/// that above, within the bins `sums` holds: a Maxwellian line keeps 99.9 % of its power
/// within 5.4 times its mean (chi-square quantile with 3 degrees of freedom, 16.27 / 3,
/// computed).
fn line_sources(sums: &Sums, bin: i64, reach: i64, bin_width_hz: f64) -> Option<(Vec<rescan::LineSource>, u32)> {
    let mut sources: Vec<rescan::LineSource> = Vec::new();
    // A step is known by its night and first grid bin (the sample's bin less its IF bin).
    let mut steps: Vec<(usize, i64)> = Vec::new();
    for b in (bin - reach..bin + 6 * reach + 1).filter_map(|b| sums.index_of(b)) {
        if sums.line_steps[b] == 0 {
            continue;
        }
        let (night, if_bin) = (sums.line_night[b].max(0) as usize, sums.line_if_bin[b].max(0) as usize);
        let step = (night, sums.first_bin + b as i64 - if_bin as i64);
        if !steps.contains(&step) {
            steps.push(step);
        }
        if !sources.iter().any(|s| s.night == night && s.if_bin == if_bin) {
            let if_profile_sigma = sums.line_if_profile_sigma[b];
            sources.push(rescan::LineSource { night, if_bin, if_offset_hz: if_bin as f64 * bin_width_hz, if_profile_sigma });
        }
    }
    (!steps.is_empty()).then_some((sources, steps.len() as u32))
}

/// Adds a night's combined spectrum (held whole), and the IF-line samples of its IF
/// profile, to the state's sums; returns the grid bins the night spans and which of them
/// its data reached. `bin_correlation` is the night's (its run files').
fn merge(state: &mut State, sp: &Spectrum, scan: &IfScan, bin_correlation: &[f64], night_index: usize) -> Result<(Range<i64>, NightCoverage), StateError> {
    let bins = night_sums::place(state, sp.rf_start_hz, sp.bin_width_hz, bin_correlation, sp.combined.len())?;
    let mut merger = SumsMerger::new(&bins);
    for first in (0..sp.combined.len()).step_by(BLOCK_BINS) {
        let r = first..(first + BLOCK_BINS).min(sp.combined.len());
        merger.add(state, first, &sp.combined[r.clone()], &sp.combined_sigma[r.clone()], &sp.coverage[r])?;
    }
    let coverage = merger.finish(state)?;
    let samples = (0..sp.combined.len()).map(|k| (k, scan.removed_weight[k], scan.removed_weighted_sum[k], scan.removed_if_bin[k]));
    night_sums::add_line_samples(state, bins.start, samples, night_index, &scan.if_profile_sigma)?;
    Ok((bins, coverage))
}

/// Integration of one rescan step, tuned onto the candidate (Lorentzian = 1), that brings a
/// signal of the candidate's present amplitude A to [`RESCAN_TARGET_SNR`] with the night's
/// median T_sys, Q_L and beta: t = (SNR s / (A P_ref / k_B T))^2 dnu_b / sum L^2 (radiometer
/// equation through the optimal filter; s the predicted spread). Infinite if A <= 0.
fn rescan_integration_s(sp: &SparseSpectrum, night: &Reduction, info: &PlanInfo, j: usize) -> f64 {
    let a = sp.amplitude(j);
    if !(a > 0.0) || night.used_steps.is_empty() {
        return f64::INFINITY;
    }
    let median = |f: fn(&crate::runfile::StepMeta) -> f64| {
        let mut v: Vec<f64> = night.used_steps.iter().map(|(_, m)| f(m)).collect();
        v.sort_by(f64::total_cmp);
        v[v.len() / 2]
    };
    let h = &night.night.headers[0];
    let scope = Haloscope { magnet_field_t: h.magnet_field_t, cavity_volume_m3: h.cavity_volume_m3, form_factor: h.form_factor };
    let nu = sp.freq_hz(j) - sp.bin_width_hz / 2.0;
    let cavity = CavityState { cavity_freq_hz: nu, loaded_q: median(|m| m.loaded_q), coupling_beta: median(|m| m.coupling_beta) };
    let p_w = signal_power_w(info.reference_g_gamma, info.dm_density_gev_per_cm3, &scope, &cavity, nu);
    let line = info.halo.bin_fractions(nu, sp.bin_width_hz, 1e-3);
    let sum_l2: f64 = line.iter().map(|l| l * l).sum();
    let spread = sp.predicted_spread(j).unwrap_or(1.0);
    let per_root_s = a * p_w / (BOLTZMANN_J_PER_K * median(|m| m.noise_temp_k)) * (sum_l2 / sp.bin_width_hz).sqrt() / spread;
    (RESCAN_TARGET_SNR / per_root_s).powi(2)
}

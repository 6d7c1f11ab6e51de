//! IQ captures in, one run file (format v1) of averaged power spectra out.
//!
//! Every capture is validated before anything is written. The samples then stream in
//! pieces: each step is cut into pieces of whole segments (about [`PIECE_BYTES`] of samples
//! each), read by hyperslab on this thread, which makes every HDF5 call (reads and the run
//! file's writes); the pieces of a batch are transformed in parallel on the thread pool while
//! the next batch is read. Each piece's periodograms are summed in segment order, and a step's
//! pieces are added in piece order, so the output does not depend on the thread count. Memory
//! is bounded by a few batches of pieces, whatever the capture's length.

use super::welch::{WelchPlan, Window, Work};
use super::{IqReader, MAX_STEPS_PER_FILE, Samples};
use crate::runfile::{MAX_BINS_PER_STEP, MIN_BINS_PER_STEP, RunFileError, RunHeader, RunWriter, StepMeta};
use rayon::prelude::*;
use std::cell::RefCell;
use std::ops::Range;
use std::path::{Path, PathBuf};
use std::sync::mpsc;

/// Target size of one piece of samples as stored, bytes (below the allocator's 4 MB mapping
/// threshold set by the command line, so piece buffers are reused rather than faulted in).
pub const PIECE_BYTES: usize = 2 << 20;
/// Batches read ahead of the one being transformed.
const READ_AHEAD_BATCHES: usize = 2;
/// Pieces per pool thread in one batch.
const PIECES_PER_THREAD: usize = 2;

/// How the spectra are estimated.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct AverageOptions {
    /// Samples per segment, and bins per spectrum before `keep_fraction` (even).
    pub fft_bins: usize,
    /// Window applied to each segment.
    pub window: Window,
    /// Fraction of a segment shared with the next one (0 <= overlap < 1).
    pub overlap: f64,
    /// Central fraction of the bins kept (0 < keep_fraction <= 1), dropping the edges where
    /// the anti-alias filter rolls off; rounded to an even number of bins.
    pub keep_fraction: f64,
}

/// What was written.
#[derive(Debug, Clone, PartialEq)]
pub struct Averaged {
    /// Steps in the run file.
    pub n_steps: usize,
    /// Bins per spectrum.
    pub n_bins: usize,
    /// Per capture: segments averaged per step and the `n_averages` written (the effective
    /// number of independent averages, equal to the segments without overlap).
    pub per_file: Vec<(usize, u64)>,
}

/// Why an averaging failed.
#[derive(Debug, thiserror::Error)]
pub enum AverageError {
    /// An option out of range.
    #[error("{0}")]
    Options(String),
    /// A capture is invalid or unreadable.
    #[error(transparent)]
    Input(RunFileError),
    /// The run file could not be written.
    #[error(transparent)]
    Output(RunFileError),
}

/// The bins of the shifted spectrum that `keep_fraction` keeps: the central 2 round(f N / 2).
pub fn kept_bins(fft_bins: usize, keep_fraction: f64) -> Result<Range<usize>, String> {
    if !(keep_fraction > 0.0 && keep_fraction <= 1.0) {
        return Err(format!("--keep-fraction {keep_fraction} must be in (0, 1]"));
    }
    let kept = 2 * (keep_fraction * fft_bins as f64 / 2.0).round() as usize;
    if !(MIN_BINS_PER_STEP..=MAX_BINS_PER_STEP).contains(&kept) {
        return Err(format!(
            "--fft-bins {fft_bins} with --keep-fraction {keep_fraction} keeps {kept} bins; a run file holds {MIN_BINS_PER_STEP}..={MAX_BINS_PER_STEP}"
        ));
    }
    let first = (fft_bins - kept) / 2;
    Ok(first..first + kept)
}

/// Averages `captures` (in acquisition order) into the run file `out`, written to a temporary
/// path and renamed into place only when complete. `progress` is told the steps written and
/// the total.
pub fn average(captures: &[PathBuf], out: &Path, opts: &AverageOptions, progress: &dyn Fn(usize, usize)) -> Result<Averaged, AverageError> {
    let plan = WelchPlan::new(opts.fft_bins, opts.window, opts.overlap).map_err(AverageError::Options)?;
    let kept = kept_bins(opts.fft_bins, opts.keep_fraction).map_err(AverageError::Options)?;
    let readers = open_all(captures, &plan, kept.start)?;
    let first = readers[0].header();
    let header = RunHeader {
        bin_width_hz: first.sample_rate_hz / opts.fft_bins as f64,
        magnet_field_t: first.magnet_field_t,
        cavity_volume_m3: first.cavity_volume_m3,
        form_factor: first.form_factor,
        run_label: first.run_label.clone(),
        bin_correlation: plan.bin_correlation(),
    };
    let n_steps = readers.iter().map(|r| r.steps().len()).sum();
    let mut writer = RunWriter::create(out, &header, n_steps, kept.len()).map_err(AverageError::Output)?;
    let mut sink =
        Sink { plan: &plan, readers: &readers, kept: kept.clone(), header: &header, writer: &mut writer, current: None, written: 0, n_steps, progress };
    match stream(&readers, &plan, &mut sink) {
        Ok(()) => writer.finish().map_err(AverageError::Output)?,
        Err(e) => {
            writer.abandon();
            return Err(e);
        }
    }
    let per_file = readers
        .iter()
        .map(|r| {
            let k = plan.n_segments(r.n_samples());
            (k, n_averages(&plan, k))
        })
        .collect();
    Ok(Averaged { n_steps, n_bins: kept.len(), per_file })
}

/// The `n_averages` of a step of `n_segments`: the effective number of independent averages,
/// rounded to a whole number (at least 1), as the run-file format stores it.
fn n_averages(plan: &WelchPlan, n_segments: usize) -> u64 {
    (plan.effective_averages(n_segments).round() as u64).max(1)
}

/// Opens and checks every capture, and that they can share one run file: the same sampling
/// rate and facility, timestamps increasing across files, at least one segment per step, and
/// a first kept bin (`first_kept` bins above bin 0) at a positive RF frequency.
fn open_all(captures: &[PathBuf], plan: &WelchPlan, first_kept: usize) -> Result<Vec<IqReader>, AverageError> {
    if captures.is_empty() {
        return Err(AverageError::Options("no capture given".into()));
    }
    let invalid = |path: &Path, field: &str, step: Option<usize>, message: String| {
        AverageError::Input(RunFileError::Invalid { path: path.to_path_buf(), field: field.into(), step, message })
    };
    let mut readers: Vec<IqReader> = Vec::with_capacity(captures.len());
    let mut n_steps = 0usize;
    for path in captures {
        let r = IqReader::open(path).map_err(AverageError::Input)?;
        if plan.n_segments(r.n_samples()) == 0 {
            return Err(invalid(
                path,
                "iq",
                None,
                format!("holds {} samples per step, fewer than one segment of --fft-bins {}", r.n_samples(), plan.fft_bins()),
            ));
        }
        let h = r.header();
        if let Some(first) = readers.first() {
            let f = first.header();
            for (field, here, there) in [
                ("sample_rate_hz", h.sample_rate_hz, f.sample_rate_hz),
                ("magnet_field_t", h.magnet_field_t, f.magnet_field_t),
                ("cavity_volume_m3", h.cavity_volume_m3, f.cavity_volume_m3),
                ("form_factor", h.form_factor, f.form_factor),
            ] {
                if here != there {
                    let message = format!("is {here}, {} has {there}: captures averaged into one run file must share it", first.path().display());
                    return Err(invalid(path, field, None, message));
                }
            }
        }
        if let Some(last) = readers.last().and_then(|p| p.steps().last()) {
            let t = r.steps()[0].timestamp_s;
            if t <= last.timestamp_s {
                let message = format!(
                    "value {t} is not later than the last step of the capture before ({}): captures must be given in acquisition order",
                    last.timestamp_s
                );
                return Err(invalid(path, "steps/timestamp_s", Some(0), message));
            }
        }
        let offset_hz = first_kept as f64 * h.sample_rate_hz / plan.fft_bins() as f64 - h.sample_rate_hz / 2.0;
        if let Some((i, s)) = r.steps().iter().enumerate().find(|(_, s)| s.lo_freq_hz + offset_hz <= 0.0) {
            let message = format!("value {} puts the first kept bin at {} Hz: the RF frequency must stay > 0", s.lo_freq_hz, s.lo_freq_hz + offset_hz);
            return Err(invalid(path, "steps/lo_freq_hz", Some(i), message));
        }
        n_steps += r.steps().len();
        if n_steps > MAX_STEPS_PER_FILE {
            return Err(invalid(path, "iq", None, format!("brings the steps to {n_steps}, more than the {MAX_STEPS_PER_FILE} a run file holds")));
        }
        readers.push(r);
    }
    Ok(readers)
}

/// One piece of one step: whole segments, read as one hyperslab.
#[derive(Debug, Clone, Copy)]
struct Piece {
    file: usize,
    step: usize,
    /// Index of the piece within its step.
    index: usize,
    /// Whether it is the step's last piece.
    last: bool,
    first_segment: usize,
    n_segments: usize,
}

impl Piece {
    fn samples(&self, plan: &WelchPlan) -> Range<usize> {
        let start = self.first_segment * plan.hop();
        start..start + (self.n_segments - 1) * plan.hop() + plan.fft_bins()
    }
}

/// Every piece of every step of every capture, in order.
fn pieces<'a>(readers: &'a [IqReader], plan: &'a WelchPlan) -> impl Iterator<Item = Piece> + 'a {
    readers.iter().enumerate().flat_map(move |(file, r)| {
        let total = plan.n_segments(r.n_samples());
        let samples_per_piece = (PIECE_BYTES / r.kind().bytes_per_sample()).max(plan.fft_bins());
        let per_piece = (samples_per_piece - plan.fft_bins()) / plan.hop() + 1;
        let n_pieces = total.div_ceil(per_piece);
        (0..r.steps().len()).flat_map(move |step| {
            (0..n_pieces).map(move |index| {
                let first_segment = index * per_piece;
                Piece { file, step, index, last: index + 1 == n_pieces, first_segment, n_segments: per_piece.min(total - first_segment) }
            })
        })
    })
}

thread_local! {
    static WORK: RefCell<Work> = RefCell::new(Work::default());
}

/// The summed periodograms of one piece's segments, in segment order.
fn piece_sum(plan: &WelchPlan, piece: &Piece, samples: &Samples) -> Vec<f64> {
    let mut sum = vec![0.0; plan.fft_bins()];
    WORK.with_borrow_mut(|work| match samples {
        Samples::F32(v) => plan.accumulate(v, piece.n_segments, &mut sum, work),
        Samples::I16(v) => plan.accumulate(v, piece.n_segments, &mut sum, work),
    });
    sum
}

/// Reads the pieces batch by batch on this thread, has them transformed on the pool (on a
/// helper thread, so reading goes on meanwhile), and hands the sums to `sink` in order.
fn stream(readers: &[IqReader], plan: &WelchPlan, sink: &mut Sink<'_>) -> Result<(), AverageError> {
    let batch_len = PIECES_PER_THREAD * rayon::current_num_threads();
    std::thread::scope(|scope| {
        let (to_pool, batches) = mpsc::sync_channel::<Vec<(Piece, Samples)>>(READ_AHEAD_BATCHES);
        let (to_sink, sums) = mpsc::channel::<Vec<(Piece, Vec<f64>)>>();
        scope.spawn(move || {
            for batch in batches {
                let summed = batch.into_par_iter().map(|(piece, samples)| (piece, piece_sum(plan, &piece, &samples))).collect();
                // A closed channel means the reading side stopped on an error.
                if to_sink.send(summed).is_err() {
                    return;
                }
            }
        });
        let mut all = pieces(readers, plan).peekable();
        while all.peek().is_some() {
            let mut batch = Vec::with_capacity(batch_len);
            for piece in all.by_ref().take(batch_len) {
                let samples = readers[piece.file].read_samples(piece.step, piece.samples(plan)).map_err(AverageError::Input)?;
                batch.push((piece, samples));
            }
            if to_pool.send(batch).is_err() {
                break;
            }
            for summed in sums.try_iter() {
                sink.absorb(summed)?;
            }
        }
        drop(to_pool);
        for summed in sums {
            sink.absorb(summed)?;
        }
        Ok(())
    })
}

/// Adds the pieces' sums up step by step, in order, and writes each step when its last piece
/// is in.
struct Sink<'a> {
    plan: &'a WelchPlan,
    readers: &'a [IqReader],
    kept: Range<usize>,
    header: &'a RunHeader,
    writer: &'a mut RunWriter,
    /// The sum of the pieces so far of the step being completed.
    current: Option<Vec<f64>>,
    written: usize,
    n_steps: usize,
    progress: &'a dyn Fn(usize, usize),
}

impl Sink<'_> {
    fn absorb(&mut self, summed: Vec<(Piece, Vec<f64>)>) -> Result<(), AverageError> {
        for (piece, sum) in summed {
            let total = match (piece.index, self.current.take()) {
                (0, _) | (_, None) => sum,
                (_, Some(mut total)) => {
                    add_into(&mut total, &sum);
                    total
                }
            };
            if piece.last {
                self.write_step(&piece, &total)?;
            } else {
                self.current = Some(total);
            }
        }
        Ok(())
    }

    fn write_step(&mut self, piece: &Piece, total: &[f64]) -> Result<(), AverageError> {
        let reader = &self.readers[piece.file];
        let n_segments = self.plan.n_segments(reader.n_samples());
        let spectrum = self.plan.finish(total, n_segments, reader.kind().volts_per_unit(), self.kept.clone());
        if let Some(bin) = spectrum.iter().position(|p| !p.is_finite()) {
            return Err(AverageError::Input(RunFileError::Invalid {
                path: reader.path().to_path_buf(),
                field: "iq".into(),
                step: Some(piece.step),
                message: format!("holds non-finite samples (NaN or infinity): averaged bin {bin} is {}", spectrum[bin]),
            }));
        }
        let m = reader.steps()[piece.step];
        let meta = StepMeta {
            start_freq_hz: m.lo_freq_hz - reader.header().sample_rate_hz / 2.0 + self.kept.start as f64 * self.header.bin_width_hz,
            cavity_freq_hz: m.cavity_freq_hz,
            loaded_q: m.loaded_q,
            coupling_beta: m.coupling_beta,
            noise_temp_k: m.noise_temp_k,
            n_averages: n_averages(self.plan, n_segments),
            timestamp_s: m.timestamp_s,
        };
        self.writer.push_step(meta, ndarray::ArrayView1::from(&spectrum)).map_err(AverageError::Output)?;
        self.written += 1;
        (self.progress)(self.written, self.n_steps);
        Ok(())
    }
}

/// `total[k] += part[k]`.
fn add_into(total: &mut [f64], part: &[f64]) {
    for (t, p) in total.iter_mut().zip(part) {
        *t += p;
    }
}

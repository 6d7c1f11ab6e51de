//! The span of the grid a nightly update recomputes, one tile at a time.
//!
//! Each tile's grand spectrum ([`tiles`](super::tiles)), with and without the IF-line
//! samples, goes through the stages that take the grand spectrum (the flag) as one block of
//! the span, runs above threshold carried from tile to tile, and the full one is handed out
//! as soon as it is made. What candidate tracking reads afterwards is kept sparsely: the bins
//! within a line width of a bin above threshold (in either spectrum) and of a tracked
//! candidate. Memory is a few tiles whatever the span, and the values are those a
//! recomputation of the whole span at once gives, bit for bit.

use super::State;
use super::store::StateError;
use super::sums::Sums;
use super::tiles::Stages;
use crate::runfile::StepMeta;
use crate::stage::{Block, Candidate, OpenRun, Spectrum, SpectrumStage};
use std::collections::BTreeMap;
use std::ops::{Range, RangeInclusive};

/// The values of one bin that candidate tracking reads.
#[derive(Debug, Clone, Copy)]
struct Kept {
    grand: f64,
    amplitude: f64,
    predicted_spread: f64,
}

impl Kept {
    fn of(sp: &Spectrum, j: usize) -> Self {
        Self { grand: sp.grand[j], amplitude: sp.amplitude[j], predicted_spread: sp.predicted_spread[j] }
    }
}

/// A spectrum over a span of grid bins of which only some bins are kept: every other bin
/// reads as missing (NaN).
#[derive(Debug, Clone, Default)]
pub(super) struct SparseSpectrum {
    /// Bin-centre frequency of the span's bin 0, Hz.
    pub rf_start_hz: f64,
    /// Bin width, Hz.
    pub bin_width_hz: f64,
    /// Bins of the span.
    pub len: usize,
    /// Threshold of the flag stage.
    pub threshold: Option<f64>,
    /// The candidates of the whole span (bins counted from the span's first).
    pub candidates: Vec<Candidate>,
    kept: BTreeMap<usize, Kept>,
}

impl SparseSpectrum {
    /// Bin-centre RF frequency of span bin `j`, Hz.
    pub fn freq_hz(&self, j: usize) -> f64 {
        self.rf_start_hz + j as f64 * self.bin_width_hz
    }

    /// Grand-spectrum value of span bin `j` (NaN if not kept).
    pub fn grand(&self, j: usize) -> f64 {
        self.kept.get(&j).map_or(f64::NAN, |k| k.grand)
    }

    /// Filtered amplitude of span bin `j`, reference-axion units (NaN if not kept).
    pub fn amplitude(&self, j: usize) -> f64 {
        self.kept.get(&j).map_or(f64::NAN, |k| k.amplitude)
    }

    /// Predicted null spread of span bin `j`, if kept.
    pub fn predicted_spread(&self, j: usize) -> Option<f64> {
        self.kept.get(&j).map(|k| k.predicted_spread)
    }

    /// The kept bins as runs of consecutive span bins.
    fn kept_runs(&self) -> Vec<Range<usize>> {
        let mut runs: Vec<Range<usize>> = Vec::new();
        for &j in self.kept.keys() {
            match runs.last_mut() {
                Some(run) if run.end == j => run.end += 1,
                _ => runs.push(j..j + 1),
            }
        }
        runs
    }
}

/// A recomputed span: what candidate tracking reads.
pub(super) struct Span {
    /// The grand spectrum, its kept bins and candidates.
    pub full: SparseSpectrum,
    /// The same without the IF-line samples (None when the span's input holds none).
    pub without: Option<SparseSpectrum>,
    /// The sums around the kept bins, from `reach` bins below a run of them to six times
    /// that above (the window [`super::accumulate`] looks for IF-line samples in), within the
    /// span's input bins.
    pub line_sums: Vec<Sums>,
    /// Mean squared halo speed over c^2 the filter assumed.
    pub mean_beta_sq: f64,
}

impl Span {
    /// The line sums around grid bin `bin` (one of the kept bins).
    pub fn sums_around(&self, bin: i64) -> Option<&Sums> {
        self.line_sums.iter().find(|s| s.index_of(bin).is_some())
    }
}

/// One tile's spectrum, and the same without the IF-line samples where its input holds any.
struct TilePair {
    full: Spectrum,
    without: Option<Spectrum>,
}

/// What the tiles of a span read and share.
pub(super) struct Tiler<'a> {
    stages: &'a Stages<'a>,
    steps: &'a [(usize, StepMeta)],
    step_span_hz: f64,
    /// The last two blocks of the sums read (a tile reads its own block and the head of the next).
    recent: Vec<(i64, Sums)>,
    /// Tiles computed while the span's extent was found, reused by the pass.
    computed: BTreeMap<i64, TilePair>,
}

fn refused(e: String) -> StateError {
    StateError::Refused(e)
}

impl<'a> Tiler<'a> {
    /// Tiles of `st` with the plan's `stages`; `steps` (this night's) are the steps the flag
    /// reports as covering a candidate, `step_span_hz` the RF width of one step.
    pub fn new(stages: &'a Stages<'a>, steps: &'a [(usize, StepMeta)], step_span_hz: f64) -> Self {
        Self { stages, steps, step_span_hz, recent: Vec::new(), computed: BTreeMap::new() }
    }

    /// The sums over `bins`, from the blocks read last where they hold them.
    fn sums(&mut self, st: &State, bins: Range<i64>) -> Result<Sums, StateError> {
        let mut sums = Sums::empty(bins.start, (bins.end - bins.start) as usize);
        for index in st.block_of(bins.start)..=st.block_of(bins.end - 1) {
            if !self.recent.iter().any(|(i, _)| *i == index) {
                let block = st.block(index)?;
                if self.recent.len() == 2 {
                    self.recent.remove(0);
                }
                self.recent.push((index, block));
            }
            let (_, block) = self.recent.iter().find(|(i, _)| *i == index).expect("just read");
            sums.copy_overlap(block);
        }
        Ok(sums)
    }

    fn compute(&mut self, st: &State, tile: i64) -> Result<TilePair, StateError> {
        if let Some(pair) = self.computed.remove(&tile) {
            return Ok(pair);
        }
        let sums = self.sums(st, self.stages.input_bins(st, tile))?;
        let full = self.stages.tile(st, tile, &sums, false, self.steps, self.step_span_hz).map_err(refused)?;
        let without = if sums.line_steps.iter().any(|&n| n > 0) {
            Some(self.stages.tile(st, tile, &sums, true, self.steps, self.step_span_hz).map_err(refused)?)
        } else {
            None
        };
        Ok(TilePair { full, without })
    }

    /// Whether bin `j` of the tile is above `threshold` in either spectrum.
    fn above(pair: &TilePair, j: usize, threshold: f64) -> bool {
        pair.full.grand[j] > threshold || pair.without.as_ref().is_some_and(|w| w.grand[j] > threshold)
    }

    /// The tiles an update recomputes, from the `planned` ones: further out, one tile at a
    /// time, while a run of bins above threshold (in either spectrum) reaches the span's
    /// first or last bin, so that every candidate of the span is seen whole.
    pub fn extent(&mut self, st: &State, planned: RangeInclusive<i64>) -> Result<RangeInclusive<i64>, StateError> {
        let (first, end) = st.grid_bins.ok_or_else(|| refused("the state's grid is empty".into()))?;
        let grid = st.block_of(first)..=st.block_of(end - 1);
        let threshold = self.stages.threshold();
        let last = st.block_bins - 1;
        let mut lo = *planned.start();
        // The edge tiles found are kept for the pass (the first one also while the upper edge
        // is searched from it).
        loop {
            let pair = self.compute(st, lo)?;
            if !(Self::above(&pair, 0, threshold) && lo > *grid.start()) {
                self.computed.insert(lo, pair);
                break;
            }
            lo -= 1;
        }
        let mut hi = *planned.end();
        loop {
            let pair = self.compute(st, hi)?;
            let extend = Self::above(&pair, last, threshold) && hi < *grid.end();
            if !extend || hi == lo {
                self.computed.insert(hi, pair);
            }
            if !extend {
                break;
            }
            hi += 1;
        }
        Ok(lo..=hi)
    }

    /// Recomputes `tiles` (as [`Tiler::extent`] gave them) in grid order: hands each tile's
    /// grand spectrum to `out` as a block of the span (its candidates closed in it), and keeps
    /// what tracking reads, the bins within `reach` of a bin above threshold and of the
    /// grid bins `tracked`.
    pub fn pass(
        mut self,
        st: &State,
        tiles: RangeInclusive<i64>,
        tracked: &[i64],
        reach: usize,
        out: &mut dyn FnMut(&Block) -> Result<(), String>,
    ) -> Result<Span, StateError> {
        let n = st.block_bins;
        let first_bin = st.block_range(*tiles.start()).start;
        let input_end = self.stages.input_of(st, &tiles).end;
        let span_len = tiles.clone().count() * n;
        let rf_span_hz = (st.freq_hz(first_bin), st.freq_hz(first_bin + span_len as i64 - 1));
        let on_grand = self.stages.on_grand(st, rf_span_hz).map_err(refused)?;
        let threshold = self.stages.threshold();
        let sparse = || SparseSpectrum { rf_start_hz: rf_span_hz.0, bin_width_hz: st.bin_width_hz, len: span_len, ..SparseSpectrum::default() };
        let (mut full, mut without) = (sparse(), sparse());
        let mut has_lines = false;
        let mut mean_beta_sq = f64::NAN;
        let (mut open_full, mut open_without): (Option<OpenRun>, Option<OpenRun>) = (None, None);
        // Marked bins past the current tile's end, and the previous tile's last `reach` bins.
        let mut keep_until = 0usize;
        let mut tail: Vec<(Kept, Kept)> = Vec::new();
        let tracked: Vec<usize> = tracked.iter().filter_map(|&b| usize::try_from(b - first_bin).ok()).filter(|&j| j < span_len).collect();
        for (k, tile) in tiles.enumerate() {
            let pair = self.compute(st, tile)?;
            let o = k * n;
            // Marks in span bins, found before the values are moved into blocks.
            let mut marks: Vec<Range<usize>> = Vec::new();
            if keep_until > o {
                marks.push(o..keep_until.min(o + n));
            }
            for j in (0..n).filter(|&j| Self::above(&pair, j, threshold)) {
                let p = o + j;
                // The part in the next tile is kept when it comes.
                marks.push(p.saturating_sub(reach)..(p + reach + 1).min(o + n));
                keep_until = keep_until.max((p + reach + 1).min(span_len));
            }
            for &c in &tracked {
                let (a, b) = (c.saturating_sub(reach).max(o), (c + reach + 1).min(o + n));
                if a < b {
                    marks.push(a..b);
                }
            }
            let value = |sp: &Spectrum, p: usize, tail_part: fn(&(Kept, Kept)) -> Kept| -> Option<Kept> {
                if p >= o {
                    Some(Kept::of(sp, p - o))
                } else {
                    (o - p).checked_sub(1).and_then(|back| tail.len().checked_sub(back + 1)).map(|i| tail_part(&tail[i]))
                }
            };
            let without_sp = pair.without.as_ref().unwrap_or(&pair.full);
            for p in marks.into_iter().flatten() {
                if let (Some(f), Some(w)) = (value(&pair.full, p, |t| t.0), value(without_sp, p, |t| t.1)) {
                    full.kept.insert(p, f);
                    without.kept.insert(p, w);
                }
            }
            tail = (n.saturating_sub(reach)..n).map(|j| (Kept::of(&pair.full, j), Kept::of(without_sp, j))).collect();
            has_lines |= pair.without.is_some();

            let as_block = |sp: Spectrum, open: Option<OpenRun>| {
                let mut sp = sp;
                let mut b = Block::whole(&mut sp);
                (b.origin_hz, b.first_bin, b.grid_bins, b.open_run) = (rf_span_hz.0, o, span_len, open);
                b
            };
            let TilePair { full: full_sp, without: without_tile } = pair;
            let mut block = as_block(full_sp, open_full);
            flag(&on_grand, &mut block, self.steps)?;
            open_full = block.open_run.take();
            full.candidates.append(&mut block.candidates);
            (full.threshold, without.threshold, mean_beta_sq) = (block.threshold, block.threshold, block.mean_beta_sq);
            match without_tile {
                Some(w) => {
                    let mut wb = as_block(w, open_without);
                    flag(&on_grand, &mut wb, self.steps)?;
                    open_without = wb.open_run.take();
                    without.candidates.append(&mut wb.candidates);
                }
                None => {
                    // The same values: the same flag over them, with the run the spectrum
                    // without the lines carries.
                    let own = std::mem::replace(&mut block.open_run, open_without);
                    flag(&on_grand, &mut block, self.steps)?;
                    open_without = std::mem::replace(&mut block.open_run, own);
                    without.candidates.append(&mut block.candidates);
                }
            }
            out(&block).map_err(refused)?;
        }
        let line_sums = if has_lines {
            let reach = reach as i64;
            // Within the span's input, as the tiles read it.
            let window = |r: Range<usize>| (first_bin + r.start as i64 - reach).max(first_bin)..(first_bin + r.end as i64 + 6 * reach + 1).min(input_end);
            let mut windows: Vec<Range<i64>> = Vec::new();
            for w in full.kept_runs().into_iter().map(window) {
                match windows.last_mut() {
                    // Overlapping windows are read as one, so each bin's window lies in one.
                    Some(last) if w.start <= last.end => last.end = last.end.max(w.end),
                    _ => windows.push(w),
                }
            }
            windows.into_iter().map(|w| st.sums(w)).collect::<Result<_, _>>()?
        } else {
            Vec::new()
        };
        Ok(Span { full, without: has_lines.then_some(without), line_sums, mean_beta_sq })
    }
}

/// Applies the grand-spectrum stages to one block of the span.
fn flag(stages: &[Box<dyn SpectrumStage>], block: &mut Block, steps: &[(usize, StepMeta)]) -> Result<(), StateError> {
    stages.iter().try_for_each(|s| s.apply_block(block, steps)).map_err(refused)
}

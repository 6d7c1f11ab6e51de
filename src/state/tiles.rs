//! The grand spectrum of a state, one tile at a time.
//!
//! The spectrum stages that form the grand spectrum from the combined one (input form
//! `Combined`: the filter) run on one tile at a time. Tile t is block t of the grid, filtered
//! together with the [`Stages::margin_bins`] bins that follow it (twice the filter kernel's
//! length, rounded up to 1024 bins), and keeps the outputs of the block's own bins. A tile's
//! grand spectrum therefore depends on the sums in its input bins and on nothing else, not
//! even at the level of rounding (the FFT blocks of the correlation start at the tile's first
//! bin): an update that recomputes the tiles whose input it changed gets the same bits as a
//! recomputation of the whole campaign, and every other tile keeps its values because its
//! data did not change. The stages that work on the grand spectrum (input form `Grand`: the
//! flag) then run over the tiles in grid order, as blocks of one grid ([`span`](super::span)).

use super::State;
use super::sums::Sums;
use crate::calib::PlanInfo;
use crate::config::{BuildContext, Built, Plan};
use crate::runfile::StepMeta;
use crate::stage::{Form, NightInfo, Spectrum, SpectrumStage};
use std::ops::{Range, RangeInclusive};

/// A plan's spectrum stages, built per tile and per span.
pub(super) struct Stages<'p> {
    plan: &'p Plan,
    info: PlanInfo,
    ctx: BuildContext,
}

impl<'p> Stages<'p> {
    /// The spectrum stages of `plan` (which must have a filter stage: its kernel sets the margin).
    pub(super) fn new(plan: &'p Plan) -> Result<Self, String> {
        let info = PlanInfo::from_plan(plan)?;
        Ok(Self { plan, info, ctx: BuildContext { baseline_kernel: plan.stages.iter().find_map(|s| s.config.baseline_kernel()) } })
    }

    /// Bins after tile `tile`'s block that its filter reads: twice the length of the filter
    /// kernel at the frequency one block above the tile, rounded up to a multiple of 1024.
    pub(super) fn margin_bins(&self, st: &State, tile: i64) -> usize {
        let top_hz = st.freq_hz(st.block_range(tile).end + st.block_bins as i64);
        (2 * self.info.halo.bin_fractions(top_hz, st.bin_width_hz, self.info.tail_fraction).len()).next_multiple_of(1024)
    }

    /// Grid bins whose sums tile `tile`'s grand spectrum depends on.
    pub(super) fn input_bins(&self, st: &State, tile: i64) -> Range<i64> {
        let block = st.block_range(tile);
        block.start..block.end + self.margin_bins(st, tile) as i64
    }

    /// The tiles whose input holds any bin of `bins`.
    pub(super) fn tiles_reading(&self, st: &State, bins: Range<i64>) -> RangeInclusive<i64> {
        let last = st.block_of(bins.end - 1);
        let mut first = st.block_of(bins.start);
        while self.input_bins(st, first - 1).end > bins.start {
            first -= 1;
        }
        first..=last
    }

    /// Grid bins the tiles `tiles` read, together.
    pub(super) fn input_of(&self, st: &State, tiles: &RangeInclusive<i64>) -> Range<i64> {
        self.input_bins(st, *tiles.start()).start..tiles.clone().map(|t| self.input_bins(st, t).end).max().unwrap_or(0)
    }

    /// Tile `tile`'s spectrum from `sums` (which must hold its input bins): the stages that
    /// take the combined spectrum (the filter) applied, every per-bin array cut to the block's
    /// own bins; with `without_lines`, of the sums without the IF-line samples. `steps` are
    /// the steps the stages may report; `step_span_hz` the RF width of one step.
    pub(super) fn tile(
        &self,
        st: &State,
        tile: i64,
        sums: &Sums,
        without_lines: bool,
        steps: &[(usize, StepMeta)],
        step_span_hz: f64,
    ) -> Result<Spectrum, String> {
        let input = self.input_bins(st, tile);
        let mut sp = spectrum_of(st, sums, input.clone(), without_lines, step_span_hz);
        let info = NightInfo {
            bin_width_hz: st.bin_width_hz,
            n_bins: 0,
            rf_span_hz: (st.freq_hz(input.start), st.freq_hz(input.end - 1)),
            headers: Vec::new(),
            bin_correlation: st.bin_correlation.clone(),
        };
        for stage in self.built(&info, Form::Combined)? {
            stage.apply(&mut sp, steps)?;
        }
        let n = st.block_bins;
        for v in [&mut sp.combined, &mut sp.combined_sigma, &mut sp.amplitude, &mut sp.sigma_a, &mut sp.predicted_spread, &mut sp.grand] {
            v.truncate(n);
        }
        sp.coverage.truncate(n);
        Ok(sp)
    }

    /// The stages that take the grand spectrum (the flag), built for a span of the grid from
    /// `rf_span_hz.0` to `rf_span_hz.1` (bin centres, Hz); they run over the span's tiles in
    /// grid order as blocks of one grid.
    pub(super) fn on_grand(&self, st: &State, rf_span_hz: (f64, f64)) -> Result<Vec<Box<dyn SpectrumStage>>, String> {
        let info = NightInfo { bin_width_hz: st.bin_width_hz, n_bins: 0, rf_span_hz, headers: Vec::new(), bin_correlation: st.bin_correlation.clone() };
        self.built(&info, Form::Grand)
    }

    /// The threshold the plan flags the grand spectrum at (infinite without a flag stage).
    pub(super) fn threshold(&self) -> f64 {
        self.plan.stages.iter().find_map(|s| s.config.flag_threshold()).unwrap_or(f64::INFINITY)
    }

    /// The plan's spectrum stages that take `input`, built for `info`'s RF span.
    fn built(&self, info: &NightInfo, input: Form) -> Result<Vec<Box<dyn SpectrumStage>>, String> {
        let mut stages = Vec::new();
        for (i, s) in self.plan.stages.iter().enumerate().filter(|(_, s)| s.entry.input == input) {
            match s.config.build(info, &self.ctx).map_err(|e| format!("stage {} \"{}\": {e}", i + 1, s.entry.kind))? {
                Built::Spectrum(stage) => stages.push(stage),
                _ => return Err(format!("stage {} \"{}\" takes a spectrum but is not a spectrum stage", i + 1, s.entry.kind)),
            }
        }
        Ok(stages)
    }
}

/// The combined spectrum over grid bins `bins` from `sums`; with `without_lines`, of all
/// samples except the IF-line ones (bins without such samples are the same, bit for bit).
fn spectrum_of(st: &State, sums: &Sums, bins: Range<i64>, without_lines: bool, step_span_hz: f64) -> Spectrum {
    let n = (bins.end - bins.start) as usize;
    let (mut combined, mut combined_sigma, mut coverage) = (vec![f64::NAN; n], vec![f64::INFINITY; n], vec![0u32; n]);
    for (k, bin) in bins.clone().enumerate() {
        let Some(j) = sums.index_of(bin) else { continue };
        let (mut w, mut ws, mut c) = (sums.weight[j], sums.weighted_sum[j], sums.coverage[j]);
        if without_lines && sums.line_steps[j] > 0 {
            let rest = w - sums.line_weight[j];
            // Nothing left (up to rounding) when every sample of the bin was a line sample.
            (w, ws) = if rest > 1e-9 * w { (rest, ws - sums.line_weighted_sum[j]) } else { (0.0, 0.0) };
            c = c.saturating_sub(sums.line_steps[j]);
        }
        if w > 0.0 {
            (combined[k], combined_sigma[k]) = (ws / w, w.sqrt().recip());
        }
        coverage[k] = c;
    }
    Spectrum { rf_start_hz: st.freq_hz(bins.start), bin_width_hz: st.bin_width_hz, combined, combined_sigma, coverage, step_span_hz, ..Spectrum::default() }
}

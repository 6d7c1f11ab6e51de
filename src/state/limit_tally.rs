//! The limit range an update records in the state, gathered tile by tile as the span goes by.
//!
//! Over the covered bins of the span that no open tracked candidate holds: their number, the
//! lowest and highest limit relative to KSVZ and the frequencies of the first and last. A bin
//! at or below threshold is in no candidate, so it counts as soon as it is seen; a bin above
//! threshold is in a candidate of the span, kept aside until tracking has said whether that
//! candidate is open.

use super::{LimitRange, State, StateError};
use crate::limits::{LimitAssumptions, LimitBasis, Limits, line_start_hz};
use crate::output::Bins;
use crate::physics::constants::G_GAMMA_KSVZ;
use crate::stage::{Candidate, Spectrum};
use rayon::prelude::*;

/// Bins one parallel task of [`LimitTally::add`] reads.
const PIECE_BINS: usize = 8192;

/// Count, extremes of the limit / KSVZ and extremes of the line-start frequency, Hz.
#[derive(Debug, Clone, Copy)]
struct Extremes {
    count: usize,
    rel_ksvz: (f64, f64),
    freq_hz: (f64, f64),
}

impl Extremes {
    const NONE: Self = Self { count: 0, rel_ksvz: (f64::INFINITY, f64::NEG_INFINITY), freq_hz: (f64::INFINITY, f64::NEG_INFINITY) };

    fn with(self, rel: f64, freq_hz: f64) -> Self {
        self.and(Self { count: 1, rel_ksvz: (rel, rel), freq_hz: (freq_hz, freq_hz) })
    }

    fn and(self, o: Self) -> Self {
        Self {
            count: self.count + o.count,
            rel_ksvz: (self.rel_ksvz.0.min(o.rel_ksvz.0), self.rel_ksvz.1.max(o.rel_ksvz.1)),
            freq_hz: (self.freq_hz.0.min(o.freq_hz.0), self.freq_hz.1.max(o.freq_hz.1)),
        }
    }
}

/// The limit range of an update's span in the making.
#[derive(Debug, Clone)]
pub struct LimitTally {
    /// What the assumptions are made from, if they are not given.
    basis: Option<LimitBasis>,
    /// Made from the basis with the flag's threshold at the first bins.
    assumptions: Option<LimitAssumptions>,
    /// Bins of the span.
    span_bins: usize,
    /// The bins at or below threshold with a limit.
    below: Extremes,
    /// The bins above threshold with a limit if no candidate held them: span bin, limit /
    /// KSVZ, line-start frequency (Hz).
    above: Vec<(usize, f64, f64)>,
}

impl LimitTally {
    /// An empty tally for limits of `basis`.
    pub fn new(basis: LimitBasis) -> Self {
        Self { basis: Some(basis), assumptions: None, span_bins: 0, below: Extremes::NONE, above: Vec::new() }
    }

    /// An empty tally for limits with `assumptions`.
    fn with_assumptions(assumptions: LimitAssumptions) -> Self {
        Self { basis: None, assumptions: Some(assumptions), span_bins: 0, below: Extremes::NONE, above: Vec::new() }
    }

    /// Takes in the next bins of the span, in grid order.
    pub fn add(&mut self, bins: &Bins<'_>) -> Result<(), String> {
        let a = match (&self.assumptions, &self.basis) {
            (Some(a), _) => a,
            (None, Some(basis)) => self.assumptions.insert(basis.at_threshold(Some(bins.threshold).filter(|t| !t.is_nan()))?),
            (None, None) => return Err("limits without assumptions".into()),
        };
        self.span_bins = bins.grid_bins;
        // (limit / KSVZ, line-start frequency) of bin i if it has a limit when unblocked.
        let limit_of = |i: usize| {
            let sigma_eff = bins.sigma_a[i] * bins.predicted_spread[i];
            let freq_hz = line_start_hz(bins.origin_hz, bins.bin_width_hz, bins.first_bin + i);
            let rel = a.g_gamma_at(sigma_eff) / G_GAMMA_KSVZ.abs();
            (sigma_eff.is_finite() && bins.grand[i].is_finite() && rel.is_finite()).then_some((rel, freq_hz))
        };
        let below = (0..bins.grand.len())
            .into_par_iter()
            .with_min_len(PIECE_BINS)
            // At or below threshold (a NaN bin has no limit anyway).
            .filter(|&i| bins.grand[i] <= a.threshold || bins.grand[i].is_nan())
            .filter_map(limit_of)
            .fold(|| Extremes::NONE, |e, (rel, f)| e.with(rel, f))
            .reduce(|| Extremes::NONE, Extremes::and);
        self.below = self.below.and(below);
        for i in (0..bins.grand.len()).filter(|&i| bins.grand[i] > a.threshold) {
            if let Some((rel, f)) = limit_of(i) {
                self.above.push((bins.first_bin + i, rel, f));
            }
        }
        Ok(())
    }
}

impl State {
    /// Records the limit range of an update (tallied over its span, whose grid starts at the
    /// bin-centre frequency `span_start_hz` and whose candidates are `candidates`): over the
    /// covered bins that no open tracked candidate holds (a candidate of the span within
    /// `match_hz` of an open tracked one holds its bins; only the candidate blocks of the
    /// span are read). Errors when a candidate file of the state cannot be read.
    pub fn record_limit_tally(&mut self, tally: &LimitTally, candidates: &[Candidate], span_start_hz: f64, match_hz: f64) -> Result<(), StateError> {
        let first_bin = ((span_start_hz - self.rf_origin_hz) / self.bin_width_hz).round() as i64;
        let reach = (match_hz / self.bin_width_hz).ceil() as i64;
        let tracked = self.open_candidates_near(first_bin..first_bin + tally.span_bins as i64, reach)?;
        let open: Vec<&Candidate> = candidates.iter().filter(|c| tracked.iter().any(|t| (t.frequency_hz - c.frequency_hz).abs() <= match_hz)).collect();
        let held = |j: usize| open.iter().any(|c| c.first_bin <= j && j <= c.last_bin);
        let all = tally.above.iter().filter(|(j, _, _)| !held(*j)).fold(tally.below, |e, &(_, rel, f)| e.with(rel, f));
        self.limit = match (&tally.assumptions, all.count) {
            (Some(a), n) if n > 0 => Some(LimitRange {
                night: self.nights.len().saturating_sub(1),
                confidence: a.confidence,
                excluded_bins: n,
                min_rel_ksvz: all.rel_ksvz.0,
                max_rel_ksvz: all.rel_ksvz.1,
                excluded_span_hz: all.freq_hz,
            }),
            _ => None,
        };
        Ok(())
    }

    /// Records the limit range of an update whose span is held whole in `spectrum`, with the
    /// assumptions of `limits` (see [`State::record_limit_tally`]).
    pub fn record_limit(&mut self, limits: &Limits, spectrum: &Spectrum, match_hz: f64) -> Result<(), StateError> {
        let mut tally = LimitTally::with_assumptions(limits.assumptions.clone());
        for bins in Bins::blocks_of(spectrum) {
            tally.add(&bins).map_err(StateError::Refused)?;
        }
        self.record_limit_tally(&tally, &spectrum.candidates, spectrum.rf_start_hz, match_hz)
    }
}

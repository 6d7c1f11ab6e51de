//! What `axsift status` reports about a state, as one serialisable summary.

use super::{Class, LimitRange, State, StateError};
use serde::{Deserialize, Serialize};

/// The state at a glance: nights and files, coverage, candidates by class, the limit range.
/// Field names carry their units; the JSON form of `status --json` is this struct.
#[derive(Debug, Clone, Serialize)]
pub struct StatusSummary {
    /// Layout version of the state read.
    pub schema_version: u32,
    /// Number of updates saved.
    pub generation: u64,
    /// Nights in order, with their files.
    pub nights: Vec<NightSummary>,
    /// RF bin width, Hz.
    pub bin_width_hz: f64,
    /// Lowest and highest bin-centre RF frequency of the grid, Hz (null when empty).
    pub rf_span_hz: Option<(f64, f64)>,
    /// Total width of the covered bins, Hz.
    pub covered_hz: f64,
    /// Candidates per class.
    pub candidates_by_class: ClassCounts,
    /// Every tracked candidate.
    pub candidates: Vec<CandidateSummary>,
    /// The limit range of the latest calibrated update (null if none was calibrated).
    pub limit: Option<LimitRange>,
}

/// One night of the summary.
#[derive(Debug, Clone, Serialize)]
pub struct NightSummary {
    /// Position in the sequence of nights.
    pub index: usize,
    /// Its run files as given.
    pub files: Vec<String>,
    /// Steps read from its files.
    pub n_steps: usize,
    /// Steps that reached the combination.
    pub n_steps_used: usize,
    /// IF bins where its IF profile shows a line.
    pub if_line_bins: Vec<usize>,
    /// Largest IF-profile significance among them, normal sigma (null if none).
    pub if_line_max_sigma: Option<f64>,
}

/// Candidates per class.
#[derive(Debug, Clone, Default, PartialEq, Eq, Serialize, Deserialize)]
pub struct ClassCounts {
    /// Flagged, not yet revisited.
    pub new: usize,
    /// Still above threshold after a revisit.
    pub persists: usize,
    /// Fell below threshold after a revisit.
    pub cleared: usize,
    /// Explained by a line at a fixed IF offset.
    pub interference: usize,
}

/// One tracked candidate.
#[derive(Debug, Clone, Serialize)]
pub struct CandidateSummary {
    /// Axion frequency hypothesis (line start), Hz.
    pub frequency_hz: f64,
    /// Its class.
    pub class: Class,
    /// Grand-spectrum value at the latest update.
    pub significance: f64,
    /// Night in which it was first flagged.
    pub first_night: usize,
    /// Cavity frequency for a rescan, Hz.
    pub revisit_cavity_hz: f64,
    /// Integration of one rescan step, s (0 for interference).
    pub rescan_integration_s: f64,
    /// Why it has its class.
    pub evidence: String,
}

impl StatusSummary {
    /// Summarises a loaded state (reading every candidate block: the listing is the whole
    /// campaign's). Errors when a candidate file cannot be read.
    pub fn of(st: &State) -> Result<Self, StateError> {
        Ok(Self {
            schema_version: st.schema_version,
            generation: st.generation,
            nights: st
                .nights
                .iter()
                .map(|n| NightSummary {
                    index: n.index,
                    files: n.files.iter().map(|f| f.path.clone()).collect(),
                    n_steps: n.files.iter().map(|f| f.n_steps).sum(),
                    n_steps_used: n.n_steps_used,
                    if_line_bins: n.if_lines.iter().map(|l| l.if_bin).collect(),
                    if_line_max_sigma: n.if_lines.iter().map(|l| l.if_profile_sigma).reduce(f64::max),
                })
                .collect(),
            bin_width_hz: st.bin_width_hz,
            rf_span_hz: st.rf_span_hz(),
            covered_hz: st.covered_bins() as f64 * st.bin_width_hz,
            candidates_by_class: st.candidates.by_class.clone(),
            candidates: st
                .candidates
                .all()?
                .iter()
                .map(|c| CandidateSummary {
                    frequency_hz: c.frequency_hz,
                    class: c.class,
                    significance: c.significance,
                    first_night: c.first_night,
                    revisit_cavity_hz: c.revisit_cavity_hz,
                    rescan_integration_s: c.rescan_integration_s,
                    evidence: c.evidence.clone(),
                })
                .collect(),
            limit: st.limit.clone(),
        })
    }
}

/// Rows of a listing of tracked candidates in the terminal and in the report: the strongest
/// (a campaign of 1e8 bins tracks tens of thousands; all of them are in `axsift status
/// --json`).
pub const LISTED_CANDIDATES: usize = 100;

/// The `n` most significant of `items` (by `significance`; of equal ones the first), in
/// increasing frequency (by `frequency_hz`), and how many items there were.
pub fn strongest<T>(mut items: Vec<T>, n: usize, significance: impl Fn(&T) -> f64, frequency_hz: impl Fn(&T) -> f64) -> (Vec<T>, usize) {
    let total = items.len();
    items.sort_by(|a, b| significance(b).total_cmp(&significance(a)));
    items.truncate(n);
    items.sort_by(|a, b| frequency_hz(a).total_cmp(&frequency_hz(b)));
    (items, total)
}

#[cfg(test)]
mod tests {
    use super::strongest;

    /// The selection against a plain sort: the n largest significances (of equal ones the
    /// first given), listed by frequency, and the count of all.
    #[test]
    fn strongest_keeps_the_most_significant_in_frequency_order() {
        // (frequency, significance): significances 3.0..=3.9 in scrambled frequency order, one tie.
        let items: Vec<(f64, f64)> = (0..10).map(|k| (((k * 7) % 10) as f64, 3.0 + k as f64 / 10.0)).chain([(20.0, 3.9)]).collect();
        let (kept, total) = strongest(items.clone(), 3, |c| c.1, |c| c.0);
        assert_eq!(total, 11);
        let mut by_significance = items.clone();
        by_significance.sort_by(|a, b| b.1.total_cmp(&a.1));
        let mut want: Vec<(f64, f64)> = by_significance[..3].to_vec();
        want.sort_by(|a, b| a.0.total_cmp(&b.0));
        assert_eq!(kept, want);
        assert!(kept.windows(2).all(|w| w[0].0 <= w[1].0));
        assert_eq!(strongest(items, 50, |c| c.1, |c| c.0).0.len(), 11);
    }
}

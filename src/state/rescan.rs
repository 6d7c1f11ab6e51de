//! Tracking candidates across nights: classes, evidence, and the rescan plan.

use crate::stage::Spectrum;
use serde::{Deserialize, Serialize};

/// What the data so far say about a candidate.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum Class {
    /// Flagged, not yet revisited.
    New,
    /// Still above threshold in the combined data after new data covered it.
    Persists,
    /// Fell below threshold once new data covered it; its bins count for the limits.
    Cleared,
}

impl Class {
    /// Whether the candidate still blocks the limit at its frequency.
    pub fn is_open(self) -> bool {
        matches!(self, Class::New | Class::Persists)
    }
}

/// A candidate followed from night to night.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct TrackedCandidate {
    /// Axion frequency hypothesis (line start), Hz.
    pub frequency_hz: f64,
    /// Night in which it was first flagged.
    pub first_night: usize,
    /// Its class.
    pub class: Class,
    /// Grand-spectrum value at the latest update.
    pub significance: f64,
    /// Why it has its class.
    pub evidence: String,
    /// Cavity frequency to tune to for a rescan, Hz.
    pub revisit_cavity_hz: f64,
    /// Integration time of one rescan step that reaches the target SNR on a signal of the
    /// candidate's present (observed, so already attenuated) amplitude, s.
    pub rescan_integration_s: f64,
}

/// Re-examines the open candidates that this night covered and adds the newly flagged ones.
/// A tracked candidate is matched to the grand spectrum within `match_hz` (a line width).
/// `covered(j)` tells whether tonight's data reached RF bin j. `integration_s(j)` gives the
/// rescan time of a candidate at bin j. Returns one line per change of class.
pub fn update(
    tracked: &mut Vec<TrackedCandidate>,
    sp: &Spectrum,
    night: usize,
    match_hz: f64,
    covered: &dyn Fn(usize) -> bool,
    integration_s: &dyn Fn(usize) -> f64,
) -> Vec<String> {
    let threshold = sp.threshold.unwrap_or(f64::INFINITY);
    let bin_of = |f: f64| ((f + sp.bin_width_hz / 2.0 - sp.rf_start_hz) / sp.bin_width_hz).round() as i64;
    let reach = (match_hz / sp.bin_width_hz).ceil() as i64;
    let peak_near = |f: f64| -> Option<(usize, f64)> {
        let centre = bin_of(f);
        (centre - reach..=centre + reach)
            .filter(|&j| j >= 0 && (j as usize) < sp.grand.len())
            .map(|j| (j as usize, sp.grand[j as usize]))
            .filter(|(_, g)| g.is_finite())
            .max_by(|a, b| a.1.total_cmp(&b.1))
    };
    let mut changes = Vec::new();
    for c in tracked.iter_mut().filter(|c| c.class.is_open() && c.first_night < night) {
        let j = bin_of(c.frequency_hz);
        if j < 0 || j as usize >= sp.grand.len() || !covered(j as usize) {
            continue;
        }
        let Some((peak, g)) = peak_near(c.frequency_hz) else { continue };
        let before = c.class;
        c.significance = g;
        if g > threshold {
            c.class = Class::Persists;
            c.evidence = format!("grand {g:.2} > threshold {threshold:.3} at {:.6} MHz after night {night}", (sp.freq_hz(peak) - sp.bin_width_hz / 2.0) / 1e6);
            c.rescan_integration_s = integration_s(peak);
        } else {
            c.class = Class::Cleared;
            c.evidence = format!("fell to grand {g:.2} (threshold {threshold:.3}) once night {night} covered it");
        }
        if c.class != before {
            changes.push(format!("{:.6} MHz: {:?} -> {:?} ({})", c.frequency_hz / 1e6, before, c.class, c.evidence));
        }
    }
    for cand in &sp.candidates {
        let known = tracked.iter().any(|t| (t.frequency_hz - cand.frequency_hz).abs() <= match_hz);
        if !known {
            tracked.push(TrackedCandidate {
                frequency_hz: cand.frequency_hz,
                first_night: night,
                class: Class::New,
                significance: cand.significance,
                evidence: format!("flagged in night {night} at grand {:.2}", cand.significance),
                revisit_cavity_hz: cand.revisit_cavity_hz,
                rescan_integration_s: integration_s(cand.peak_bin),
            });
        }
    }
    tracked.sort_by(|a, b| a.frequency_hz.total_cmp(&b.frequency_hz));
    changes
}

//! Tracking candidates across nights: classes, evidence, and the rescan plan.

use super::span::SparseSpectrum;
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
    /// Above threshold only through samples at IF offsets where the IF profile shows a
    /// line: receiver interference, not a signal at a fixed RF frequency. Needs no rescan.
    Interference,
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
    /// candidate's present (observed, so already attenuated) amplitude, s (0 for
    /// interference: no rescan needed; infinite, null in JSON, when the amplitude is not
    /// positive).
    #[serde(deserialize_with = "infinite_if_null")]
    pub rescan_integration_s: f64,
    /// For class interference: the IF lines that explain it.
    pub interference: Option<InterferenceEvidence>,
}

/// A number that JSON holds as null when it is not finite (serde_json writes NaN and
/// infinities as null), read back as infinity.
fn infinite_if_null<'de, D: serde::Deserializer<'de>>(d: D) -> Result<f64, D::Error> {
    Ok(Option::<f64>::deserialize(d)?.unwrap_or(f64::INFINITY))
}

/// Why a candidate is interference.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct InterferenceEvidence {
    /// The IF lines whose samples fall in the candidate's filter window.
    pub lines: Vec<LineSource>,
    /// Steps whose line samples fall in the window.
    pub n_steps: u32,
    /// Grand-spectrum value near the candidate without those samples.
    pub significance_without: f64,
}

/// One IF line behind an interference candidate.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct LineSource {
    /// Night whose IF profile shows it.
    pub night: usize,
    /// IF bin.
    pub if_bin: usize,
    /// IF offset (RF frequency minus the step's start frequency), Hz.
    pub if_offset_hz: f64,
    /// Its excess scatter in that night's IF profile, normal sigma.
    pub if_profile_sigma: f64,
}

impl InterferenceEvidence {
    /// One line of text for the evidence field and the tables: the IF bins as runs of
    /// adjacent bins per night.
    pub fn describe(&self, threshold: f64) -> String {
        let mut sources: Vec<&LineSource> = self.lines.iter().collect();
        sources.sort_by_key(|l| (l.night, l.if_bin));
        let mut runs: Vec<Vec<&LineSource>> = Vec::new();
        for l in sources {
            match runs.last_mut() {
                Some(run) if run.last().is_some_and(|p| p.night == l.night && p.if_bin + 1 == l.if_bin) => run.push(l),
                _ => runs.push(vec![l]),
            }
        }
        let text: Vec<String> = runs
            .iter()
            .map(|run| {
                let (a, b) = (run[0], run[run.len() - 1]);
                let sigma = run.iter().map(|l| l.if_profile_sigma).fold(f64::NEG_INFINITY, f64::max);
                let bins = if a.if_bin == b.if_bin {
                    format!("IF bin {} (+{:.1} kHz", a.if_bin, a.if_offset_hz / 1e3)
                } else {
                    format!("IF bins {}-{} (+{:.1} to +{:.1} kHz", a.if_bin, b.if_bin, a.if_offset_hz / 1e3, b.if_offset_hz / 1e3)
                };
                format!("{bins} into the step, up to {sigma:.1} sigma in night {}'s IF profile)", a.night)
            })
            .collect();
        format!(
            "fixed-IF line at {} in {} step(s); without their samples grand {:.2} <= threshold {threshold:.3}",
            text.join(", "),
            self.n_steps,
            self.significance_without
        )
    }
}

/// The spectrum without the IF-line samples, and what explains a candidate there.
pub struct LineView<'a> {
    /// The accumulated spectrum with the IF-line samples set aside, spectrum stages applied.
    pub without: &'a SparseSpectrum,
    /// The IF lines whose samples fall in the filter window of a candidate at grand bin j
    /// (None if no such sample).
    pub explain: &'a dyn Fn(usize) -> Option<(Vec<LineSource>, u32)>,
}

/// Re-examines the open candidates that this night covered and adds the newly flagged ones.
/// A tracked candidate is matched to the grand spectrum within `match_hz` (a line width).
/// `covered(j)` tells whether tonight's data reached RF bin j. `integration_s(j)` gives the
/// rescan time of a candidate at bin j. `lines` gives the spectrum without the IF-line
/// samples (None when there are none): a candidate above threshold in `sp` whose neighbourhood
/// is at or below threshold there, with line samples in its window, is interference. Returns
/// one line per change of class.
pub(super) fn update(
    tracked: &mut Vec<TrackedCandidate>,
    sp: &SparseSpectrum,
    lines: Option<&LineView>,
    night: usize,
    match_hz: f64,
    covered: &dyn Fn(usize) -> bool,
    integration_s: &dyn Fn(usize) -> f64,
) -> Vec<String> {
    let threshold = sp.threshold.unwrap_or(f64::INFINITY);
    let bin_of = |f: f64| ((f + sp.bin_width_hz / 2.0 - sp.rf_start_hz) / sp.bin_width_hz).round() as i64;
    let reach = (match_hz / sp.bin_width_hz).ceil() as i64;
    // Reads the bins within `reach` of a tracked candidate or of a bin above threshold, all
    // of which `sp` and the spectrum without the line samples keep.
    let peak_near = |spectrum: &SparseSpectrum, f: f64| -> Option<(usize, f64)> {
        let centre = bin_of(f);
        (centre - reach..=centre + reach)
            .filter(|&j| j >= 0 && (j as usize) < spectrum.len)
            .map(|j| (j as usize, spectrum.grand(j as usize)))
            .filter(|(_, g)| g.is_finite())
            .max_by(|a, b| a.1.total_cmp(&b.1))
    };
    // The evidence if the candidate near `f` falls to the threshold or below without the
    // IF-line samples.
    let interference = |f: f64| -> Option<InterferenceEvidence> {
        let view = lines?;
        let (_, without) = peak_near(view.without, f)?;
        if without > threshold {
            return None;
        }
        let (peak, _) = peak_near(sp, f)?;
        let (lines, n_steps) = (view.explain)(peak)?;
        Some(InterferenceEvidence { lines, n_steps, significance_without: without })
    };
    let mut changes = Vec::new();
    for c in tracked.iter_mut().filter(|c| c.class.is_open() && c.first_night < night) {
        let j = bin_of(c.frequency_hz);
        if j < 0 || j as usize >= sp.len || !covered(j as usize) {
            continue;
        }
        let Some((peak, g)) = peak_near(sp, c.frequency_hz) else { continue };
        let before = c.class;
        c.significance = g;
        let explained = if g > threshold { interference(c.frequency_hz) } else { None };
        if let Some(evidence) = explained {
            c.class = Class::Interference;
            c.evidence = evidence.describe(threshold);
            c.interference = Some(evidence);
            c.rescan_integration_s = 0.0;
        } else if g > threshold {
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
    // Candidates of the spectrum without the line samples that the full one does not show
    // (a negative line sample hid them) are new as well.
    let hidden = lines.map(|v| v.without.candidates.iter().filter(|h| !sp.candidates.iter().any(|c| (c.frequency_hz - h.frequency_hz).abs() <= match_hz)));
    for cand in sp.candidates.iter().chain(hidden.into_iter().flatten()) {
        let known = tracked.iter().any(|t| (t.frequency_hz - cand.frequency_hz).abs() <= match_hz);
        if known {
            continue;
        }
        let explained = interference(cand.frequency_hz);
        let (class, evidence, integration) = match &explained {
            Some(e) => (Class::Interference, e.describe(threshold), 0.0),
            None => (Class::New, format!("flagged in night {night} at grand {:.2}", cand.significance), integration_s(cand.peak_bin)),
        };
        if class == Class::Interference {
            changes.push(format!("{:.6} MHz: flagged as Interference ({evidence})", cand.frequency_hz / 1e6));
        }
        tracked.push(TrackedCandidate {
            frequency_hz: cand.frequency_hz,
            first_night: night,
            class,
            significance: cand.significance,
            evidence,
            revisit_cavity_hz: cand.revisit_cavity_hz,
            rescan_integration_s: integration,
            interference: explained,
        });
    }
    tracked.sort_by(|a, b| a.frequency_hz.total_cmp(&b.frequency_hz));
    changes
}

//! Flag: grand-spectrum bins above the threshold become rescan candidates.
//!
//! The threshold is given directly or as Theta = SNR_target - z_c, z_c the one-sided normal
//! quantile of the confidence c (SNR 5 at 95% gives 3.355). Adjacent flagged bins form one
//! candidate, reported at its most significant bin, with the steps that covered it and the
//! cavity frequency to tune to (the line's mean frequency nu_a (1 + <beta^2>/2)).

use super::{Block, Candidate, NightInfo, OpenRun, SpectrumStage};
use crate::config::{BuildContext, Built, StageConfig};
use crate::runfile::StepMeta;
use serde::Deserialize;
use statrs::distribution::{ContinuousCDF, Normal};

/// Options of the `flag` stage: either `threshold`, or `target_snr` with `confidence`.
#[derive(Debug, Clone, Deserialize, serde::Serialize)]
#[serde(deny_unknown_fields)]
pub struct FlagConfig {
    /// Threshold on the grand spectrum (> 0).
    pub threshold: Option<f64>,
    /// Target SNR a real signal would have.
    pub target_snr: Option<f64>,
    /// Probability that such a signal is flagged (0.5..1).
    pub confidence: Option<f64>,
}

impl FlagConfig {
    /// The resolved threshold, if the options are consistent.
    pub fn threshold(&self) -> Option<f64> {
        match (self.threshold, self.target_snr, self.confidence) {
            (Some(t), None, None) => Some(t),
            (None, Some(snr), Some(c)) if c > 0.0 && c < 1.0 => Some(snr - Normal::standard().inverse_cdf(c)),
            _ => None,
        }
    }
}

impl StageConfig for FlagConfig {
    fn flag_threshold(&self) -> Option<f64> {
        self.threshold()
    }
    fn options(&self) -> toml::Table {
        crate::config::options_of(self)
    }
    fn validate(&self) -> Vec<(String, String)> {
        match (self.threshold, self.target_snr, self.confidence) {
            (Some(_), Some(_), _) | (Some(_), _, Some(_)) => vec![("threshold".into(), "give either threshold or target_snr with confidence, not both".into())],
            (None, None, _) | (None, _, None) => vec![("threshold".into(), "missing: give threshold, or target_snr and confidence".into())],
            (None, Some(_), Some(c)) if !(0.5..1.0).contains(&c) => vec![("confidence".into(), format!("{c} must be in [0.5, 1)"))],
            _ => match self.threshold() {
                Some(t) if t > 0.0 && t.is_finite() => Vec::new(),
                Some(t) => vec![("threshold".into(), format!("resolves to {t}; it must be > 0"))],
                None => vec![("threshold".into(), "cannot be resolved from target_snr and confidence".into())],
            },
        }
    }
    fn build(&self, _night: &NightInfo, _ctx: &BuildContext) -> Result<Built, String> {
        let threshold = self.threshold().ok_or("invalid threshold")?;
        Ok(Built::Spectrum(Box::new(Flag { threshold })))
    }
}

struct Flag {
    threshold: f64,
}

impl Flag {
    /// The candidate of a run of bins above threshold, `first..=last` with its peak.
    fn candidate(sp: &Block, run: OpenRun, last_bin: usize, steps: &[(usize, StepMeta)]) -> Candidate {
        let frequency_hz = sp.freq_hz(run.peak_bin) - sp.bin_width_hz / 2.0;
        let covering_steps =
            steps.iter().filter(|(_, m)| m.start_freq_hz <= frequency_hz && frequency_hz <= m.start_freq_hz + sp.step_span_hz).map(|(i, _)| *i).collect();
        Candidate {
            frequency_hz,
            significance: run.peak_value,
            peak_bin: run.peak_bin,
            first_bin: run.first_bin,
            last_bin,
            revisit_cavity_hz: frequency_hz * (1.0 + sp.mean_beta_sq / 2.0),
            covering_steps,
        }
    }
}

impl SpectrumStage for Flag {
    /// A run reaching the block's end stays open and is continued by the next block; the
    /// steps covering a candidate are all known by then, since a block is finished only
    /// after every step touching it.
    fn apply_block(&self, sp: &mut Block, steps: &[(usize, StepMeta)]) -> Result<(), String> {
        sp.threshold = Some(self.threshold);
        let mut run = sp.open_run.take();
        for j in 0..sp.len.min(sp.grand.len()) {
            let (bin, value) = (sp.first_bin + j, sp.grand[j]);
            if value > self.threshold {
                match &mut run {
                    // The first of equal maxima stays the peak.
                    Some(open) if value > open.peak_value => (open.peak_bin, open.peak_value) = (bin, value),
                    Some(_) => {}
                    None => run = Some(OpenRun { first_bin: bin, peak_bin: bin, peak_value: value }),
                }
            } else if let Some(open) = run.take() {
                let candidate = Self::candidate(sp, open, bin - 1, steps);
                sp.candidates.push(candidate);
            }
        }
        if let Some(open) = run.filter(|_| sp.is_last()) {
            let candidate = Self::candidate(sp, open, sp.first_bin + sp.len - 1, steps);
            sp.candidates.push(candidate);
        } else {
            sp.open_run = run;
        }
        Ok(())
    }
}

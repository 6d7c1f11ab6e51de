//! Ingest: per-step checks on the data and quality cuts on the step metadata.
//!
//! A step is cut (with its reason reported) when its noise temperature, loaded Q or coupling
//! lies outside the configured ranges, or when more than `max_no_data_fraction` of its bins
//! hold no data (masked by the acquisition, or power that is not finite and positive).
//! Non-finite or non-positive bins of kept steps become "no data" (NaN); every step's
//! no-data bins are counted by cause ([`NoDataBins`]) for the summary and the log.

use super::no_data::NoDataBins;
use super::{NightInfo, Step, StepStage, Verdict};
use crate::config::{BuildContext, Built, StageConfig};
use crate::simd::per_bin_loop;
use serde::Deserialize;

/// Options of the `ingest` stage. Ranges are inclusive `[min, max]`.
#[derive(Debug, Clone, Deserialize, serde::Serialize)]
#[serde(deny_unknown_fields)]
pub struct IngestConfig {
    /// Accepted system noise temperature, kelvin.
    #[serde(default = "default_temp")]
    pub noise_temp_k_range: [f64; 2],
    /// Accepted loaded quality factor.
    #[serde(default = "default_q")]
    pub loaded_q_range: [f64; 2],
    /// Accepted antenna coupling beta.
    #[serde(default = "default_beta")]
    pub coupling_beta_range: [f64; 2],
    /// Largest accepted fraction of a step's bins without data (masked, non-finite or
    /// non-positive), dimensionless in [0, 1]; a step with more is cut.
    #[serde(default = "default_no_data")]
    pub max_no_data_fraction: f64,
}

fn default_temp() -> [f64; 2] {
    [0.0, 1e3]
}
fn default_q() -> [f64; 2] {
    [1.0, 1e9]
}
fn default_beta() -> [f64; 2] {
    [0.0, 1e3]
}
fn default_no_data() -> f64 {
    0.5
}

impl StageConfig for IngestConfig {
    fn options(&self) -> toml::Table {
        crate::config::options_of(self)
    }
    fn validate(&self) -> Vec<(String, String)> {
        let mut problems: Vec<(String, String)> =
            [("noise_temp_k_range", self.noise_temp_k_range), ("loaded_q_range", self.loaded_q_range), ("coupling_beta_range", self.coupling_beta_range)]
                .into_iter()
                .filter(|(_, [lo, hi])| !(lo.is_finite() && hi.is_finite() && *lo >= 0.0 && lo < hi))
                .map(|(k, [lo, hi])| (k.to_string(), format!("[{lo}, {hi}] must be finite with 0 <= min < max")))
                .collect();
        if !(0.0..=1.0).contains(&self.max_no_data_fraction) {
            problems.push(("max_no_data_fraction".into(), format!("{} must lie in [0, 1]", self.max_no_data_fraction)));
        }
        problems
    }
    fn build(&self, _night: &NightInfo, _ctx: &BuildContext) -> Result<Built, String> {
        Ok(Built::Step(Box::new(Ingest(self.clone()))))
    }
}

struct Ingest(IngestConfig);

impl StepStage for Ingest {
    fn apply(&self, step: &mut Step, _night: &NightInfo) -> Verdict {
        // Masked bins arrive as NaN; counted here, before any cut, so the tally covers every step.
        let (non_finite, non_positive) = mark_invalid(&mut step.values);
        let masked = step.no_data.masked;
        step.no_data = NoDataBins { masked, non_finite: non_finite.saturating_sub(masked), non_positive };
        let m = &step.meta;
        let checks = [
            ("noise_temp_k", m.noise_temp_k, self.0.noise_temp_k_range),
            ("loaded_q", m.loaded_q, self.0.loaded_q_range),
            ("coupling_beta", m.coupling_beta, self.0.coupling_beta_range),
        ];
        for (name, v, [lo, hi]) in checks {
            if !(lo..=hi).contains(&v) {
                return Verdict::Cut(format!("{name} = {v} outside [{lo}, {hi}]"));
            }
        }
        let n = step.values.len();
        let gaps = step.no_data;
        if gaps.total() as f64 > self.0.max_no_data_fraction * n as f64 {
            return Verdict::Cut(format!(
                "{} of {n} bins hold no data ({} masked, {} non-finite, {} non-positive), more than max_no_data_fraction = {}",
                gaps.total(),
                gaps.masked,
                gaps.non_finite,
                gaps.non_positive,
                self.0.max_no_data_fraction
            ));
        }
        Verdict::Keep
    }
}

per_bin_loop! {
    /// Replaces every bin that is not finite and positive by NaN; returns how many bins were
    /// not finite (NaN, masked bins included, or infinite) and how many finite but <= 0.
    ///
    /// Floating-point comparisons combined with `&` rather than `&&` and counts by addition:
    /// no branch in the loop, so it vectorises (NaN fails every comparison; `<= MAX` rather
    /// than `< INFINITY`, which the compiler turns into integer tests).
    fn mark_invalid(values: &mut [f64]) -> (usize, usize) {
        let mut non_finite = 0;
        let mut non_positive = 0;
        for p in values.iter_mut() {
            let finite = p.abs() <= f64::MAX;
            let positive = *p > 0.0;
            non_finite += usize::from(!finite);
            non_positive += usize::from(finite & !positive);
            *p = if finite & positive { *p } else { f64::NAN };
        }
        (non_finite, non_positive)
    }
}

#[cfg(test)]
mod tests {
    use super::mark_invalid;

    #[test]
    fn invalid_bins_become_nan_and_are_counted_by_cause() {
        let special = [0.0, -0.0, -1.0, f64::INFINITY, f64::NEG_INFINITY, f64::NAN, f64::MIN_POSITIVE, 1e-320, 2.5, f64::MAX];
        // Every length up to a few lanes, so the vector body and the remainder are both used.
        for n in 0..40 {
            let original: Vec<f64> = (0..n).map(|i| special[(i * 7 + n) % special.len()]).collect();
            let mut values = original.clone();
            let (non_finite, non_positive) = mark_invalid(&mut values);
            let want: Vec<f64> = original.iter().map(|&p| if p > 0.0 && p.is_finite() { p } else { f64::NAN }).collect();
            assert_eq!(non_finite, original.iter().filter(|p| !p.is_finite()).count(), "n={n}");
            assert_eq!(non_positive, original.iter().filter(|p| p.is_finite() && **p <= 0.0).count(), "n={n}");
            for (got, want) in values.iter().zip(&want) {
                assert_eq!(got.to_bits(), want.to_bits(), "n={n}");
            }
        }
    }
}

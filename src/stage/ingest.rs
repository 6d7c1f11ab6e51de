//! Ingest: per-step checks on the data and quality cuts on the step metadata.
//!
//! A step is cut (with its reason reported) when its noise temperature, loaded Q or coupling
//! lies outside the configured ranges, or when fewer than half of its bins hold finite,
//! positive power. Non-finite or non-positive bins of kept steps become "no data" (NaN).

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

impl StageConfig for IngestConfig {
    fn options(&self) -> toml::Table {
        crate::config::options_of(self)
    }
    fn validate(&self) -> Vec<(String, String)> {
        [("noise_temp_k_range", self.noise_temp_k_range), ("loaded_q_range", self.loaded_q_range), ("coupling_beta_range", self.coupling_beta_range)]
            .into_iter()
            .filter(|(_, [lo, hi])| !(lo.is_finite() && hi.is_finite() && *lo >= 0.0 && lo < hi))
            .map(|(k, [lo, hi])| (k.to_string(), format!("[{lo}, {hi}] must be finite with 0 <= min < max")))
            .collect()
    }
    fn build(&self, _night: &NightInfo, _ctx: &BuildContext) -> Result<Built, String> {
        Ok(Built::Step(Box::new(Ingest(self.clone()))))
    }
}

struct Ingest(IngestConfig);

impl StepStage for Ingest {
    fn apply(&self, step: &mut Step, _night: &NightInfo) -> Verdict {
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
        let good = mark_invalid(&mut step.values);
        if 2 * good < step.values.len() {
            return Verdict::Cut(format!("only {good} of {} bins hold valid power", step.values.len()));
        }
        Verdict::Keep
    }
}

per_bin_loop! {
    /// Replaces every bin that is not finite and positive by NaN; returns how many bins were
    /// valid.
    ///
    /// Floating-point comparisons combined with `&` rather than `&&` and a count by addition:
    /// no branch in the loop, so it vectorises (NaN fails both comparisons; `<= MAX` rather
    /// than `< INFINITY`, which the compiler turns into integer tests).
    fn mark_invalid(values: &mut [f64]) -> usize {
        let mut good = 0;
        for p in values.iter_mut() {
            let valid = (*p > 0.0) & (*p <= f64::MAX);
            good += usize::from(valid);
            *p = if valid { *p } else { f64::NAN };
        }
        good
    }
}

#[cfg(test)]
mod tests {
    use super::mark_invalid;

    #[test]
    fn invalid_bins_become_nan_and_valid_ones_are_counted() {
        let special = [0.0, -0.0, -1.0, f64::INFINITY, f64::NEG_INFINITY, f64::NAN, f64::MIN_POSITIVE, 1e-320, 2.5, f64::MAX];
        // Every length up to a few lanes, so the vector body and the remainder are both used.
        for n in 0..40 {
            let original: Vec<f64> = (0..n).map(|i| special[(i * 7 + n) % special.len()]).collect();
            let mut values = original.clone();
            let good = mark_invalid(&mut values);
            let want: Vec<f64> = original.iter().map(|&p| if p > 0.0 && p.is_finite() { p } else { f64::NAN }).collect();
            assert_eq!(good, want.iter().filter(|p| !p.is_nan()).count(), "n={n}");
            for (got, want) in values.iter().zip(&want) {
                assert_eq!(got.to_bits(), want.to_bits(), "n={n}");
            }
        }
    }
}

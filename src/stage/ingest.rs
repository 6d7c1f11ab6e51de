//! Ingest: per-step checks on the data and quality cuts on the step metadata.
//!
//! A step is cut (with its reason reported) when its noise temperature, loaded Q or coupling
//! lies outside the configured ranges, or when fewer than half of its bins hold finite,
//! positive power. Non-finite or non-positive bins of kept steps become "no data" (NaN).

use super::{NightInfo, Step, StepStage, Verdict};
use crate::config::{BuildContext, Built, StageConfig};
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
        // Branch-free so the loop vectorises: NaN fails both comparisons.
        let mut good = 0usize;
        for p in step.values.iter_mut() {
            let valid = *p > 0.0 && *p < f64::INFINITY;
            good += usize::from(valid);
            *p = if valid { *p } else { f64::NAN };
        }
        if 2 * good < step.values.len() {
            return Verdict::Cut(format!("only {good} of {} bins hold valid power", step.values.len()));
        }
        Verdict::Keep
    }
}

//! What a campaign needs to know about the plan: reference coupling, density, halo model,
//! Savitzky-Golay window, and a hash of the stages whose options change the calibration.

use crate::config::Plan;
use crate::inject::SignalModel;
use crate::physics::lineshape::HaloModel;
use crate::stage::baseline::BaselineConfig;
use crate::stage::filter::FilterConfig;
use crate::stage::rescale::RescaleConfig;
use serde::de::DeserializeOwned;
use sha2::{Digest, Sha256};

/// Stage kinds whose options change what a calibration measures.
pub const CALIBRATED_KINDS: [&str; 3] = ["baseline", "filter", "flag"];

/// Facts of a plan used to place and size injections.
#[derive(Debug, Clone)]
pub struct PlanInfo {
    /// Reference g_gamma of the rescale stage.
    pub reference_g_gamma: f64,
    /// Dark-matter density of the rescale stage, GeV/cm^3.
    pub dm_density_gev_per_cm3: f64,
    /// Halo model of the filter stage (the injected signals follow it).
    pub halo: HaloModel,
    /// Savitzky-Golay window of the baseline stage, bins.
    pub window_bins: usize,
    /// Fraction of the line's power left outside the filter kernel.
    pub tail_fraction: f64,
}

fn stage_options<T: DeserializeOwned>(text: &str, kind: &str) -> Result<T, String> {
    let table: toml::Table = toml::from_str(text).map_err(|e| e.to_string())?;
    let stages = table.get("stage").and_then(|v| v.as_array()).ok_or("no [[stage]] tables")?;
    let mut found = stages
        .iter()
        .filter_map(|s| s.as_table())
        .find(|t| t.get("kind").and_then(|k| k.as_str()) == Some(kind))
        .cloned()
        .ok_or_else(|| format!("calibration needs a \"{kind}\" stage"))?;
    found.remove("kind");
    toml::Value::Table(found).try_into().map_err(|e: toml::de::Error| format!("stage \"{kind}\": {}", e.message()))
}

impl PlanInfo {
    /// Reads the facts from a loaded plan.
    pub fn from_plan(plan: &Plan) -> Result<Self, String> {
        let rescale: RescaleConfig = stage_options(&plan.text, "rescale")?;
        let filter: FilterConfig = stage_options(&plan.text, "filter")?;
        let baseline: BaselineConfig = stage_options(&plan.text, "baseline")?;
        Ok(Self {
            reference_g_gamma: rescale.g_gamma().ok_or("invalid reference coupling")?,
            dm_density_gev_per_cm3: rescale.dm_density_gev_per_cm3,
            halo: filter.model(),
            window_bins: baseline.window_bins,
            tail_fraction: filter.tail_fraction,
        })
    }

    /// The signal model injections use: the filter's halo and the rescale stage's density.
    pub fn signal_model(&self) -> SignalModel {
        SignalModel { halo: self.halo, dm_density_gev_per_cm3: self.dm_density_gev_per_cm3 }
    }

    /// Bins between injections: two Savitzky-Golay windows, so neither the baseline fit nor the
    /// filter of one injection reaches the next.
    pub fn injection_spacing_bins(&self) -> usize {
        2 * self.window_bins + 64
    }
}

/// SHA-256 (hex) over the kinds and resolved options of the calibrated stages, in plan order.
pub fn stage_hash(plan: &Plan) -> String {
    let mut hasher = Sha256::new();
    for s in plan.stages.iter().filter(|s| CALIBRATED_KINDS.contains(&s.entry.kind)) {
        hasher.update(format!("{}:{:?};", s.entry.kind, s.config));
    }
    hasher.finalize().iter().map(|b| format!("{b:02x}")).collect()
}

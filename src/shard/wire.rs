//! The stored form of a night reduced by one shard: every number kept exactly (floats as
//! IEEE-754 bits, see [`super::bits`]), so a merge on another machine adds the very same
//! values as a single-machine run.

use crate::pipeline::{CutStep, Reduction};
use crate::runfile::{RunHeader, StepMeta};
use crate::stage::no_data::NoDataTally;
use crate::stage::{NightInfo, Spectrum};
use crate::state::{IfLine, IfScan, ReducedNight};
use serde::{Deserialize, Serialize};
use std::path::PathBuf;

/// A [`ReducedNight`] as stored in a shard file.
#[derive(Debug, Serialize, Deserialize)]
pub struct NightWire {
    inputs: Vec<(String, String)>,
    n_steps: Vec<usize>,
    n_steps_in: usize,
    #[serde(with = "super::bits::one")]
    rf_start_hz: f64,
    #[serde(with = "super::bits::one")]
    bin_width_hz: f64,
    #[serde(with = "super::bits::one")]
    step_span_hz: f64,
    #[serde(with = "super::bits")]
    combined: Vec<f64>,
    #[serde(with = "super::bits")]
    combined_sigma: Vec<f64>,
    coverage: Vec<u32>,
    used_steps: Vec<(usize, MetaWire)>,
    cuts: Vec<CutWire>,
    n_bins: usize,
    #[serde(with = "super::bits")]
    rf_span_hz: Vec<f64>,
    headers: Vec<HeaderWire>,
    if_scan: IfScanWire,
    no_data: NoDataTally,
}

#[derive(Debug, Serialize, Deserialize)]
struct IfScanWire {
    #[serde(with = "super::bits")]
    if_profile_sigma: Vec<f64>,
    if_steps: Vec<u32>,
    lines: Vec<IfLine>,
    #[serde(with = "super::bits")]
    removed_weight: Vec<f64>,
    #[serde(with = "super::bits")]
    removed_weighted_sum: Vec<f64>,
    removed_if_bin: Vec<i32>,
}

#[derive(Debug, Serialize, Deserialize)]
struct MetaWire {
    #[serde(with = "super::bits")]
    floats: Vec<f64>,
    n_averages: u64,
}

#[derive(Debug, Serialize, Deserialize)]
struct CutWire {
    step: usize,
    file: PathBuf,
    row: usize,
    stage: String,
    reason: String,
}

#[derive(Debug, Serialize, Deserialize)]
struct HeaderWire {
    #[serde(with = "super::bits")]
    floats: Vec<f64>,
    run_label: String,
    #[serde(with = "super::bits", default)]
    bin_correlation: Vec<f64>,
}

impl NightWire {
    /// The stored form of a night reduced through the combine stage.
    pub fn from_night(n: &ReducedNight) -> Self {
        let r = &n.reduction;
        let sp = &r.spectrum;
        Self {
            inputs: n.inputs.clone(),
            n_steps: n.n_steps.clone(),
            n_steps_in: r.n_steps_in,
            rf_start_hz: sp.rf_start_hz,
            bin_width_hz: sp.bin_width_hz,
            step_span_hz: sp.step_span_hz,
            combined: sp.combined.clone(),
            combined_sigma: sp.combined_sigma.clone(),
            coverage: sp.coverage.clone(),
            used_steps: r
                .used_steps
                .iter()
                .map(|(i, m)| {
                    (
                        *i,
                        MetaWire {
                            floats: vec![m.start_freq_hz, m.cavity_freq_hz, m.loaded_q, m.coupling_beta, m.noise_temp_k, m.timestamp_s],
                            n_averages: m.n_averages,
                        },
                    )
                })
                .collect(),
            cuts: r.cuts.iter().map(|c| CutWire { step: c.step, file: c.file.clone(), row: c.row, stage: c.stage.clone(), reason: c.reason.clone() }).collect(),
            n_bins: r.night.n_bins,
            rf_span_hz: vec![r.night.rf_span_hz.0, r.night.rf_span_hz.1],
            headers: r
                .night
                .headers
                .iter()
                .map(|h| HeaderWire {
                    floats: vec![h.bin_width_hz, h.magnet_field_t, h.cavity_volume_m3, h.form_factor],
                    run_label: h.run_label.clone(),
                    bin_correlation: h.bin_correlation.clone(),
                })
                .collect(),
            if_scan: IfScanWire {
                if_profile_sigma: r.if_scan.if_profile_sigma.clone(),
                if_steps: r.if_scan.if_steps.clone(),
                lines: r.if_scan.lines.clone(),
                removed_weight: r.if_scan.removed_weight.clone(),
                removed_weighted_sum: r.if_scan.removed_weighted_sum.clone(),
                removed_if_bin: r.if_scan.removed_if_bin.clone(),
            },
            no_data: r.no_data.clone(),
        }
    }

    /// The night back, or what is malformed (`what` names the file and night for the message).
    pub fn into_night(self, what: &str) -> Result<ReducedNight, String> {
        let bad = |field: &str| format!("{what}: field `{field}` is malformed");
        let n = self.combined.len();
        if self.combined_sigma.len() != n || self.coverage.len() != n {
            return Err(bad("combined_sigma/coverage (lengths differ from `combined`)"));
        }
        if self.inputs.len() != self.n_steps.len() || self.rf_span_hz.len() != 2 || self.headers.is_empty() {
            return Err(bad("inputs/n_steps/rf_span_hz/headers"));
        }
        let used_steps = self
            .used_steps
            .into_iter()
            .map(|(i, m)| match m.floats[..] {
                [start_freq_hz, cavity_freq_hz, loaded_q, coupling_beta, noise_temp_k, timestamp_s] => {
                    Ok((i, StepMeta { start_freq_hz, cavity_freq_hz, loaded_q, coupling_beta, noise_temp_k, n_averages: m.n_averages, timestamp_s }))
                }
                _ => Err(bad("used_steps")),
            })
            .collect::<Result<Vec<_>, _>>()?;
        let headers = self
            .headers
            .into_iter()
            .map(|h| match h.floats[..] {
                [bin_width_hz, magnet_field_t, cavity_volume_m3, form_factor] => {
                    Ok(RunHeader { bin_width_hz, magnet_field_t, cavity_volume_m3, form_factor, run_label: h.run_label, bin_correlation: h.bin_correlation })
                }
                _ => Err(bad("headers")),
            })
            .collect::<Result<Vec<_>, _>>()?;
        let spectrum = Spectrum {
            rf_start_hz: self.rf_start_hz,
            bin_width_hz: self.bin_width_hz,
            combined: self.combined,
            combined_sigma: self.combined_sigma,
            coverage: self.coverage,
            step_span_hz: self.step_span_hz,
            ..Spectrum::default()
        };
        let night = NightInfo {
            bin_width_hz: headers[0].bin_width_hz,
            n_bins: self.n_bins,
            rf_span_hz: (self.rf_span_hz[0], self.rf_span_hz[1]),
            bin_correlation: headers[0].bin_correlation.clone(),
            headers,
        };
        let cuts = self.cuts.into_iter().map(|c| CutStep { step: c.step, file: c.file, row: c.row, stage: c.stage, reason: c.reason }).collect();
        let w = self.if_scan;
        let if_scan = IfScan {
            if_profile_sigma: w.if_profile_sigma,
            if_steps: w.if_steps,
            lines: w.lines,
            removed_weight: w.removed_weight,
            removed_weighted_sum: w.removed_weighted_sum,
            removed_if_bin: w.removed_if_bin,
        };
        let reduction = Reduction { spectrum, n_steps_in: self.n_steps_in, used_steps, cuts, night, if_scan, no_data: self.no_data };
        Ok(ReducedNight { inputs: self.inputs, n_steps: self.n_steps, reduction })
    }
}

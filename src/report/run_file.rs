//! A machine-readable description of a run file (what `inspect --json` prints).

use crate::runfile::RunReader;
use serde_json::{Value, json};

/// Header, shape, RF span and per-column ranges and medians of a validated run file, as JSON.
/// Frequencies in Hz, temperatures in K, times in Unix seconds.
pub fn describe(r: &RunReader) -> Value {
    let h = r.header();
    let steps = r.steps();
    let span_hz = r.n_bins().saturating_sub(1) as f64 * h.bin_width_hz;
    let column = |f: fn(&crate::runfile::StepMeta) -> f64| {
        let mut v: Vec<f64> = steps.iter().map(f).collect();
        v.sort_by(f64::total_cmp);
        match (v.first(), v.last()) {
            (Some(lo), Some(hi)) => json!({ "min": lo, "median": v[v.len() / 2], "max": hi }),
            _ => Value::Null,
        }
    };
    json!({
        "path": r.path().display().to_string(),
        "format": crate::runfile::FORMAT_NAME,
        "format_version": crate::runfile::FORMAT_VERSION,
        "run_label": h.run_label,
        "n_steps": steps.len(),
        "n_bins": r.n_bins(),
        "bin_width_hz": h.bin_width_hz,
        "magnet_field_t": h.magnet_field_t,
        "cavity_volume_m3": h.cavity_volume_m3,
        "form_factor": h.form_factor,
        "rf_start_hz": steps.iter().map(|s| s.start_freq_hz).reduce(f64::min),
        "rf_stop_hz": steps.iter().map(|s| s.start_freq_hz + span_hz).reduce(f64::max),
        "steps": {
            "start_freq_hz": column(|s| s.start_freq_hz),
            "cavity_freq_hz": column(|s| s.cavity_freq_hz),
            "loaded_q": column(|s| s.loaded_q),
            "coupling_beta": column(|s| s.coupling_beta),
            "noise_temp_k": column(|s| s.noise_temp_k),
            "n_averages": column(|s| s.n_averages as f64),
            "timestamp_s": column(|s| s.timestamp_s),
        },
    })
}

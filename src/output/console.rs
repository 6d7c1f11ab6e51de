//! Human-readable summaries printed on the terminal.

use super::{PeakValues, Summary};
use crate::calib::Calibration;
use crate::limits::Limits;
use crate::pipeline::Reduction;
use crate::runfile::RunReader;
use crate::stage::no_data::count;
use std::fmt::Write;
use std::path::PathBuf;

/// Candidates listed on the terminal (all of them are in `candidates.csv`).
const MAX_LISTED: usize = 15;

/// What is printed under every rescan plan.
pub const ADVISORY: &str = "Advice only: axsift reads data and suggests where to look again. It does not \
control the magnet, cryostat or RF chain; retune and ramp only under the laboratory's own safety rules.";

/// The morning summary of a reduction (`s` its summary): steps, coverage, grand-spectrum
/// statistics, candidates.
pub fn night_report(r: &Reduction, s: &Summary, calibrated: Option<(&Calibration, &Limits)>, written: &[PathBuf]) -> String {
    let peaks = PeakValues::of_spectrum(&r.spectrum);
    night_report_for(r, s, calibrated.map(|c| (c.0, &peaks)), written)
}

/// The morning summary of a reduction as [`night_report`] gives it, with the calibration it
/// was made with and the values at its candidates' peaks (its limits are in the summary `s`).
pub fn night_report_for(r: &Reduction, s: &Summary, calibrated: Option<(&Calibration, &PeakValues)>, written: &[PathBuf]) -> String {
    let calibration = calibrated.map(|c| c.0);
    let mut out = String::new();
    let _ = writeln!(out, "Steps: {} read, {} used, {} cut", s.n_steps_in, s.n_steps_used, s.cuts.len());
    for c in s.cuts.iter().take(MAX_LISTED) {
        let _ = writeln!(out, "  cut step {} ({} row {}) by {}: {}", c.step, c.file.display(), c.row, c.stage, c.reason);
    }
    let nd = s.no_data;
    if nd.masked.bins + nd.non_finite.bins + nd.non_positive.bins > 0 {
        let _ = writeln!(
            out,
            "No-data bins: {} masked ({}), {} non-finite ({}), {} non-positive ({})",
            nd.masked.bins,
            count(nd.masked.steps, "step"),
            nd.non_finite.bins,
            count(nd.non_finite.steps, "step"),
            nd.non_positive.bins,
            count(nd.non_positive.steps, "step")
        );
    }
    let _ = writeln!(out, "RF coverage: {:.6} - {:.6} MHz, {} bins of {} Hz", s.rf_start_hz / 1e6, s.rf_stop_hz / 1e6, s.n_rf_bins, r.spectrum.bin_width_hz);
    let _ = writeln!(
        out,
        "Grand spectrum: mean {:+.4}, std {:.4} over {} bins (raw spread of A/sigma_A: predicted {:.4}, measured {:.4})",
        s.grand_mean, s.grand_std, s.n_valid_bins, s.predicted_raw_spread, s.measured_raw_spread
    );
    let _ = writeln!(
        out,
        "Threshold {:.3}: {} bins above it (noise alone would give about {:.1}), merged into {} rescan candidate(s)",
        s.threshold, s.n_bins_above_threshold, s.expected_null_bins_above, s.n_candidates
    );
    if let Some(cal) = calibration {
        let _ = writeln!(
            out,
            "Calibration: eta = {:.3} +- {:.3} ({} injections), null spread {:.4}, KS p = {:.3}",
            cal.attenuation.eta, cal.attenuation.standard_error, cal.attenuation.n, cal.null.std, cal.null.ks.p_value
        );
    }
    if let Some(l) = &s.limits {
        let _ = writeln!(
            out,
            "Limits ({:.0}% confidence): {:.1}% of bins excluded; |g|/g_KSVZ best {:.3}, median {:.3}, worst {:.3} (candidate bins not excluded until rescans clear them)",
            100.0 * l.confidence,
            100.0 * l.excluded_fraction,
            l.best_rel_ksvz,
            l.median_rel_ksvz,
            l.worst_rel_ksvz
        );
    } else {
        let _ = writeln!(out, "Limits: none without a calibration (they need the measured eta; see `axsift calibrate`)");
    }
    if !s.candidates.is_empty() {
        let _ = write!(out, "\n  {:>3}  {:>20}  {:>12}  {:>24}  {:>6}", "#", "RF frequency (MHz)", "significance", "retune cavity to (MHz)", "steps");
        let _ = writeln!(out, "{}", if calibration.is_some() { format!("  {:>14}", "|g|/g_ref") } else { String::new() });
        let mut ranked: Vec<_> = s.candidates.iter().collect();
        ranked.sort_by(|a, b| b.significance.total_cmp(&a.significance));
        for (i, c) in ranked.iter().take(MAX_LISTED).enumerate() {
            let _ = write!(
                out,
                "  {:>3}  {:>20.6}  {:>12.2}  {:>24.6}  {:>6}",
                i + 1,
                c.frequency_hz / 1e6,
                c.significance,
                c.revisit_cavity_hz / 1e6,
                c.covering_steps.len()
            );
            let implied = calibrated.map(|(cal, peaks)| format!("  {:>14.3}", peaks.implied(c, cal.attenuation.eta).0));
            let _ = writeln!(out, "{}", implied.unwrap_or_default());
        }
        if s.n_candidates > MAX_LISTED {
            let _ = writeln!(out, "  ... {} more in candidates.csv", s.n_candidates - MAX_LISTED);
        }
        let _ = writeln!(out, "\n{ADVISORY}");
    }
    let _ = writeln!(out, "\nOutputs:");
    for p in written {
        let _ = writeln!(out, "  {}", p.display());
    }
    out
}

/// A short description of a validated run file.
pub fn run_file_report(r: &RunReader) -> String {
    let steps = r.steps();
    let h = r.header();
    let mut out = String::new();
    let _ = writeln!(out, "{}: valid axsift run file, run \"{}\"", r.path().display(), h.run_label);
    let _ = writeln!(out, "  {} steps x {} bins of {} Hz", steps.len(), r.n_bins(), h.bin_width_hz);
    let _ = writeln!(out, "  magnet {} T, cavity {} m^3, form factor {}", h.magnet_field_t, h.cavity_volume_m3, h.form_factor);
    if let (Some(first), Some(last)) = (steps.first(), steps.last()) {
        let span = (r.n_bins().saturating_sub(1)) as f64 * h.bin_width_hz;
        let _ = writeln!(out, "  RF {:.6} - {:.6} MHz", first.start_freq_hz / 1e6, (last.start_freq_hz + span) / 1e6);
        let median = |f: fn(&crate::runfile::StepMeta) -> f64| {
            let mut v: Vec<f64> = steps.iter().map(f).collect();
            v.sort_by(f64::total_cmp);
            v[v.len() / 2]
        };
        let _ = writeln!(
            out,
            "  median T_sys {:.3} K, Q_L {:.0}, beta {:.2}, N {:.0}",
            median(|s| s.noise_temp_k),
            median(|s| s.loaded_q),
            median(|s| s.coupling_beta),
            median(|s| s.n_averages as f64)
        );
    }
    out
}

/// The summary of a calibration campaign.
pub fn calibration_report(cal: &Calibration, written: &[PathBuf]) -> String {
    let mut out = String::new();
    let a = &cal.attenuation;
    let _ = writeln!(
        out,
        "Signal attenuation eta = {:.4} +- {:.4} (spread {:.4}, {} injections at SNR {})",
        a.eta, a.standard_error, a.spread, a.n, cal.spec.eta_snr
    );
    let n = &cal.null;
    let _ = writeln!(
        out,
        "Null grand spectrum: mean {:+.4}, std {:.4} over {} bins (correction {:.4}); KS vs N(0,1) on {} thinned bins: D = {:.4}, p = {:.3}",
        n.mean, n.std, n.n_bins, n.correction, n.ks.n, n.ks.statistic, n.ks.p_value
    );
    let r = &cal.radiometer;
    let _ = writeln!(
        out,
        "Radiometer: Dicke SNR of a reference axion {:.3}, chain 1/sigma_A {:.3} (ratio {:.3}; sqrt(3/pi) = 0.977 expected), grand-spectrum SNR {:.3}",
        r.dicke_snr, r.filter_snr, r.ratio, r.grand_snr
    );
    let _ = writeln!(out, "\nDetection efficiency at threshold {:.3}:", cal.threshold);
    let _ = writeln!(out, "  {:>6}  {:>6}  {:>10}  {:>8}  {:>8}", "SNR", "n", "efficiency", "+-", "ideal");
    for p in &cal.efficiency {
        let _ = writeln!(out, "  {:>6.2}  {:>6}  {:>10.3}  {:>8.3}  {:>8.3}", p.snr, p.n, p.efficiency, p.standard_error, p.ideal);
    }
    let _ = writeln!(out, "\nOutputs (calibration.json alone lists the injected frequencies):");
    for p in written {
        let _ = writeln!(out, "  {}", p.display());
    }
    out
}

/// The summary of a forecast.
pub fn forecast_report(fc: &crate::limits::forecast::Forecast, written: &[PathBuf]) -> String {
    let mut out = String::new();
    let mut rel: Vec<f64> = fc.reach.iter().map(|r| r.rel_ksvz).collect();
    rel.sort_by(f64::total_cmp);
    let _ = writeln!(out, "Planned run: {} steps, {:.2} days", fc.n_steps, fc.planned_days);
    let _ = writeln!(out, "Reach: |g|/g_KSVZ from {:.3} (best) to {:.3} (worst), median {:.3}", rel[0], rel[rel.len() - 1], rel[rel.len() / 2]);
    let _ = writeln!(out, "To reach the target coupling: {:.0} s per step, scanning {:.3} MHz per day", fc.integration_for_target_s, fc.rate_mhz_per_day);
    let _ = writeln!(out, "\n{ADVISORY}");
    let _ = writeln!(out, "\nOutputs:");
    for p in written {
        let _ = writeln!(out, "  {}", p.display());
    }
    out
}

/// The analysis state: nights, coverage, candidates by class with the rescan plan. Errors
/// when a candidate file of the state cannot be read (the listing reads them all).
pub fn state_report(st: &crate::state::State, changes: &[String]) -> Result<String, crate::state::StateError> {
    use crate::state::Class;
    let listing = st.candidates.all()?;
    let mut out = String::new();
    let files: usize = st.nights.iter().map(|n| n.files.len()).sum();
    let covered = st.covered_bins();
    let _ = writeln!(out, "\nAnalysis state: {} night(s), {} run file(s), generation {}", st.nights.len(), files, st.generation);
    let _ = writeln!(
        out,
        "  RF {:.6} - {:.6} MHz, {:.3} MHz covered",
        st.rf_span_hz().map_or(f64::NAN, |s| s.0) / 1e6,
        st.rf_span_hz().map_or(f64::NAN, |s| s.1) / 1e6,
        covered as f64 * st.bin_width_hz / 1e6
    );
    for c in changes.iter().take(crate::state::LISTED_CANDIDATES) {
        let _ = writeln!(out, "  changed: {c}");
    }
    if changes.len() > crate::state::LISTED_CANDIDATES {
        let _ = writeln!(out, "  ... and {} more changes of class (all of them in `axsift status --json`)", changes.len() - crate::state::LISTED_CANDIDATES);
    }
    let count = |k: Class| listing.iter().filter(|c| c.class == k).count();
    let _ = writeln!(
        out,
        "  candidates: {} new, {} persist, {} cleared, {} interference",
        count(Class::New),
        count(Class::Persists),
        count(Class::Cleared),
        count(Class::Interference)
    );
    for n in st.nights.iter().filter(|n| !n.if_lines.is_empty()) {
        let peak = n.if_lines.iter().map(|l| l.if_profile_sigma).fold(f64::NEG_INFINITY, f64::max);
        let (lo, hi) = (n.if_lines[0].if_offset_hz, n.if_lines[n.if_lines.len() - 1].if_offset_hz);
        let _ = writeln!(
            out,
            "  night {}: {} IF bin(s) with a line, +{:.1} to +{:.1} kHz into the step, up to {peak:.1} sigma",
            n.index,
            n.if_lines.len(),
            lo / 1e3,
            hi / 1e3
        );
    }
    if let Some(l) = &st.limit {
        let _ = writeln!(
            out,
            "  limit (night {}, {:.0}% confidence): |g_gamma| / KSVZ {:.3} to {:.3} over {} bins",
            l.night,
            100.0 * l.confidence,
            l.min_rel_ksvz,
            l.max_rel_ksvz,
            l.excluded_bins
        );
    }
    fn shown(list: Vec<&crate::state::TrackedCandidate>) -> (Vec<&crate::state::TrackedCandidate>, usize) {
        crate::state::strongest(list, crate::state::LISTED_CANDIDATES, |c| c.significance, |c| c.frequency_hz)
    }
    // Under a table: how many rows were left out.
    let more = |out: &mut String, (rows, total): (usize, usize)| {
        if total > rows {
            let _ = writeln!(out, "  ... the {rows} strongest of {total} shown, in frequency order; all of them: `axsift status --json`");
        }
    };
    let (interference, total) = shown(listing.iter().filter(|c| c.class == Class::Interference).collect());
    if !interference.is_empty() {
        let _ = writeln!(out, "\n  Interference (fixed IF offset; no rescan needed):");
        let _ = writeln!(out, "  {:>20}  {:>8}  evidence", "RF frequency (MHz)", "grand");
        for c in &interference {
            let _ = writeln!(out, "  {:>20.6}  {:>8.2}  {}", c.frequency_hz / 1e6, c.significance, c.evidence);
        }
        more(&mut out, (interference.len(), total));
    }
    let (open, total) = shown(listing.iter().filter(|c| c.class.is_open()).collect());
    if !open.is_empty() {
        let _ = writeln!(out, "\n  Rescan plan (target SNR {}):", crate::state::RESCAN_TARGET_SNR);
        let _ = writeln!(out, "  {:>20}  {:>9}  {:>8}  {:>24}  {:>14}", "RF frequency (MHz)", "class", "grand", "retune cavity to (MHz)", "integrate (s)");
        for c in &open {
            let _ = writeln!(
                out,
                "  {:>20.6}  {:>9}  {:>8.2}  {:>24.6}  {:>14.0}",
                c.frequency_hz / 1e6,
                format!("{:?}", c.class).to_lowercase(),
                c.significance,
                c.revisit_cavity_hz / 1e6,
                c.rescan_integration_s
            );
        }
        more(&mut out, (open.len(), total));
        let _ = writeln!(out, "\n{ADVISORY}");
    }
    Ok(out)
}

//! Assembles the page: inline CSS, one `<section>` per topic, inline SVG figures, no script
//! and no external reference of any kind.

use super::data::ReportData;
use super::plots::{self, StepQuantity};
use std::collections::HashSet;
use std::fmt::Write;

/// Section headings, in page order (tests look for them).
pub const HEADINGS: [&str; 10] = [
    "The night at a glance",
    "Quality cuts",
    "Steps through the night",
    "Grand spectrum",
    "Distribution of the grand spectrum",
    "Rescan candidates",
    "Across nights",
    "Exclusion limits",
    "Calibration",
    "Provenance",
];

const STYLE: &str = r#"
:root { --ink:#1f2933; --muted:#5f6b7a; --line:#e1e4e8; --accent:#1f5aa0; --alert:#c82d28; --ok:#288c46; --panel:#f6f8fa; }
* { box-sizing: border-box; }
body { margin:0; font-family: "DejaVu Sans", "Liberation Sans", Arial, sans-serif; color:var(--ink); background:#fff; line-height:1.45; font-size:15px; }
header { background:#17324d; color:#fff; padding:22px 36px 18px; }
header h1 { margin:0 0 4px; font-size:26px; font-weight:600; }
header p { margin:2px 0; color:#c9d6e3; }
nav { padding:8px 36px; background:var(--panel); border-bottom:1px solid var(--line); font-size:14px; }
nav a { color:var(--accent); text-decoration:none; margin-right:16px; white-space:nowrap; }
main { max-width:1180px; margin:0 auto; padding:8px 36px 40px; }
section { margin-top:30px; }
h2 { font-size:20px; border-bottom:2px solid var(--line); padding-bottom:4px; margin-bottom:12px; }
.cards { display:grid; grid-template-columns:repeat(auto-fill, minmax(210px, 1fr)); gap:12px; }
.card { background:var(--panel); border:1px solid var(--line); border-radius:6px; padding:10px 14px; }
.card .k { color:var(--muted); font-size:13px; }
.card .v { font-size:20px; font-weight:600; }
.card .s { color:var(--muted); font-size:12.5px; }
table { border-collapse:collapse; width:100%; font-size:14px; margin:8px 0; }
th, td { text-align:left; padding:5px 10px; border-bottom:1px solid var(--line); vertical-align:top; }
th { background:var(--panel); font-weight:600; }
td.n, th.n { text-align:right; font-variant-numeric:tabular-nums; }
.scroll { max-height:560px; overflow-y:auto; border:1px solid var(--line); border-radius:4px; }
.scroll table { margin:0; }
.scroll th { position:sticky; top:0; }
svg.figure { width:100%; height:auto; display:block; border:1px solid var(--line); border-radius:4px; }
.grid2 { display:grid; grid-template-columns:repeat(auto-fit, minmax(460px, 1fr)); gap:14px; }
.legend { font-size:13px; color:var(--muted); margin:6px 0 0; }
.sw { display:inline-block; width:18px; height:3px; vertical-align:middle; margin:0 5px 0 12px; }
.note { color:var(--muted); font-size:13.5px; }
.advice { background:#fff6e5; border-left:4px solid #e0a020; padding:10px 14px; margin:10px 0; }
.good { color:var(--ok); font-weight:600; }
.bad { color:var(--alert); font-weight:600; }
pre { background:var(--panel); border:1px solid var(--line); padding:10px; overflow-x:auto; font-size:12.5px; }
code { font-family:"DejaVu Sans Mono", monospace; font-size:13px; }
details summary { cursor:pointer; color:var(--accent); }
footer { color:var(--muted); font-size:12.5px; border-top:1px solid var(--line); margin-top:36px; padding-top:10px; }
"#;

/// Escapes text for HTML element content and attribute values.
pub fn escape(s: &str) -> String {
    let mut out = String::with_capacity(s.len());
    for c in s.chars() {
        match c {
            '&' => out.push_str("&amp;"),
            '<' => out.push_str("&lt;"),
            '>' => out.push_str("&gt;"),
            '"' => out.push_str("&quot;"),
            '\'' => out.push_str("&#39;"),
            c => out.push(c),
        }
    }
    out
}

fn num(v: Option<f64>, digits: usize) -> String {
    match v {
        // No "-0.000": values that round to zero print without a sign.
        Some(v) if v.is_finite() => format!("{:.digits$}", if format!("{:.digits$}", v.abs()).trim_start_matches(['0', '.']).is_empty() { 0.0 } else { v }),
        _ => "n/a".into(),
    }
}

fn median(mut v: Vec<f64>) -> Option<f64> {
    v.retain(|x| x.is_finite());
    v.sort_by(f64::total_cmp);
    (!v.is_empty()).then(|| if v.len() % 2 == 1 { v[v.len() / 2] } else { 0.5 * (v[v.len() / 2 - 1] + v[v.len() / 2]) })
}

fn card(out: &mut String, key: &str, value: &str, sub: &str) {
    let _ = write!(
        out,
        "<div class=\"card\"><div class=\"k\">{}</div><div class=\"v\">{}</div><div class=\"s\">{}</div></div>",
        escape(key),
        escape(value),
        escape(sub)
    );
}

fn swatch(colour: &str, label: &str) -> String {
    format!("<span class=\"sw\" style=\"background:{colour}\"></span>{}", escape(label))
}

fn open_section(out: &mut String, heading: &str) {
    let id = heading.to_lowercase().replace(' ', "-");
    let _ = write!(out, "<section id=\"{id}\"><h2>{}</h2>", escape(heading));
}

/// Renders the whole page.
pub fn render(d: &ReportData) -> anyhow::Result<String> {
    let s = &d.summary;
    let cut: HashSet<usize> = s.cuts.iter().map(|c| c.step).collect();
    let present: Vec<&str> = HEADINGS
        .iter()
        .copied()
        .filter(|h| match *h {
            "Steps through the night" => d.steps.as_ref().is_ok_and(|x| !x.steps.is_empty()) || d.steps.is_err(),
            "Across nights" => d.state.is_some(),
            "Exclusion limits" => d.limits.is_some(),
            "Calibration" => d.calibration.is_some() || s.calibration.is_some(),
            _ => true,
        })
        .collect();
    let title = match d.run_labels.first() {
        Some(l) if d.run_labels.len() == 1 => l.clone(),
        Some(l) => format!("{l} and {} more", d.run_labels.len() - 1),
        None => "reduction".into(),
    };
    let mut out = String::new();
    let _ = write!(
        out,
        "<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\"><meta name=\"viewport\" content=\"width=device-width, initial-scale=1\"><title>Morning report: {}</title><style>{STYLE}</style></head><body>",
        escape(&title)
    );
    let _ = write!(
        out,
        "<header><h1>Morning report</h1><p>{}</p><p>{} rescan candidate(s) &middot; {} of {} steps used &middot; {:.3} to {:.3} MHz</p></header><nav>",
        escape(&title),
        s.n_candidates,
        s.n_steps_used,
        s.n_steps_in,
        s.rf_start_hz / 1e6,
        s.rf_stop_hz / 1e6
    );
    for h in &present {
        let _ = writeln!(out, "<a href=\"#{}\">{}</a>", h.to_lowercase().replace(' ', "-"), escape(h));
    }
    out.push_str("</nav><main>");
    for h in present {
        open_section(&mut out, h);
        match h {
            "The night at a glance" => glance(&mut out, d),
            "Quality cuts" => cuts(&mut out, d),
            "Steps through the night" => steps(&mut out, d, &cut)?,
            "Grand spectrum" => grand(&mut out, d)?,
            "Distribution of the grand spectrum" => distribution(&mut out, d)?,
            "Rescan candidates" => candidates(&mut out, d),
            "Across nights" => across_nights(&mut out, d),
            "Exclusion limits" => exclusion(&mut out, d)?,
            "Calibration" => calibration(&mut out, d)?,
            _ => provenance(&mut out, d),
        }
        out.push_str("</section>");
    }
    let _ = writeln!(
        out,
        "<footer>Written by axsift {}. This page needs no network and no script.</footer></main></body></html>",
        escape(&s.provenance.tool_version)
    );
    Ok(out)
}

fn glance(out: &mut String, d: &ReportData) {
    let s = &d.summary;
    out.push_str("<div class=\"cards\">");
    let files = s
        .provenance
        .inputs
        .iter()
        .map(|(p, _)| std::path::Path::new(p).file_name().map_or(p.clone(), |f| f.to_string_lossy().into_owned()))
        .collect::<Vec<_>>()
        .join(", ");
    card(out, "Run files", &s.provenance.inputs.len().to_string(), &files);
    card(out, "Steps used", &format!("{} / {}", s.n_steps_used, s.n_steps_in), &format!("{} cut", s.n_steps_in - s.n_steps_used));
    let span_mhz = (s.rf_stop_hz - s.rf_start_hz) / 1e6;
    card(
        out,
        "RF coverage",
        &format!("{span_mhz:.3} MHz"),
        &format!("{:.4} to {:.4} MHz, {} bins of {} Hz", s.rf_start_hz / 1e6, s.rf_stop_hz / 1e6, s.n_rf_bins, d.bin_width_hz),
    );
    if let Ok(diag) = &d.steps {
        let cut: HashSet<usize> = s.cuts.iter().map(|c| c.step).collect();
        let used: Vec<_> = diag.steps.iter().filter(|x| !cut.contains(&x.index)).collect();
        let live_s: f64 = used.iter().map(|x| x.meta.n_averages as f64 / d.bin_width_hz).sum();
        let t = || diag.steps.iter().map(|x| x.meta.timestamp_s);
        let wall_h = (t().fold(f64::NEG_INFINITY, f64::max) - t().fold(f64::INFINITY, f64::min)) / 3600.0;
        card(out, "Integration (used steps)", &format!("{:.2} h", live_s / 3600.0), &format!("sum of N / bin width; first to last step {wall_h:.2} h"));
        let med_t = median(used.iter().map(|x| x.meta.noise_temp_k).collect());
        let med_q = median(used.iter().map(|x| x.meta.loaded_q).collect());
        card(out, "Median T_sys", &format!("{} K", num(med_t, 3)), "over the used steps");
        card(out, "Median Q_L", &num(med_q, 0), "over the used steps");
    }
    card(out, "Grand spectrum", &format!("mean {}, std {}", num(s.grand_mean, 3), num(s.grand_std, 3)), &format!("over {} bins with data", s.n_valid_bins));
    card(
        out,
        "Above threshold",
        &format!("{} bins", s.n_bins_above_threshold),
        &format!("threshold {}; noise alone about {}", num(s.threshold, 3), num(s.expected_null_bins_above, 1)),
    );
    card(out, "Rescan candidates", &s.n_candidates.to_string(), "adjacent bins above threshold merged");
    out.push_str("</div>");
}

fn cuts(out: &mut String, d: &ReportData) {
    no_data(out, &d.summary.no_data);
    let c = &d.summary.cuts;
    if c.is_empty() {
        out.push_str("<p class=\"good\">No step was cut: every step passed the ingest ranges and the residual-spread check.</p>");
        return;
    }
    let mut by_stage: Vec<(String, usize, String)> = Vec::new();
    for cut in c {
        match by_stage.iter_mut().find(|b| b.0 == cut.stage) {
            Some(b) => b.1 += 1,
            None => by_stage.push((cut.stage.clone(), 1, cut.reason.clone())),
        }
    }
    out.push_str("<table><tr><th>stage</th><th class=\"n\">steps cut</th><th>first reason given</th></tr>");
    for (stage, n, reason) in &by_stage {
        let _ = write!(out, "<tr><td>{}</td><td class=\"n\">{n}</td><td>{}</td></tr>", escape(stage), escape(reason));
    }
    out.push_str("</table><div class=\"scroll\"><table><tr><th class=\"n\">step</th><th>file</th><th class=\"n\">row</th><th>stage</th><th>reason</th></tr>");
    for cut in c {
        let file = cut.file.file_name().map_or_else(|| cut.file.display().to_string(), |f| f.to_string_lossy().into_owned());
        let _ = write!(
            out,
            "<tr><td class=\"n\">{}</td><td>{}</td><td class=\"n\">{}</td><td>{}</td><td>{}</td></tr>",
            cut.step,
            escape(&file),
            cut.row,
            escape(&cut.stage),
            escape(&cut.reason)
        );
    }
    out.push_str("</table></div>");
}

/// The bins without data by cause, and the files with bins the mask did not mark.
fn no_data(out: &mut String, nd: &crate::stage::no_data::NoDataTally) {
    out.push_str("<table><tr><th>no-data bins</th><th class=\"n\">bins</th><th class=\"n\">steps</th></tr>");
    for (cause, c) in
        [("masked by the acquisition", nd.masked), ("non-finite power (NaN, infinite)", nd.non_finite), ("zero or negative power", nd.non_positive)]
    {
        let _ = write!(out, "<tr><td>{cause}</td><td class=\"n\">{}</td><td class=\"n\">{}</td></tr>", c.bins, c.steps);
    }
    out.push_str("</table>");
    for f in &nd.files {
        let file = f.file.file_name().map_or_else(|| f.file.display().to_string(), |n| n.to_string_lossy().into_owned());
        let worst: Vec<String> = f.worst.iter().map(|&(row, bins)| format!("row {row} ({})", crate::stage::no_data::count(bins, "bin"))).collect();
        let _ = write!(
            out,
            "<p class=\"bad\">{}: {} with {} of NaN, infinite, zero or negative power that the mask does not mark, reduced as gaps; worst: {}.</p>",
            escape(&file),
            crate::stage::no_data::count(f.steps, "step"),
            crate::stage::no_data::count(f.bins, "bin"),
            escape(&worst.join(", "))
        );
    }
}

fn steps(out: &mut String, d: &ReportData, cut: &HashSet<usize>) -> anyhow::Result<()> {
    let diag = match &d.steps {
        Ok(diag) => diag,
        Err(why) => {
            let _ = write!(out, "<p class=\"note\">Per-step diagnostics are not available: {}.</p>", escape(why));
            return Ok(());
        }
    };
    out.push_str("<div class=\"grid2\">");
    for q in [StepQuantity::NoiseTemp, StepQuantity::LoadedQ, StepQuantity::Coupling, StepQuantity::ResidualSpread] {
        out.push_str("<div>");
        out.push_str(&plots::step_panel(diag, cut, q)?);
        out.push_str("</div>");
    }
    out.push_str("</div>");
    let _ = write!(
        out,
        "<p class=\"legend\">{}{}{}</p>",
        swatch("#1f5aa0", "used steps"),
        swatch("#c82d28", "cut steps (crosses)"),
        swatch("#288c46", "radiometer prediction")
    );
    let measured: Vec<(f64, f64)> =
        diag.steps.iter().filter(|s| !cut.contains(&s.index)).filter_map(|s| Some((s.residual_spread?, diag.predicted_spread(&s.meta)?))).collect();
    match (diag.residual_fraction, measured.is_empty()) {
        (Some(k), false) => {
            let ratio = median(measured.iter().map(|(m, p)| m / p).collect());
            let _ = write!(
                out,
                "<p class=\"note\">Residual spread: the RMS of each step's baseline residual P / (G SG) - 1, measured by re-reading the run files. \
                 The prediction is sqrt(F / N) = {:.4} / sqrt(N), the radiometer 1/sqrt(N) reduced by the share F of each bin's noise the baseline fit leaves \
                 (1 - h0 for independent bins, h0 its centre weight; more when the run files declare correlated bins). \
                 Median measured / predicted over the used steps: {}.</p>",
                k.sqrt(),
                num(ratio, 4)
            );
        }
        _ => out.push_str("<p class=\"note\">The plan has no baseline stage, so no residual spread is measured per step.</p>"),
    }
    Ok(())
}

fn grand(out: &mut String, d: &ReportData) -> anyhow::Result<()> {
    let s = &d.summary;
    let marks: Vec<(f64, f64)> = s.candidates.iter().map(|c| (c.frequency_hz, c.significance)).collect();
    out.push_str(&plots::grand_spectrum(&d.grand, s.threshold, &marks)?);
    let _ = write!(
        out,
        "<p class=\"legend\">{}{}{}</p><p class=\"note\">{} bins drawn as the minimum and maximum of each pixel column. \
         {} bins lie above the threshold; noise alone would give about {}.</p>",
        swatch("#1f5aa0", "grand spectrum (min/max per column)"),
        swatch("#c82d28", &format!("threshold {}", num(s.threshold, 3))),
        swatch("#c82d28", "circles: rescan candidates"),
        s.n_rf_bins,
        s.n_bins_above_threshold,
        num(s.expected_null_bins_above, 1)
    );
    Ok(())
}

fn distribution(out: &mut String, d: &ReportData) -> anyhow::Result<()> {
    let s = &d.summary;
    out.push_str(&plots::histogram(&d.grand, s.threshold)?);
    let _ = write!(
        out,
        "<p class=\"legend\">{}{}{}</p><p class=\"note\">Counts on a log scale. Mean {}, standard deviation {} over {} bins; \
         a null night follows the unit normal, and neighbouring bins are correlated by the filter, so the tail scatters more than Poisson.</p>",
        swatch("#8fadd0", "grand-spectrum bins"),
        swatch("#288c46", "unit normal, same number of bins"),
        swatch("#c82d28", "threshold"),
        num(s.grand_mean, 4),
        num(s.grand_std, 4),
        s.n_valid_bins
    );
    Ok(())
}

fn candidates(out: &mut String, d: &ReportData) {
    let s = &d.summary;
    if s.candidates.is_empty() {
        let _ = write!(out, "<p class=\"good\">No bin rose above the threshold {}: nothing to rescan from this night.</p>", num(s.threshold, 3));
        return;
    }
    out.push_str(
        "<div class=\"advice\"><b>Rescan advice.</b> Retune the cavity to the listed frequency and integrate again. \
         axsift only reads data and suggests where to look: it never drives the magnet, the cryostat or the RF chain. \
         Retuning and ramping are done by the crew under the laboratory's own safety rules.</div>",
    );
    let calibrated = d.implied.iter().any(|i| i.is_some());
    out.push_str("<div class=\"scroll\"><table><tr><th class=\"n\">#</th><th class=\"n\">RF frequency (MHz)</th><th class=\"n\">significance</th><th class=\"n\">bins</th><th class=\"n\">retune cavity to (MHz)</th><th class=\"n\">covering steps</th>");
    if calibrated {
        out.push_str("<th class=\"n\">implied |g|/g_ref</th><th class=\"n\">reference-axion SNR</th>");
    }
    out.push_str("</tr>");
    let mut order: Vec<usize> = (0..s.candidates.len()).collect();
    order.sort_by(|&a, &b| s.candidates[b].significance.total_cmp(&s.candidates[a].significance));
    for (rank, &i) in order.iter().enumerate() {
        let c = &s.candidates[i];
        let _ = write!(
            out,
            "<tr><td class=\"n\">{}</td><td class=\"n\">{:.6}</td><td class=\"n\">{:.2}</td><td class=\"n\">{}</td><td class=\"n\"><b>{:.6}</b></td><td class=\"n\">{}</td>",
            rank + 1,
            c.frequency_hz / 1e6,
            c.significance,
            c.last_bin + 1 - c.first_bin,
            c.revisit_cavity_hz / 1e6,
            c.covering_steps.len()
        );
        if calibrated {
            let (rel, snr) = d.implied[i].map_or((None, None), |(r, s)| (Some(r), Some(s)));
            let _ = write!(out, "<td class=\"n\">{}</td><td class=\"n\">{}</td>", num(rel, 3), num(snr, 2));
        }
        out.push_str("</tr>");
    }
    out.push_str("</table></div><p class=\"note\">Sorted by significance");
    if s.n_candidates > s.candidates.len() {
        let _ = write!(out, "; the strongest {} of {} (all of them are in candidates.csv)", s.candidates.len(), s.n_candidates);
    }
    out.push_str(". The retune frequency is the line's mean frequency nu_a (1 + &lt;beta^2&gt;/2).</p>");
}

/// The analysis state: nights, tracked candidates by class with evidence and rescan plan,
/// the limit range.
fn across_nights(out: &mut String, d: &ReportData) {
    let Some(st) = &d.state else { return };
    let c = &st.candidates_by_class;
    out.push_str("<div class=\"cards\">");
    let files: usize = st.nights.iter().map(|n| n.files.len()).sum();
    card(out, "Nights", &st.nights.len().to_string(), &format!("{files} run file(s), state generation {}", st.generation));
    card(
        out,
        "Covered",
        &format!("{:.3} MHz", st.covered_hz / 1e6),
        &st.rf_span_hz.map_or("no bins".into(), |(lo, hi)| format!("{:.4} to {:.4} MHz", lo / 1e6, hi / 1e6)),
    );
    card(
        out,
        "Tracked candidates",
        &st.candidates.len().to_string(),
        &format!("{} new, {} persist, {} cleared, {} interference", c.new, c.persists, c.cleared, c.interference),
    );
    match &st.limit {
        Some(l) => card(
            out,
            "Limit range",
            &format!("{:.3} to {:.3} x KSVZ", l.min_rel_ksvz, l.max_rel_ksvz),
            &format!("{:.0}% confidence, {} bins, night {}", 100.0 * l.confidence, l.excluded_bins, l.night),
        ),
        None => card(out, "Limit range", "none", "no update of the state had a calibration"),
    }
    out.push_str("</div><div class=\"scroll\"><table><tr><th class=\"n\">night</th><th>run files</th><th class=\"n\">steps used</th><th>IF lines</th></tr>");
    for n in &st.nights {
        let names: Vec<String> = n.files.iter().map(|f| std::path::Path::new(f).file_name().map_or(f.clone(), |x| x.to_string_lossy().into_owned())).collect();
        let lines = match n.if_line_max_sigma {
            Some(z) => format!("{} IF bin(s), up to {z:.1} sigma", n.if_line_bins.len()),
            None => "none".into(),
        };
        let _ = write!(
            out,
            "<tr><td class=\"n\">{}</td><td>{}</td><td class=\"n\">{} / {}</td><td>{}</td></tr>",
            n.index,
            escape(&names.join(", ")),
            n.n_steps_used,
            n.n_steps,
            escape(&lines)
        );
    }
    out.push_str("</table></div>");
    if st.candidates.is_empty() {
        out.push_str("<p class=\"good\">No candidate is tracked.</p>");
        return;
    }
    out.push_str("<div class=\"scroll\"><table><tr><th class=\"n\">RF frequency (MHz)</th><th>class</th><th class=\"n\">grand</th><th class=\"n\">first night</th><th class=\"n\">retune cavity to (MHz)</th><th class=\"n\">integrate (s)</th><th>evidence</th></tr>");
    let (listed, total) = crate::state::strongest(st.candidates.iter().collect(), crate::state::LISTED_CANDIDATES, |t| t.significance, |t| t.frequency_hz);
    for t in &listed {
        let class = format!("{:?}", t.class).to_lowercase();
        let integrate = if t.rescan_integration_s > 0.0 { format!("{:.0}", t.rescan_integration_s) } else { "&ndash;".into() };
        let _ = write!(
            out,
            "<tr><td class=\"n\">{:.6}</td><td>{}</td><td class=\"n\">{:.2}</td><td class=\"n\">{}</td><td class=\"n\">{:.6}</td><td class=\"n\">{integrate}</td><td>{}</td></tr>",
            t.frequency_hz / 1e6,
            escape(&class),
            t.significance,
            t.first_night,
            t.revisit_cavity_hz / 1e6,
            escape(&t.evidence)
        );
    }
    out.push_str("</table></div>");
    if total > listed.len() {
        let _ = write!(
            out,
            "<p class=\"note\">The {} strongest of {total} tracked candidates, in frequency order; all of them: <code>axsift status --json</code>.</p>",
            listed.len()
        );
    }
    out.push_str("<p class=\"note\">New: flagged, not yet revisited. Persists: still above threshold once data covered it again. Cleared: fell below (its bins count for the limits). Interference: explained by a line at a fixed IF offset (no rescan needed). The integration brings a signal of the candidate's present amplitude to SNR 5 with the night's median T_sys and Q_L; it is advice, and retuning is done under the laboratory's safety rules.</p>");
}

fn exclusion(out: &mut String, d: &ReportData) -> anyhow::Result<()> {
    let Some(l) = &d.limits else { return Ok(()) };
    out.push_str(&plots::exclusion(&l.columns)?);
    let _ = write!(
        out,
        "<p class=\"legend\">{}{}{}</p>",
        swatch("#1f5aa0", "excluded above this line (gaps: not excluded)"),
        swatch("#c82d28", "KSVZ"),
        swatch("#288c46", "DFSZ")
    );
    if let Some(r) = &d.summary.limits {
        let _ = write!(
            out,
            "<p class=\"note\">At {:.0} % confidence with eta = {:.4}: {:.1} % of the bins excluded; limit relative to KSVZ best {}, median {}, worst {}. \
             Candidate bins stay not excluded until rescans clear them.</p>",
            100.0 * r.confidence,
            l.eta,
            100.0 * r.excluded_fraction,
            num(r.best_rel_ksvz, 3),
            num(r.median_rel_ksvz, 3),
            num(r.worst_rel_ksvz, 3)
        );
    }
    Ok(())
}

fn calibration(out: &mut String, d: &ReportData) -> anyhow::Result<()> {
    match (&d.calibration, &d.summary.calibration) {
        (Some(cal), _) => {
            out.push_str("<table><tr><th>quantity</th><th class=\"n\">value</th><th>what it is</th></tr>");
            let rows = [
                (
                    "eta",
                    format!("{:.4} &plusmn; {:.4}", cal.attenuation.eta, cal.attenuation.standard_error),
                    format!("recovered / injected filtered amplitude, {} injections", cal.attenuation.n),
                ),
                (
                    "null spread",
                    format!("{:.4}", cal.null.std),
                    format!("std of the null grand spectrum over {} bins (mean {:.4})", cal.null.n_bins, cal.null.mean),
                ),
                ("KS test", format!("D = {:.4}, p = {:.3}", cal.null.ks.statistic, cal.null.ks.p_value), "thinned null bins against N(0, 1)".to_string()),
                (
                    "radiometer",
                    format!("{:.3}", cal.radiometer.ratio),
                    format!("chain 1/sigma_A {:.3} over Dicke SNR {:.3}", cal.radiometer.filter_snr, cal.radiometer.dicke_snr),
                ),
                ("noise", escape(&cal.noise), format!("threshold {:.3}, made by axsift {}", cal.threshold, cal.tool_version)),
            ];
            for (k, v, what) in rows {
                let _ = write!(out, "<tr><td>{k}</td><td class=\"n\">{v}</td><td>{}</td></tr>", escape(&what));
            }
            out.push_str("</table><div style=\"max-width:720px\">");
            out.push_str(&plots::efficiency(cal)?);
            let _ = write!(
                out,
                "</div><p class=\"legend\">{}{}</p>",
                swatch("#1f5aa0", "measured (binomial 1 sigma)"),
                swatch("#288c46", "ideal Phi(SNR - threshold)")
            );
        }
        (None, Some(u)) => {
            let _ = write!(
                out,
                "<p>eta = {:.4} &plusmn; {:.4}; null spread {:.4}; efficiency {}.</p><p class=\"note\">From the summary; give the calibration file to show the full efficiency curve.</p>",
                u.eta,
                u.eta_standard_error,
                u.null_spread,
                u.efficiency_near_snr5.map_or("n/a".into(), |(snr, e)| format!("{e:.3} at SNR {snr:.1}"))
            );
        }
        (None, None) => {}
    }
    Ok(())
}

fn provenance(out: &mut String, d: &ReportData) {
    let p = &d.summary.provenance;
    let _ = write!(
        out,
        "<table><tr><th>tool version</th><td>axsift {}</td></tr><tr><th>pipeline SHA-256</th><td><code>{}</code></td></tr></table>",
        escape(&p.tool_version),
        escape(&p.config_sha256)
    );
    out.push_str("<table><tr><th>input run file</th><th>SHA-256</th></tr>");
    for (path, hash) in &p.inputs {
        let _ = write!(out, "<tr><td>{}</td><td><code>{}</code></td></tr>", escape(path), escape(hash));
    }
    out.push_str("</table>");
    let _ = write!(out, "<details><summary>Pipeline file ({} lines)</summary><pre>{}</pre></details>", d.config_text.lines().count(), escape(&d.config_text));
}

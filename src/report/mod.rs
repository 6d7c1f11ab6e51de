//! The morning report: one self-contained HTML page per reduction.
//!
//! The page holds the night at a glance, the quality cuts, per-step diagnostics through the
//! night, the grand spectrum and its distribution, the rescan candidates, and, when they
//! exist, the analysis state across nights, the exclusion limits and the calibration, then
//! the provenance. Figures are inline
//! SVG reduced to the minimum and maximum per pixel column, the style sheet is inline, and
//! nothing refers outside the file: it opens offline, in any browser, with scripts disabled.
//!
//! [`ReportData`] gathers what the page shows, from a reduction in memory
//! ([`ReportData::from_reduction`]) or from an output folder ([`ReportData::from_folder`]);
//! [`render`] draws it and [`write`] puts it in place through a temporary file.

mod data;
pub mod diagnostics;
mod html;
mod plots;
pub mod run_file;

pub use data::{CandidateView, CutView, LimitView, ReportData, SummaryView};
pub use html::{HEADINGS, escape, render};
pub use plots::column_envelope;

use std::path::{Path, PathBuf};

/// File name of the report inside an output folder.
pub const REPORT_FILE: &str = "report.html";

/// Renders `data` and writes it to `dir/report.html` (through a temporary name, renamed into
/// place when complete). Returns the path written.
pub fn write(dir: &Path, data: &ReportData) -> anyhow::Result<PathBuf> {
    use anyhow::Context;
    let page = render(data).context("drawing the report")?;
    std::fs::create_dir_all(dir).with_context(|| format!("cannot create {}", dir.display()))?;
    let tmp = dir.join(format!(".tmp.{REPORT_FILE}"));
    let to = dir.join(REPORT_FILE);
    std::fs::write(&tmp, page).with_context(|| format!("writing {}", tmp.display()))?;
    std::fs::rename(&tmp, &to).with_context(|| format!("renaming into {}", to.display()))?;
    Ok(to)
}

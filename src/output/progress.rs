//! A progress bar over tuning steps, drawn on stderr only when it is a terminal.

use indicatif::{ProgressBar, ProgressStyle};

/// Progress of a reduction, in steps.
pub struct StepBar(Option<ProgressBar>);

impl StepBar {
    /// A bar, or nothing when `quiet`.
    pub fn new(quiet: bool) -> Self {
        if quiet {
            return Self(None);
        }
        let bar = ProgressBar::new(0);
        bar.set_style(
            ProgressStyle::with_template("{msg:>10} [{bar:40}] {pos}/{len} steps ({per_sec}, {eta} left)")
                .unwrap_or_else(|_| ProgressStyle::default_bar())
                .progress_chars("=> "),
        );
        bar.set_message("reducing");
        Self(Some(bar))
    }

    /// Shows `done` of `total` steps.
    pub fn update(&self, done: usize, total: usize) {
        if let Some(bar) = &self.0 {
            bar.set_length(total as u64);
            bar.set_position(done as u64);
        }
    }

    /// Removes the bar.
    pub fn finish(&self) {
        if let Some(bar) = &self.0 {
            bar.finish_and_clear();
        }
    }
}

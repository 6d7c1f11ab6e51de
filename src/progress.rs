//! A progress bar (over steps, reductions...), drawn on stderr only when it is a terminal.

use indicatif::{ProgressBar, ProgressStyle};

/// Progress of long work, counted in `unit`s.
pub struct Bar(Option<ProgressBar>);

impl Bar {
    /// A bar labelled `label`, or nothing when `quiet`.
    pub fn new(quiet: bool, label: &'static str, unit: &str) -> Self {
        if quiet {
            return Self(None);
        }
        let bar = ProgressBar::new(0);
        bar.set_style(
            ProgressStyle::with_template(&format!("{{msg:>11}} [{{bar:40}}] {{pos}}/{{len}} {unit} ({{eta}} left)"))
                .unwrap_or_else(|_| ProgressStyle::default_bar())
                .progress_chars("=> "),
        );
        bar.set_message(label);
        Self(Some(bar))
    }

    /// Shows `done` of `total`.
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

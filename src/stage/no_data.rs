//! Bins without data: why a bin holds no valid power, counted per step, and the night's tally
//! that the summary, the report and the log show.
//!
//! Three causes, disjoint: the acquisition's `mask` marked the bin; the stored power is not
//! finite (NaN or infinite); it is finite but zero or negative. Every such bin is a gap ("no
//! data") for the stages after ingest.

use serde::{Deserialize, Serialize};
use std::path::PathBuf;

/// How many bins of one step hold no data, by cause.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq, Serialize, Deserialize)]
pub struct NoDataBins {
    /// Bins the file's mask marks as bad.
    pub masked: usize,
    /// Unmasked bins whose power is NaN or infinite.
    pub non_finite: usize,
    /// Unmasked bins whose power is finite but <= 0.
    pub non_positive: usize,
}

impl NoDataBins {
    /// All bins without data.
    pub fn total(&self) -> usize {
        self.masked + self.non_finite + self.non_positive
    }
    /// Bins without data that the mask does not mark (what the acquisition did not announce).
    pub fn unannounced(&self) -> usize {
        self.non_finite + self.non_positive
    }
}

/// Bins of one cause over a night, and the steps holding at least one of them.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq, Serialize, Deserialize)]
pub struct CauseCount {
    /// Bins, summed over steps.
    pub bins: usize,
    /// Steps with at least one such bin.
    pub steps: usize,
}

impl CauseCount {
    fn add(&mut self, bins: usize) {
        self.bins += bins;
        self.steps += usize::from(bins > 0);
    }
}

/// Steps of one file that hold unmasked no-data bins.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
pub struct FileNoData {
    /// The run file.
    pub file: PathBuf,
    /// Steps of this file with unmasked no-data bins.
    pub steps: usize,
    /// Unmasked no-data bins over those steps.
    pub bins: usize,
    /// The worst steps: (row in the file, unmasked no-data bins), most bins first, at most
    /// [`NoDataTally::WORST_STEPS`].
    pub worst: Vec<(usize, usize)>,
}

/// The no-data bins of every step that reached the ingest stage, by cause, with the files in
/// which unmasked ones were found.
#[derive(Debug, Clone, Default, PartialEq, Eq, Serialize, Deserialize)]
pub struct NoDataTally {
    /// Bins marked by the acquisition's mask.
    pub masked: CauseCount,
    /// Unmasked NaN or infinite bins.
    pub non_finite: CauseCount,
    /// Unmasked finite bins <= 0.
    pub non_positive: CauseCount,
    /// Files with unmasked no-data bins, in input order.
    pub files: Vec<FileNoData>,
}

impl NoDataTally {
    /// Steps listed per file as the worst.
    pub const WORST_STEPS: usize = 3;

    /// Adds one step (call in step order, so the tally does not depend on the thread count).
    pub fn add(&mut self, file: &std::path::Path, row: usize, bins: NoDataBins) {
        self.masked.add(bins.masked);
        self.non_finite.add(bins.non_finite);
        self.non_positive.add(bins.non_positive);
        let unannounced = bins.unannounced();
        if unannounced == 0 {
            return;
        }
        let entry = match self.files.iter_mut().position(|f| f.file == file) {
            Some(i) => &mut self.files[i],
            None => {
                self.files.push(FileNoData { file: file.to_path_buf(), steps: 0, bins: 0, worst: Vec::new() });
                self.files.last_mut().expect("just pushed")
            }
        };
        entry.steps += 1;
        entry.bins += unannounced;
        // Most bins first; among equals the earlier row first (stable insertion).
        let at = entry.worst.iter().position(|&(_, b)| b < unannounced).unwrap_or(entry.worst.len());
        entry.worst.insert(at, (row, unannounced));
        entry.worst.truncate(Self::WORST_STEPS);
    }

    /// One warning line per file with unmasked no-data bins: the file, how many steps and
    /// bins, and the worst steps.
    pub fn warnings(&self) -> Vec<String> {
        self.files
            .iter()
            .map(|f| {
                let worst: Vec<String> = f.worst.iter().map(|&(row, bins)| format!("step {row} ({})", count(bins, "bin"))).collect();
                format!(
                    "{}: {} {} of NaN, infinite, zero or negative power that the mask does not mark; reduced as gaps; worst: {}",
                    f.file.display(),
                    count(f.steps, "step"),
                    if f.steps == 1 { format!("holds {}", count(f.bins, "bin")) } else { format!("hold {}", count(f.bins, "bin")) },
                    worst.join(", ")
                )
            })
            .collect()
    }
}

/// "1 bin", "2 bins".
pub fn count(n: usize, noun: &str) -> String {
    if n == 1 { format!("1 {noun}") } else { format!("{n} {noun}s") }
}

#[cfg(test)]
mod tests {
    use super::*;
    use std::path::Path;

    #[test]
    fn tally_counts_causes_steps_and_keeps_the_worst_steps_per_file() {
        let mut t = NoDataTally::default();
        let bins = |masked, non_finite, non_positive| NoDataBins { masked, non_finite, non_positive };
        t.add(Path::new("a.h5"), 0, bins(4, 0, 0));
        t.add(Path::new("a.h5"), 1, bins(0, 2, 1));
        t.add(Path::new("a.h5"), 2, bins(0, 0, 0));
        t.add(Path::new("a.h5"), 3, bins(1, 7, 0));
        t.add(Path::new("a.h5"), 4, bins(0, 3, 0));
        t.add(Path::new("a.h5"), 5, bins(0, 1, 0));
        t.add(Path::new("b.h5"), 0, bins(0, 0, 5));
        assert_eq!(t.masked, CauseCount { bins: 5, steps: 2 });
        assert_eq!(t.non_finite, CauseCount { bins: 13, steps: 4 });
        assert_eq!(t.non_positive, CauseCount { bins: 6, steps: 2 });
        assert_eq!(t.files.len(), 2);
        assert_eq!((t.files[0].steps, t.files[0].bins), (4, 14));
        // Rows 1 and 4 both have 3 bins: the earlier row is listed first.
        assert_eq!(t.files[0].worst, vec![(3, 7), (1, 3), (4, 3)]);
        let lines = t.warnings();
        assert_eq!(lines.len(), 2);
        assert!(lines[0].starts_with("a.h5: 4 steps hold 14 bins"), "{}", lines[0]);
        assert!(lines[1].starts_with("b.h5: 1 step holds 5 bins"), "{}", lines[1]);
        assert!(lines[0].ends_with("worst: step 3 (7 bins), step 1 (3 bins), step 4 (3 bins)"), "{}", lines[0]);
    }
}

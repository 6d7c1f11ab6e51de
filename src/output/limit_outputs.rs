//! The limit outputs of a calibrated reduction, gathered run of bins by run of bins (in grid
//! order): `limits.csv` (per bin, for grids up to [`LIMITS_CSV_MAX_BINS`] bins),
//! `limit_blocks.csv` (coarse blocks of [`super::LIMIT_BLOCK_HZ`], the one open at the end
//! of a run carried into the next), the exclusion plot's columns and the summary's range.
//! The per-bin values for `results.h5` go with the other datasets ([`super::ResultBlock`]).
//!
//! The summary's median is the lower median of the limits relative to KSVZ over the excluded
//! bins: the value of 0-based rank floor((n - 1) / 2) in ascending order of the n excluded
//! bins' double-precision values, as [`super::LimitRange::from`] takes it from the sorted
//! values; here it is selected exactly from the values spilled to a temporary file
//! ([`super::rank`]).

use super::rank::SpilledValues;
use super::{LIMIT_BLOCK_HZ, LimitRange, staged};
use crate::limits::{BIN_CSV_HEADER, BLOCK_CSV_HEADER, BinLimit, BlockSummariser, ExclusionColumns, LimitAssumptions, LimitBlock};
use anyhow::Context;
use std::fs::File;
use std::path::{Path, PathBuf};

/// Largest grid whose per-bin limits are also written as text, `limits.csv` (about 71 bytes
/// a row: 75 MB at this size, 1.4 GB for the 19.7 M bins of the wide night). Larger grids
/// have their per-bin limits in `results.h5` only.
pub const LIMITS_CSV_MAX_BINS: usize = 1 << 20;

/// Name of the per-bin table.
pub(super) const LIMITS_CSV: &str = "limits.csv";
/// Name of the block table.
pub(super) const LIMIT_BLOCKS_CSV: &str = "limit_blocks.csv";
/// Name of the temporary file of excluded values.
const SPILL: &str = "limit_values.bin";

/// The limit outputs being written. Dropped before [`LimitOutputs::finish`] (a failed run),
/// their temporary files are removed.
pub(super) struct LimitOutputs {
    pub assumptions: LimitAssumptions,
    dir: PathBuf,
    /// Set by a completed [`LimitOutputs::finish`]: the tables stay for the rename.
    finished: bool,
    n_bins: usize,
    /// Bins taken in so far.
    seen: usize,
    table: Option<csv::Writer<File>>,
    blocks_csv: csv::Writer<File>,
    summariser: BlockSummariser,
    rows: Vec<LimitBlock>,
    pub columns: ExclusionColumns,
    excluded: SpilledValues,
    /// The smallest and largest excluded value so far (in `total_cmp` order).
    best: Option<f64>,
    worst: Option<f64>,
}

impl LimitOutputs {
    /// Opens the tables in `dir` (under temporary names) for a grid of `n_bins` bins.
    pub fn open(dir: &Path, assumptions: LimitAssumptions, n_bins: usize) -> anyhow::Result<Self> {
        let table = if n_bins <= LIMITS_CSV_MAX_BINS {
            let mut w = csv::Writer::from_path(staged(dir, LIMITS_CSV)).context("creating limits.csv")?;
            w.write_record(BIN_CSV_HEADER)?;
            Some(w)
        } else {
            tracing::info!("{n_bins} RF bins: per-bin limits in results.h5 only (limits.csv is written up to {LIMITS_CSV_MAX_BINS} bins)");
            None
        };
        let mut blocks_csv = csv::Writer::from_path(staged(dir, LIMIT_BLOCKS_CSV)).context("creating limit_blocks.csv")?;
        blocks_csv.write_record(BLOCK_CSV_HEADER)?;
        let excluded = SpilledValues::create(&staged(dir, SPILL)).context("creating the temporary file of excluded limits")?;
        Ok(Self {
            assumptions,
            dir: dir.to_path_buf(),
            finished: false,
            n_bins,
            seen: 0,
            table,
            blocks_csv,
            summariser: BlockSummariser::new(LIMIT_BLOCK_HZ),
            rows: Vec::new(),
            columns: ExclusionColumns::new(n_bins),
            excluded,
            best: None,
            worst: None,
        })
    }

    /// Whether `limits.csv` is written.
    pub fn has_table(&self) -> bool {
        self.table.is_some()
    }

    /// Takes in the limits of the next bins, grid bins `first_bin ..`.
    pub fn add(&mut self, first_bin: usize, bins: &[BinLimit]) -> anyhow::Result<()> {
        anyhow::ensure!(first_bin == self.seen, "limits of grid bin {first_bin} given after {} bins", self.seen);
        self.seen += bins.len();
        if let Some(table) = &mut self.table {
            for b in bins {
                table.write_record(b.csv_row()).context("writing limits.csv")?;
            }
        }
        self.summariser.add(bins, &mut self.rows);
        self.write_rows()?;
        self.columns.add(first_bin, bins.iter().map(|b| (b.mass_uev, b.g_agg_per_gev)));
        for b in bins.iter().filter(|b| b.excluded) {
            let v = b.rel_ksvz;
            self.excluded.push(v).context("writing the temporary file of excluded limits")?;
            self.best = Some(self.best.map_or(v, |m| if v.total_cmp(&m).is_lt() { v } else { m }));
            self.worst = Some(self.worst.map_or(v, |m| if v.total_cmp(&m).is_gt() { v } else { m }));
        }
        Ok(())
    }

    fn write_rows(&mut self) -> anyhow::Result<()> {
        for row in self.rows.drain(..) {
            self.blocks_csv.write_record(row.csv_row()).context("writing limit_blocks.csv")?;
        }
        Ok(())
    }

    /// Completes the tables and returns the summary's range (and the plot's columns).
    pub fn finish(mut self) -> anyhow::Result<(LimitRange, ExclusionColumns)> {
        anyhow::ensure!(self.seen == self.n_bins, "limits of {} of {} bins", self.seen, self.n_bins);
        if let Some(mut table) = self.table.take() {
            table.flush().context("writing limits.csv")?;
        }
        let summariser = std::mem::replace(&mut self.summariser, BlockSummariser::new(LIMIT_BLOCK_HZ));
        summariser.finish(&mut self.rows);
        self.write_rows()?;
        self.blocks_csv.flush().context("writing limit_blocks.csv")?;
        let n = self.excluded.count();
        let median = if n == 0 { None } else { self.excluded.select((n - 1) / 2).context("reading the temporary file of excluded limits")? };
        let range = LimitRange {
            confidence: self.assumptions.confidence,
            excluded_fraction: n as f64 / self.n_bins.max(1) as f64,
            best_rel_ksvz: self.best.unwrap_or(f64::NAN),
            median_rel_ksvz: median.unwrap_or(f64::NAN),
            worst_rel_ksvz: self.worst.unwrap_or(f64::NAN),
            assumptions: self.assumptions.clone(),
        };
        self.finished = true;
        Ok((range, std::mem::replace(&mut self.columns, ExclusionColumns::new(0))))
    }
}

impl Drop for LimitOutputs {
    fn drop(&mut self) {
        if !self.finished {
            for name in [LIMITS_CSV, LIMIT_BLOCKS_CSV] {
                let _ = std::fs::remove_file(staged(&self.dir, name));
            }
        }
    }
}

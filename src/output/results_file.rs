//! `results.h5`, written block by block.
//!
//! Layout: root attributes `rf_start_hz` (bin-centre RF frequency of bin 0, Hz),
//! `bin_width_hz` and `n_rf_bins` give the frequency axis, bin j at rf_start_hz + j *
//! bin_width_hz (the combination puts every step on one regular grid, so no frequency
//! dataset is needed); one single-precision dataset per per-bin quantity, in chunks of
//! [`CHUNK_BINS`] bins, so a reader of one MHz reads one or two chunks. Single precision
//! rounds each value by at most 2^-24 of itself (the grand spectrum by < 3e-7 for
//! |grand| < 5, against a null spread of 1); candidates are found in double precision
//! before rounding. The per-bin datasets are stored plain (measured with h5py on the
//! 3000-step night: deflate saved 21 % of the noise-like datasets at 30-45x the write time,
//! and shrank the two sigmas 8-9x at about 10x the write time, too slow for the one writing
//! thread).
//!
//! `predicted_spread` is constant over each filter segment (thousands of bins), so it is
//! stored as runs, not per bin: the group `predicted_spread` holds `first_bin` (i64, the index type of numpy) and
//! `value` (f32), and bins `first_bin[i]` up to `first_bin[i + 1] - 1` (the last run up to
//! the grid's end) have `value[i]`. In numpy: `np.repeat(value, np.diff(first_bin,
//! append=int(n_rf_bins)))`. Stored per bin and deflated, its compression took 4 % of the wide
//! night's CPU time; as runs it is a few kB.
//!
//! With a calibration, one more per-bin dataset, `limit_g_gamma` (the upper limit on
//! |g_gamma|; NaN where a bin is not excluded), in the same chunks and written with the same
//! blocks, in single precision: the double-precision value rounded once to nearest (within
//! 2^-24 of itself, far below the limits' own statistical spread). What follows from it and
//! the frequency axis is not stored per bin but given by attributes of the dataset, so the
//! file stays at 20 bytes per bin: `mass_uev_per_hz` (the axion mass of bin j is
//! `mass_uev_per_hz * (rf_start_hz + (j - 1/2) * bin_width_hz)`, the line starting at the
//! bin's lower edge; h / e, CODATA 2018), `g_agg_per_gev_per_uev` (|g_agg| in GeV^-1 =
//! `g_agg_per_gev_per_uev * limit_g_gamma * mass_uev`), `g_gamma_ksvz` and `g_gamma_dfsz` (the
//! limit relative to either model is `limit_g_gamma` divided by it), and `derived`, the same
//! in words.
//!
//! Writing: no fill values (every bin is written) and no chunk cache (the blocks are whole
//! chunks), so each block goes from its buffer to the file without being copied or zeroed
//! in the library first.

use super::bins::Bins;
use crate::limits::BinLimit;
use crate::physics::constants::{G_GAMMA_DFSZ, G_GAMMA_KSVZ};
use crate::physics::units::{g_agg_from_g_gamma_per_gev, mass_uev_from_freq_hz};
use crate::simd::per_bin_loop;
use hdf5::plist::dataset_create::FillTime;
use hdf5::types::VarLenUnicode;
use rayon::prelude::*;
use std::path::Path;
use std::str::FromStr;

/// Bins per chunk of every per-bin dataset (256 kB of f32; 6.6 MHz of 100 Hz bins).
pub const CHUNK_BINS: usize = 1 << 16;

/// The per-bin datasets: name, units, description.
const DATASETS: [(&str, &str, &str); 5] = [
    ("combined", "reference-axion power", "maximum-likelihood combined excess power"),
    ("combined_sigma", "reference-axion power", "standard deviation of combined"),
    ("amplitude", "reference-axion power", "filtered amplitude A for a line starting at the bin's lower edge"),
    ("sigma_a", "reference-axion power", "standard deviation of the filtered amplitude"),
    ("grand", "1", "grand spectrum A / (sigma_A * predicted spread)"),
];

/// The group of the predicted spread's runs (see the module documentation).
pub const SPREAD_GROUP: &str = "predicted_spread";

/// The per-bin limit dataset: name, units, description.
const LIMIT_DATASET: (&str, &str, &str) = ("limit_g_gamma", "1", "upper limit on |g_gamma| (NaN: not excluded)");

/// One run of bins of every per-bin dataset, narrowed to single precision for writing.
#[derive(Debug, Clone)]
pub struct ResultBlock {
    first_bin: usize,
    grid_bins: usize,
    origin_hz: f64,
    bin_width_hz: f64,
    /// In the order of [`DATASETS`].
    columns: [Vec<f32>; 5],
    /// The predicted spread's runs that start in these bins: (first grid bin, value).
    spread_runs: Vec<(i64, f32)>,
    /// With a calibration, the limit on |g_gamma| per bin ([`LIMIT_DATASET`]).
    limits: Option<Vec<f32>>,
}

impl ResultBlock {
    /// The bins' values in single precision (the datasets narrowed in parallel).
    pub fn of(b: &Bins<'_>) -> Self {
        let sources = [b.combined, b.combined_sigma, b.amplitude, b.sigma_a, b.grand];
        let mut columns: [Vec<f32>; 5] = Default::default();
        columns.par_iter_mut().zip(sources).for_each(|(column, source)| narrow(source, column));
        let spread_runs = runs_of(b.first_bin, b.predicted_spread);
        Self { first_bin: b.first_bin, grid_bins: b.grid_bins, origin_hz: b.origin_hz, bin_width_hz: b.bin_width_hz, columns, spread_runs, limits: None }
    }

    /// Adds the limits of the same bins (`limits[i]` of bin `first_bin + i`), each rounded
    /// to the nearest single-precision value.
    pub fn with_limits(mut self, limits: &[BinLimit]) -> Self {
        self.limits = Some(limits.iter().map(|b| b.g_gamma as f32).collect());
        self
    }
}

/// The runs of equal single-precision values (bit for bit) of `values`, bin `first_bin + i`
/// holding `values[i]`: each as (its first bin, the value).
fn runs_of(first_bin: usize, values: &[f64]) -> Vec<(i64, f32)> {
    let mut runs = Vec::new();
    for (i, &v) in values.iter().enumerate() {
        extend_runs(&mut runs, (first_bin + i) as i64, v as f32);
    }
    runs
}

/// Adds bin `bin` holding `value` to the runs of the bins before it: a new run unless the
/// last one holds the same value, bit for bit.
fn extend_runs(runs: &mut Vec<(i64, f32)>, bin: i64, value: f32) {
    if runs.last().is_none_or(|&(_, last)| last.to_bits() != value.to_bits()) {
        runs.push((bin, value));
    }
}

per_bin_loop! {
    /// Appends `values` to `out`, each rounded to the nearest single-precision value.
    fn narrow(values: &[f64], out: &mut Vec<f32>) {
        out.extend(values.iter().map(|&v| v as f32));
    }
}

/// The predicted spread's runs as read back from a results file.
pub struct SpreadRuns {
    first_bins: Vec<i64>,
    values: Vec<f32>,
}

impl SpreadRuns {
    /// Reads the group [`SPREAD_GROUP`] of `file`.
    pub fn read(file: &hdf5::File) -> hdf5::Result<Self> {
        let g = file.group(SPREAD_GROUP)?;
        let (first_bins, values) = (g.dataset("first_bin")?.read_raw::<i64>()?, g.dataset("value")?.read_raw::<f32>()?);
        if first_bins.len() != values.len() || first_bins.first().is_some_and(|&f| f != 0) || !first_bins.is_sorted() {
            return Err(hdf5::Error::from("group `predicted_spread`: `first_bin` must start at 0 and rise, with one `value` per run"));
        }
        Ok(Self { first_bins, values })
    }

    /// The predicted spread of grid bin `j` (None if there are no runs).
    pub fn at(&self, j: usize) -> Option<f64> {
        let run = self.first_bins.partition_point(|&f| f <= j as i64).checked_sub(1)?;
        Some(f64::from(self.values[run]))
    }
}

fn text(s: &str) -> VarLenUnicode {
    VarLenUnicode::from_str(s).unwrap_or_default()
}

fn describe(ds: &hdf5::Dataset, units: &str, description: &str) -> hdf5::Result<()> {
    ds.new_attr::<VarLenUnicode>().create("units")?.write_scalar(&text(units))?;
    ds.new_attr::<VarLenUnicode>().create("description")?.write_scalar(&text(description))
}

/// An open results file: made with the first block, finished with the candidates and the
/// provenance.
pub struct ResultsFile {
    file: hdf5::File,
    datasets: Vec<hdf5::Dataset>,
    /// With a calibration, the dataset of [`LIMIT_DATASET`].
    limit_dataset: Option<hdf5::Dataset>,
    /// The predicted spread's runs so far, written by [`ResultsFile::close`].
    spread_runs: Vec<(i64, f32)>,
}

impl ResultsFile {
    /// Creates the file at `path` for the grid of `first` (with the limit datasets if `first`
    /// has limits) and writes `first`.
    pub fn create(path: &Path, first: &ResultBlock) -> hdf5::Result<Self> {
        let file = hdf5::File::create(path)?;
        let n = first.grid_bins;
        let chunk = CHUNK_BINS.min(n.max(1));
        let per_bin = |name: &str| file.new_dataset::<f32>().chunk(chunk).fill_time(FillTime::Never).chunk_cache(0, 0, 1.0).shape(n).create(name);
        let datasets = DATASETS
            .iter()
            .map(|&(name, units, description)| {
                let ds = per_bin(name)?;
                describe(&ds, units, description)?;
                Ok(ds)
            })
            .collect::<hdf5::Result<Vec<_>>>()?;
        let limit_dataset = match &first.limits {
            None => None,
            Some(_) => {
                let (name, units, description) = LIMIT_DATASET;
                let ds = per_bin(name)?;
                describe(&ds, units, description)?;
                let number = |name: &str, value: f64| ds.new_attr::<f64>().create(name)?.write_scalar(&value);
                number("mass_uev_per_hz", mass_uev_from_freq_hz(1.0))?;
                number("g_agg_per_gev_per_uev", g_agg_from_g_gamma_per_gev(1.0, 1.0))?;
                number("g_gamma_ksvz", G_GAMMA_KSVZ.abs())?;
                number("g_gamma_dfsz", G_GAMMA_DFSZ.abs())?;
                let derived = "axion mass of bin j (line starting at its lower edge): mass_uev = mass_uev_per_hz * (rf_start_hz + (j - 1/2) * bin_width_hz); \
                               |g_agg| limit (GeV^-1) = g_agg_per_gev_per_uev * limit_g_gamma * mass_uev; limit relative to KSVZ = limit_g_gamma / g_gamma_ksvz, to DFSZ = limit_g_gamma / g_gamma_dfsz";
                ds.new_attr::<VarLenUnicode>().create("derived")?.write_scalar(&text(derived))?;
                Some(ds)
            }
        };
        file.new_attr::<f64>().create("rf_start_hz")?.write_scalar(&first.origin_hz)?;
        file.new_attr::<f64>().create("bin_width_hz")?.write_scalar(&first.bin_width_hz)?;
        file.new_attr::<u64>().create("n_rf_bins")?.write_scalar(&(n as u64))?;
        file.new_attr::<VarLenUnicode>().create("rf_axis")?.write_scalar(&text("bin j has bin-centre RF frequency rf_start_hz + j * bin_width_hz (Hz)"))?;
        let mut results = Self { file, datasets, limit_dataset, spread_runs: Vec::new() };
        results.write(first)?;
        Ok(results)
    }

    /// Writes one run of bins (the runs of bins in grid order).
    pub fn write(&mut self, b: &ResultBlock) -> hdf5::Result<()> {
        for (ds, column) in self.datasets.iter().zip(&b.columns) {
            ds.write_slice(column.as_slice(), b.first_bin..b.first_bin + column.len())?;
        }
        for &(first, value) in &b.spread_runs {
            // A run open at the previous block's end goes on.
            extend_runs(&mut self.spread_runs, first, value);
        }
        match (&b.limits, &self.limit_dataset) {
            (None, None) => Ok(()),
            (Some(limits), Some(ds)) => ds.write_slice(limits.as_slice(), b.first_bin..b.first_bin + limits.len()),
            _ => Err(hdf5::Error::from("a run of bins with limits where the file has none, or without where it has them")),
        }
    }

    /// The file's root group, for the datasets and attributes written last.
    pub fn file(&self) -> &hdf5::File {
        &self.file
    }

    /// Writes a dataset of `data` with its `units` and `description`, in `group`.
    pub fn described<T: hdf5::H5Type>(group: &hdf5::Group, name: &str, data: &[T], units: &str, description: &str) -> hdf5::Result<()> {
        let ds = group.new_dataset_builder().with_data(data).create(name)?;
        describe(&ds, units, description)
    }

    /// Writes a string attribute of the root.
    pub fn text_attr(&self, name: &str, value: &str) -> hdf5::Result<()> {
        self.file.new_attr::<VarLenUnicode>().create(name)?.write_scalar(&text(value))
    }

    /// Writes the predicted spread's runs and closes the file.
    pub fn close(self) -> hdf5::Result<()> {
        let g = self.file.create_group(SPREAD_GROUP)?;
        let (first_bins, values): (Vec<i64>, Vec<f32>) = self.spread_runs.iter().copied().unzip();
        Self::described(
            &g,
            "first_bin",
            &first_bins,
            "1",
            "first grid bin of each run of equal predicted spread (a run ends where the next begins, the last at n_rf_bins)",
        )?;
        Self::described(&g, "value", &values, "1", "predicted null spread of A/sigma_A over each run")?;
        drop(self.datasets);
        drop(self.limit_dataset);
        self.file.close()
    }
}

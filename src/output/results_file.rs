//! `results.h5`, written block by block.
//!
//! Layout: root attributes `rf_start_hz` (bin-centre RF frequency of bin 0, Hz),
//! `bin_width_hz` and `n_rf_bins` give the frequency axis, bin j at rf_start_hz + j *
//! bin_width_hz (the combination puts every step on one regular grid, so no frequency
//! dataset is needed); one single-precision dataset per per-bin quantity, in chunks of
//! [`CHUNK_BINS`] bins, so a reader of one MHz reads one or two chunks. Single precision
//! rounds each value by at most 2^-24 of itself (the grand spectrum by < 3e-7 for
//! |grand| < 5, against a null spread of 1); candidates are found in double precision
//! before rounding. `predicted_spread` is constant over each filter segment and is stored
//! deflated (level 1: 10.5 MB -> 56 kB per 2.6 M bins on the wide night); the other datasets
//! are stored plain (measured with h5py on the 3000-step night: deflate saved 21 % of the
//! noise-like datasets at 30-45x the write time, and shrank the two sigmas 8-9x at about
//! 10x the write time, too slow for the one writing thread).
//!
//! With a calibration, one more per-bin dataset, `limit_g_gamma` (the upper limit on
//! |g_gamma|; NaN where a bin is not excluded), in the same chunks and written with the same
//! blocks, in single precision: the double-precision value rounded once to nearest (within
//! 2^-24 of itself, far below the limits' own statistical spread). What follows from it and
//! the frequency axis is not stored per bin but given by attributes of the dataset, so the
//! file stays at 24 bytes per bin: `mass_uev_per_hz` (the axion mass of bin j is
//! `mass_uev_per_hz * (rf_start_hz + (j - 1/2) * bin_width_hz)`, the line starting at the
//! bin's lower edge; h / e, CODATA 2018), `g_agg_per_gev_per_uev` (|g_agg| in GeV^-1 =
//! `g_agg_per_gev_per_uev * limit_g_gamma * mass_uev`), `g_gamma_ksvz` and `g_gamma_dfsz` (the
//! limit relative to either model is `limit_g_gamma` divided by it), and `derived`, the same
//! in words.

use super::bins::Bins;
use crate::limits::BinLimit;
use crate::physics::constants::{G_GAMMA_DFSZ, G_GAMMA_KSVZ};
use crate::physics::units::{g_agg_from_g_gamma_per_gev, mass_uev_from_freq_hz};
use crate::simd::per_bin_loop;
use hdf5::types::VarLenUnicode;
use rayon::prelude::*;
use std::path::Path;
use std::str::FromStr;

/// Bins per chunk of every per-bin dataset (256 kB of f32; 6.6 MHz of 100 Hz bins).
pub const CHUNK_BINS: usize = 1 << 16;

/// The per-bin datasets: name, units, description, compressed.
const DATASETS: [(&str, &str, &str, bool); 6] = [
    ("combined", "reference-axion power", "maximum-likelihood combined excess power", false),
    ("combined_sigma", "reference-axion power", "standard deviation of combined", false),
    ("amplitude", "reference-axion power", "filtered amplitude A for a line starting at the bin's lower edge", false),
    ("sigma_a", "reference-axion power", "standard deviation of the filtered amplitude", false),
    ("predicted_spread", "1", "predicted null spread of A/sigma_A", true),
    ("grand", "1", "grand spectrum A / (sigma_A * predicted spread)", false),
];

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
    columns: [Vec<f32>; 6],
    /// With a calibration, the limit on |g_gamma| per bin ([`LIMIT_DATASET`]).
    limits: Option<Vec<f32>>,
}

impl ResultBlock {
    /// The bins' values in single precision (the datasets narrowed in parallel).
    pub fn of(b: &Bins<'_>) -> Self {
        let sources = [b.combined, b.combined_sigma, b.amplitude, b.sigma_a, b.predicted_spread, b.grand];
        let mut columns: [Vec<f32>; 6] = Default::default();
        columns.par_iter_mut().zip(sources).for_each(|(column, source)| narrow(source, column));
        Self { first_bin: b.first_bin, grid_bins: b.grid_bins, origin_hz: b.origin_hz, bin_width_hz: b.bin_width_hz, columns, limits: None }
    }

    /// Adds the limits of the same bins (`limits[i]` of bin `first_bin + i`), each rounded
    /// to the nearest single-precision value.
    pub fn with_limits(mut self, limits: &[BinLimit]) -> Self {
        self.limits = Some(limits.iter().map(|b| b.g_gamma as f32).collect());
        self
    }
}

per_bin_loop! {
    /// Appends `values` to `out`, each rounded to the nearest single-precision value.
    fn narrow(values: &[f64], out: &mut Vec<f32>) {
        out.extend(values.iter().map(|&v| v as f32));
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
}

impl ResultsFile {
    /// Creates the file at `path` for the grid of `first` (with the limit datasets if `first`
    /// has limits) and writes `first`.
    pub fn create(path: &Path, first: &ResultBlock) -> hdf5::Result<Self> {
        let file = hdf5::File::create(path)?;
        let n = first.grid_bins;
        let chunk = CHUNK_BINS.min(n.max(1));
        let datasets = DATASETS
            .iter()
            .map(|&(name, units, description, compressed)| {
                let builder = file.new_dataset::<f32>().chunk(chunk);
                let builder = if compressed { builder.deflate(1) } else { builder };
                let ds = builder.shape(n).create(name)?;
                describe(&ds, units, description)?;
                Ok(ds)
            })
            .collect::<hdf5::Result<Vec<_>>>()?;
        let limit_dataset = match &first.limits {
            None => None,
            Some(_) => {
                let (name, units, description) = LIMIT_DATASET;
                let ds = file.new_dataset::<f32>().chunk(chunk).shape(n).create(name)?;
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
        let results = Self { file, datasets, limit_dataset };
        results.write(first)?;
        Ok(results)
    }

    /// Writes one run of bins.
    pub fn write(&self, b: &ResultBlock) -> hdf5::Result<()> {
        for (ds, column) in self.datasets.iter().zip(&b.columns) {
            ds.write_slice(column.as_slice(), b.first_bin..b.first_bin + column.len())?;
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

    /// Closes the file.
    pub fn close(self) -> hdf5::Result<()> {
        drop(self.datasets);
        drop(self.limit_dataset);
        self.file.close()
    }
}

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
//! With a calibration, five more per-bin datasets ([`LIMIT_DATASETS`]), in the same chunks
//! and written with the same blocks: `mass_uev` in double precision (single precision would
//! resolve only about 1e-6 ueV, several 100 Hz bins), and the four limits in single
//! precision, each the double-precision value rounded once to nearest (within 2^-24 of
//! itself, far below the limits' own statistical spread; NaN where a bin is not excluded).

use super::bins::Bins;
use crate::limits::BinLimit;
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

/// The per-bin limit datasets: name, units, description (the first in double precision,
/// the others in single precision).
const LIMIT_DATASETS: [(&str, &str, &str); 5] = [
    ("mass_uev", "ueV", "axion mass of the line starting at the bin's lower edge"),
    ("limit_g_gamma", "1", "upper limit on |g_gamma| (NaN: not excluded)"),
    ("limit_g_agg_per_gev", "GeV^-1", "upper limit on |g_agg| (NaN: not excluded)"),
    ("limit_rel_ksvz", "1", "limit on |g_gamma| relative to KSVZ"),
    ("limit_rel_dfsz", "1", "limit on |g_gamma| relative to DFSZ"),
];

/// One run of bins of every per-bin dataset, narrowed to single precision for writing.
#[derive(Debug, Clone)]
pub struct ResultBlock {
    first_bin: usize,
    grid_bins: usize,
    origin_hz: f64,
    bin_width_hz: f64,
    /// In the order of [`DATASETS`].
    columns: [Vec<f32>; 6],
    /// With a calibration, the limit datasets in the order of [`LIMIT_DATASETS`].
    limits: Option<LimitColumns>,
}

/// A run of bins of the limit datasets.
#[derive(Debug, Clone)]
struct LimitColumns {
    mass_uev: Vec<f64>,
    /// limit_g_gamma, limit_g_agg_per_gev, limit_rel_ksvz, limit_rel_dfsz.
    narrowed: [Vec<f32>; 4],
}

impl ResultBlock {
    /// The bins' values in single precision (the datasets narrowed in parallel).
    pub fn of(b: &Bins<'_>) -> Self {
        let sources = [b.combined, b.combined_sigma, b.amplitude, b.sigma_a, b.predicted_spread, b.grand];
        let mut columns: [Vec<f32>; 6] = Default::default();
        columns.par_iter_mut().zip(sources).for_each(|(column, source)| narrow(source, column));
        Self { first_bin: b.first_bin, grid_bins: b.grid_bins, origin_hz: b.origin_hz, bin_width_hz: b.bin_width_hz, columns, limits: None }
    }

    /// Adds the limits of the same bins (`limits[i]` of bin `first_bin + i`).
    pub fn with_limits(mut self, limits: &[BinLimit]) -> Self {
        let mut mass_uev = Vec::with_capacity(limits.len());
        let mut narrowed: [Vec<f32>; 4] = std::array::from_fn(|_| Vec::with_capacity(limits.len()));
        // One pass over the limits, each value rounded to the nearest single-precision value.
        for b in limits {
            mass_uev.push(b.mass_uev);
            for (column, v) in narrowed.iter_mut().zip([b.g_gamma, b.g_agg_per_gev.abs(), b.rel_ksvz, b.rel_dfsz]) {
                column.push(v as f32);
            }
        }
        self.limits = Some(LimitColumns { mass_uev, narrowed });
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
    /// With a calibration, the datasets of [`LIMIT_DATASETS`].
    limit_datasets: Vec<hdf5::Dataset>,
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
        let limit_datasets = match &first.limits {
            None => Vec::new(),
            Some(_) => LIMIT_DATASETS
                .iter()
                .enumerate()
                .map(|(k, &(name, units, description))| {
                    let ds = if k == 0 { file.new_dataset::<f64>() } else { file.new_dataset::<f32>() }.chunk(chunk).shape(n).create(name)?;
                    describe(&ds, units, description)?;
                    Ok(ds)
                })
                .collect::<hdf5::Result<Vec<_>>>()?,
        };
        file.new_attr::<f64>().create("rf_start_hz")?.write_scalar(&first.origin_hz)?;
        file.new_attr::<f64>().create("bin_width_hz")?.write_scalar(&first.bin_width_hz)?;
        file.new_attr::<u64>().create("n_rf_bins")?.write_scalar(&(n as u64))?;
        file.new_attr::<VarLenUnicode>().create("rf_axis")?.write_scalar(&text("bin j has bin-centre RF frequency rf_start_hz + j * bin_width_hz (Hz)"))?;
        let results = Self { file, datasets, limit_datasets };
        results.write(first)?;
        Ok(results)
    }

    /// Writes one run of bins.
    pub fn write(&self, b: &ResultBlock) -> hdf5::Result<()> {
        for (ds, column) in self.datasets.iter().zip(&b.columns) {
            ds.write_slice(column.as_slice(), b.first_bin..b.first_bin + column.len())?;
        }
        match (&b.limits, self.limit_datasets.split_first()) {
            (None, None) => Ok(()),
            (Some(l), Some((mass, narrowed))) => {
                mass.write_slice(l.mass_uev.as_slice(), b.first_bin..b.first_bin + l.mass_uev.len())?;
                for (ds, column) in narrowed.iter().zip(&l.narrowed) {
                    ds.write_slice(column.as_slice(), b.first_bin..b.first_bin + column.len())?;
                }
                Ok(())
            }
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
        drop(self.limit_datasets);
        self.file.close()
    }
}

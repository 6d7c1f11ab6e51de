//! The whole campaign's grand spectrum, written to one HDF5 file one tile at a time.
//!
//! File layout: root attributes `rf_start_hz` (bin-centre frequency of the first bin, Hz),
//! `bin_width_hz` and `first_bin` (the state's grid index of the first bin); 1-D datasets
//! over the state's grid, chunked by block: `grand`, `combined`, `combined_sigma` (f64,
//! NaN / infinite = no data) and `coverage` (u32), each with `units` and `description`.
//! Each tile is computed as a nightly update computes it ([`tiles`](super::tiles)), so every
//! value equals, bit for bit, the one the latest update that recomputed the bin wrote. Memory
//! is one tile's worth (a few times the block size in bytes times 100), whatever the
//! campaign's size.

use super::State;
use super::accumulate::check_config;
use super::store::{StateError, io};
use super::tiles::Stages;
use crate::config::Plan;
use hdf5::H5Type;
use hdf5::types::VarLenUnicode;
use std::path::Path;
use std::str::FromStr;

fn dataset<T: H5Type>(file: &hdf5::File, name: &str, n: usize, chunk: usize, units: &str, description: &str) -> hdf5::Result<hdf5::Dataset> {
    let text = |s: &str| VarLenUnicode::from_str(s).unwrap_or_default();
    let ds = file.new_dataset::<T>().shape(n).chunk(chunk).create(name)?;
    ds.new_attr::<VarLenUnicode>().create("units")?.write_scalar(&text(units))?;
    ds.new_attr::<VarLenUnicode>().create("description")?.write_scalar(&text(description))?;
    Ok(ds)
}

/// Writes the grand spectrum of every bin of `state`'s grid to `path` (under a temporary
/// name, renamed into place when complete); `plan` must be the state's pipeline. Returns the
/// number of bins written.
pub fn export_grand(state: &State, plan: &Plan, path: &Path) -> Result<usize, StateError> {
    check_config(state, plan)?;
    let (first, end) = state.grid_bins.ok_or_else(|| StateError::Refused("the state holds no night yet: nothing to export".into()))?;
    let stages = Stages::new(plan).map_err(StateError::Refused)?;
    let n = (end - first) as usize;
    let name = path.file_name().map(|n| n.to_string_lossy().into_owned()).unwrap_or_default();
    let tmp = path.with_file_name(format!(".tmp.{name}"));
    let file = hdf5::File::create(&tmp).map_err(|e| io(&tmp, e))?;
    let chunk = state.block_bins.min(n);
    let make = || -> hdf5::Result<_> {
        file.new_attr::<f64>().create("rf_start_hz")?.write_scalar(&state.freq_hz(first))?;
        file.new_attr::<f64>().create("bin_width_hz")?.write_scalar(&state.bin_width_hz)?;
        file.new_attr::<i64>().create("first_bin")?.write_scalar(&first)?;
        Ok((
            dataset::<f64>(&file, "grand", n, chunk, "1", "grand spectrum A / (sigma_A * predicted spread)")?,
            dataset::<f64>(&file, "combined", n, chunk, "reference-axion power", "maximum-likelihood combined excess power")?,
            dataset::<f64>(&file, "combined_sigma", n, chunk, "reference-axion power", "standard deviation of combined")?,
            dataset::<u32>(&file, "coverage", n, chunk, "steps", "steps contributing to the bin")?,
        ))
    };
    let (grand, combined, sigma, coverage) = make().map_err(|e| io(&tmp, e))?;
    for tile in state.block_of(first)..=state.block_of(end - 1) {
        let sums = state.sums(stages.input_bins(state, tile))?;
        let sp = stages.tile(state, tile, &sums, false, &[], 0.0).map_err(StateError::Refused)?;
        let block = state.block_range(tile);
        let (lo, hi) = (block.start.max(first), block.end.min(end));
        let (k0, k1) = ((lo - block.start) as usize, (hi - block.start) as usize);
        let at = (lo - first) as usize..(hi - first) as usize;
        let written = grand
            .write_slice(&sp.grand[k0..k1], at.clone())
            .and_then(|_| combined.write_slice(&sp.combined[k0..k1], at.clone()))
            .and_then(|_| sigma.write_slice(&sp.combined_sigma[k0..k1], at.clone()))
            .and_then(|_| coverage.write_slice(&sp.coverage[k0..k1], at));
        written.map_err(|e| io(&tmp, format!("writing tile {tile}: {e}")))?;
    }
    file.close().map_err(|e| io(&tmp, e))?;
    std::fs::rename(&tmp, path).map_err(|e| io(path, e))?;
    Ok(n)
}

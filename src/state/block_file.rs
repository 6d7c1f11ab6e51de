//! The file of one block of the state's sums: `blocks/b<index>-g<generation>.h5`.
//!
//! Root attribute `first_bin` (grid index of the block's first bin, i64). Dense datasets of
//! the block's length: `weight`, `weighted_sum`, `coverage`. The IF-line part is sparse (IF
//! lines touch few bins): `line_bin` (offset in the block, u32) with `line_weight`,
//! `line_weighted_sum`, `line_steps`, `line_night`, `line_if_bin` and
//! `line_if_profile_sigma` for those bins only. Every dataset has `units` and `description`.

use super::store::{StateError, io};
use super::sums::Sums;
use hdf5::H5Type;
use hdf5::types::VarLenUnicode;
use std::path::Path;
use std::str::FromStr;

/// Writes one 1-D dataset with its `units` and `description` attributes.
pub(super) fn put<T: H5Type>(file: &hdf5::File, name: &str, data: &[T], units: &str, description: &str) -> hdf5::Result<()> {
    let text = |s: &str| VarLenUnicode::from_str(s).unwrap_or_default();
    let ds = file.new_dataset_builder().with_data(data).create(name)?;
    ds.new_attr::<VarLenUnicode>().create("units")?.write_scalar(&text(units))?;
    ds.new_attr::<VarLenUnicode>().create("description")?.write_scalar(&text(description))
}

/// Writes `sums` (one block) to `path` (the caller renames it into place).
pub(super) fn write(path: &Path, sums: &Sums) -> Result<(), StateError> {
    let lines: Vec<usize> = (0..sums.len()).filter(|&k| sums.line_steps[k] > 0).collect();
    let pick = |v: &[f64]| lines.iter().map(|&k| v[k]).collect::<Vec<f64>>();
    let pick_i32 = |v: &[i32]| lines.iter().map(|&k| v[k]).collect::<Vec<i32>>();
    let offsets: Vec<u32> = lines.iter().map(|&k| k as u32).collect();
    let steps: Vec<u32> = lines.iter().map(|&k| sums.line_steps[k]).collect();
    let write_all = || -> hdf5::Result<()> {
        let file = hdf5::File::create(path)?;
        file.new_attr::<i64>().create("first_bin")?.write_scalar(&sums.first_bin)?;
        put(&file, "weight", &sums.weight, "reference-axion power^-2", "sum over steps of 1/sigma^2")?;
        put(&file, "weighted_sum", &sums.weighted_sum, "reference-axion power^-1", "sum over steps of R/sigma^2")?;
        put(&file, "coverage", &sums.coverage, "steps", "steps contributing to the bin")?;
        put(&file, "line_bin", &offsets, "bin", "bins (offset in the block) holding IF-line samples")?;
        put(&file, "line_weight", &pick(&sums.line_weight), "reference-axion power^-2", "sum of 1/sigma^2 of the IF-line samples (included in weight)")?;
        put(&file, "line_weighted_sum", &pick(&sums.line_weighted_sum), "reference-axion power^-1", "sum of R/sigma^2 of the IF-line samples")?;
        put(&file, "line_steps", &steps, "steps", "IF-line samples in the bin")?;
        put(&file, "line_night", &pick_i32(&sums.line_night), "night index", "night of the latest IF-line sample")?;
        put(&file, "line_if_bin", &pick_i32(&sums.line_if_bin), "IF bin", "IF bin of the latest IF-line sample")?;
        put(&file, "line_if_profile_sigma", &pick(&sums.line_if_profile_sigma), "normal sigma", "that IF bin's significance in its night's IF profile")?;
        file.close()
    };
    write_all().map_err(|e| io(path, e))
}

/// Reads the block of `n` bins from `first_bin` stored in `path`.
pub(super) fn read(path: &Path, first_bin: i64, n: usize) -> Result<Sums, StateError> {
    let file = hdf5::File::open(path).map_err(|e| io(path, e))?;
    let field = |name: &str, e: hdf5::Error| io(path, format!("dataset `{name}`: {e}"));
    let f64s = |name: &str| file.dataset(name).and_then(|d| d.read_raw::<f64>()).map_err(|e| field(name, e));
    let u32s = |name: &str| file.dataset(name).and_then(|d| d.read_raw::<u32>()).map_err(|e| field(name, e));
    let i32s = |name: &str| file.dataset(name).and_then(|d| d.read_raw::<i32>()).map_err(|e| field(name, e));
    let stored = file.attr("first_bin").and_then(|a| a.read_scalar::<i64>()).map_err(|e| io(path, format!("attribute `first_bin`: {e}")))?;
    if stored != first_bin {
        return Err(io(path, format!("attribute `first_bin` is {stored}; state.json places this block at bin {first_bin}")));
    }
    let mut sums = Sums::empty(first_bin, 0);
    sums.weight = f64s("weight")?;
    sums.weighted_sum = f64s("weighted_sum")?;
    sums.coverage = u32s("coverage")?;
    if [sums.weight.len(), sums.weighted_sum.len(), sums.coverage.len()] != [n; 3] {
        return Err(io(path, format!("datasets `weight`, `weighted_sum`, `coverage` must hold {n} bins (the block size)")));
    }
    let offsets = u32s("line_bin")?;
    let (weight, weighted_sum, steps) = (f64s("line_weight")?, f64s("line_weighted_sum")?, u32s("line_steps")?);
    let (night, if_bin, sigma) = (i32s("line_night")?, i32s("line_if_bin")?, f64s("line_if_profile_sigma")?);
    let m = offsets.len();
    if [weight.len(), weighted_sum.len(), steps.len(), night.len(), if_bin.len(), sigma.len()] != [m; 6] || offsets.iter().any(|&k| k as usize >= n) {
        return Err(io(path, format!("the `line_*` datasets must hold one entry per `line_bin` ({m}), each below {n}")));
    }
    let full = Sums::empty(first_bin, n);
    (sums.line_weight, sums.line_weighted_sum, sums.line_steps) = (full.line_weight, full.line_weighted_sum, full.line_steps);
    (sums.line_night, sums.line_if_bin, sums.line_if_profile_sigma) = (full.line_night, full.line_if_bin, full.line_if_profile_sigma);
    for (i, &k) in offsets.iter().enumerate() {
        let k = k as usize;
        sums.line_weight[k] = weight[i];
        sums.line_weighted_sum[k] = weighted_sum[i];
        sums.line_steps[k] = steps[i];
        sums.line_night[k] = night[i];
        sums.line_if_bin[k] = if_bin[i];
        sums.line_if_profile_sigma[k] = sigma[i];
    }
    Ok(sums)
}

//! The file of one night's IF profile: `nights/night-<index>.h5`, written once, when the
//! night is added, with datasets `if_profile_sigma` (excess scatter per IF bin, normal sigma;
//! NaN = fewer than 3 steps) and `if_steps` (steps with a valid sample per IF bin).

use super::block_file::put;
use super::store::{StateError, io};
use std::path::Path;

/// A night's IF profile.
#[derive(Debug, Clone, PartialEq)]
pub struct IfProfileRecord {
    /// Excess scatter per IF bin, normal sigma (NaN = too few steps).
    pub if_profile_sigma: Vec<f64>,
    /// Steps with a valid sample per IF bin.
    pub if_steps: Vec<u32>,
}

/// Writes `profile` to `path` (the caller renames it into place).
pub(super) fn write(path: &Path, profile: &IfProfileRecord) -> Result<(), StateError> {
    let write_all = || -> hdf5::Result<()> {
        let file = hdf5::File::create(path)?;
        put(&file, "if_profile_sigma", &profile.if_profile_sigma, "normal sigma", "excess scatter of the night's steps per IF bin (NaN = fewer than 3 steps)")?;
        put(&file, "if_steps", &profile.if_steps, "steps", "steps with a valid sample per IF bin")?;
        file.close()
    };
    write_all().map_err(|e| io(path, e))
}

/// Reads the profile stored in `path`.
pub(super) fn read(path: &Path) -> Result<IfProfileRecord, StateError> {
    let file = hdf5::File::open(path).map_err(|e| io(path, e))?;
    let if_profile_sigma =
        file.dataset("if_profile_sigma").and_then(|d| d.read_raw::<f64>()).map_err(|e| io(path, format!("dataset `if_profile_sigma`: {e}")))?;
    let if_steps = file.dataset("if_steps").and_then(|d| d.read_raw::<u32>()).map_err(|e| io(path, format!("dataset `if_steps`: {e}")))?;
    if if_steps.len() != if_profile_sigma.len() {
        return Err(io(path, "datasets `if_profile_sigma` and `if_steps` differ in length"));
    }
    Ok(IfProfileRecord { if_profile_sigma, if_steps })
}

//! Root attributes shared by the project's HDF5 formats (run files, IQ captures): opening a
//! file of a given format and version, and reading the facility's parameters.

use super::{RunFileError, attrs, probe};
use std::path::Path;

/// The facility's parameters, stored as root attributes in every format.
#[derive(Debug, Clone, PartialEq)]
pub(crate) struct Facility {
    /// Magnet field in the cavity, tesla.
    pub magnet_field_t: f64,
    /// Cavity volume, cubic metres.
    pub cavity_volume_m3: f64,
    /// Mode form factor C (dimensionless, 0 < C <= 1).
    pub form_factor: f64,
    /// Free-text label of the run.
    pub run_label: String,
}

fn invalid(path: &Path, field: &str, message: String) -> RunFileError {
    RunFileError::Invalid { path: path.to_path_buf(), field: field.to_string(), step: None, message }
}

/// Checks the file (see [`probe::check_file`]), opens it, and checks its root `format`
/// (`format_name`, files of this `kind`, e.g. "run file") and `format_version`. With
/// `without_chunk_cache`, the raw-data chunk cache is off: every read then takes whole chunks,
/// which the library reads straight into the caller's buffer.
pub(crate) fn open_format(path: &Path, kind: &str, format_name: &str, format_version: u32, without_chunk_cache: bool) -> Result<hdf5::File, RunFileError> {
    probe::check_file(path, kind, format_name)?;
    let file =
        hdf5::File::with_options().with_fapl(|fapl| if without_chunk_cache { fapl.chunk_cache(1, 0, 1.0) } else { fapl }).open(path).map_err(|source| {
            let what = if source.to_string().contains("unable to lock file") {
                "is locked by another program (still being written?)"
            } else {
                "cannot open as HDF5 (truncated or corrupted file?)"
            };
            RunFileError::Hdf5 { path: path.to_path_buf(), what: what.into(), source }
        })?;
    let format = attrs::read_string(&file, "format").map_err(|m| invalid(path, "format", m))?;
    if format != format_name {
        return Err(invalid(path, "format", format!("is {format:?}, expected {format_name:?} (a {kind})")));
    }
    let version = attrs::read_f64(&file, "format_version").map_err(|m| invalid(path, "format_version", m))?;
    if version != f64::from(format_version) {
        return Err(invalid(path, "format_version", format!("is {version}, this build reads {format_version}")));
    }
    Ok(file)
}

/// Reads the numeric root attribute `name`, which must be finite and > 0.
pub(crate) fn read_positive(file: &hdf5::File, path: &Path, name: &str) -> Result<f64, RunFileError> {
    let v = attrs::read_f64(file, name).map_err(|m| invalid(path, name, m))?;
    if v.is_finite() && v > 0.0 { Ok(v) } else { Err(invalid(path, name, format!("is {v}, must be finite and > 0"))) }
}

/// Reads and checks the facility's root attributes.
pub(crate) fn read_facility(file: &hdf5::File, path: &Path) -> Result<Facility, RunFileError> {
    let facility = Facility {
        magnet_field_t: read_positive(file, path, "magnet_field_t")?,
        cavity_volume_m3: read_positive(file, path, "cavity_volume_m3")?,
        form_factor: read_positive(file, path, "form_factor")?,
        run_label: attrs::read_string(file, "run_label").map_err(|m| invalid(path, "run_label", m))?,
    };
    if facility.form_factor > 1.0 {
        return Err(invalid(path, "form_factor", format!("is {}, must be at most 1", facility.form_factor)));
    }
    Ok(facility)
}

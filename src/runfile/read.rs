//! Reading and validating run files, step rows by hyperslab.

use super::{FORMAT_NAME, FORMAT_VERSION, MAX_BINS_PER_STEP, MAX_CORRELATION_LAGS, MAX_STEPS_PER_FILE, MIN_BINS_PER_STEP};
use super::{RunFileError, RunHeader, StepMeta, attrs, header, steps};
use hdf5::types::TypeDescriptor;
use ndarray::Array2;
use std::ops::Range;
use std::path::{Path, PathBuf};

/// An open, validated run file. Metadata is held in memory; spectra are read on demand.
pub struct RunReader {
    path: PathBuf,
    spectra: hdf5::Dataset,
    mask: Option<hdf5::Dataset>,
    header: RunHeader,
    steps: Vec<StepMeta>,
    n_bins: usize,
}

impl RunReader {
    /// Opens `path` and checks it completely before any spectrum is read: the file itself
    /// (exists, HDF5 signature), the format attributes, the header values, the shape, type and
    /// stored size of `spectra` and `mask`, and every step's metadata. Errors name the file,
    /// the field and, for per-step values, the step (row) index.
    pub fn open(path: &Path) -> Result<Self, RunFileError> {
        let p = path.to_path_buf();
        let invalid = |field: &str, step: Option<usize>, message: String| RunFileError::Invalid { path: p.clone(), field: field.to_string(), step, message };
        // No raw-data chunk cache: every read takes whole chunks (one step row each).
        let file = header::open_format(path, "run file", FORMAT_NAME, FORMAT_VERSION, true)?;
        let facility = header::read_facility(&file, path)?;
        let header = RunHeader {
            bin_width_hz: header::read_positive(&file, path, "bin_width_hz")?,
            magnet_field_t: facility.magnet_field_t,
            cavity_volume_m3: facility.cavity_volume_m3,
            form_factor: facility.form_factor,
            run_label: facility.run_label,
            bin_correlation: read_bin_correlation(&file, path)?,
        };
        let spectra = file.dataset("spectra").map_err(|_| invalid("spectra", None, "dataset is missing".into()))?;
        let shape = spectra.shape();
        if shape.len() != 2 {
            return Err(invalid("spectra", None, format!("has {} dimensions, expected 2 [n_steps, n_bins]", shape.len())));
        }
        let (n_steps, n_bins) = (shape[0], shape[1]);
        if n_steps == 0 || n_steps > MAX_STEPS_PER_FILE || !(MIN_BINS_PER_STEP..=MAX_BINS_PER_STEP).contains(&n_bins) {
            return Err(invalid(
                "spectra",
                None,
                format!("shape [{n_steps}, {n_bins}] is outside 1..={MAX_STEPS_PER_FILE} steps, {MIN_BINS_PER_STEP}..={MAX_BINS_PER_STEP} bins"),
            ));
        }
        let kind = spectra.dtype().and_then(|d| d.to_descriptor()).map_err(|e| invalid("spectra", None, format!("type cannot be read: {e}")))?;
        let elem = match kind {
            TypeDescriptor::Float(s) => s as u64,
            other => return Err(invalid("spectra", None, format!("is a {}, expected 32- or 64-bit floats", attrs::type_name(&other)))),
        };
        check_stored(&spectra, n_steps, n_bins, elem).map_err(|m| invalid("spectra", None, m))?;
        let mask = match file.dataset("mask") {
            Err(_) => None,
            Ok(m) => {
                if m.shape() != shape {
                    return Err(invalid("mask", None, format!("shape {:?} differs from spectra {:?}", m.shape(), shape)));
                }
                match m.dtype().and_then(|d| d.to_descriptor()) {
                    Ok(TypeDescriptor::Unsigned(_) | TypeDescriptor::Integer(_) | TypeDescriptor::Boolean) => {}
                    Ok(other) => return Err(invalid("mask", None, format!("is a {}, expected u8 flags (1 = bad bin)", attrs::type_name(&other)))),
                    Err(e) => return Err(invalid("mask", None, format!("type cannot be read: {e}"))),
                }
                Some(m)
            }
        };
        let group = file.group("steps").map_err(|_| invalid("steps", None, "group is missing".into()))?;
        let steps = steps::read_steps(&group, n_steps).map_err(|(field, step, message)| invalid(&field, step, message))?;
        Ok(Self { path: p, spectra, mask, header, steps, n_bins })
    }

    /// The file's path.
    pub fn path(&self) -> &Path {
        &self.path
    }
    /// Facility parameters (root attributes).
    pub fn header(&self) -> &RunHeader {
        &self.header
    }
    /// Per-step metadata, in file order.
    pub fn steps(&self) -> &[StepMeta] {
        &self.steps
    }
    /// Bins per step.
    pub fn n_bins(&self) -> usize {
        self.n_bins
    }

    /// Reads raw power for `rows` (a hyperslab), as f64. Masked bins become NaN ("no data").
    pub fn read_rows(&self, rows: Range<usize>) -> Result<Array2<f64>, RunFileError> {
        let what = format!("reading spectra of steps {}..{} (corrupted file?)", rows.start, rows.end);
        let mut power: Array2<f64> =
            self.spectra.read_slice_2d((rows.clone(), ..)).map_err(|source| RunFileError::Hdf5 { path: self.path.clone(), what: what.clone(), source })?;
        if let Some(mask) = &self.mask {
            let flags: Array2<u8> =
                mask.read_slice_2d((rows, ..)).map_err(|source| RunFileError::Hdf5 { path: self.path.clone(), what: format!("{what} of mask"), source })?;
            ndarray::Zip::from(&mut power).and(&flags).for_each(|p, &m| {
                if m != 0 {
                    *p = f64::NAN;
                }
            });
        }
        Ok(power)
    }

    /// Reads raw power for `rows` (a hyperslab) as stored, f32 or f64 (f32 is not widened:
    /// half the memory traffic of [`Self::read_rows`] and no conversion inside the HDF5
    /// library), masked bins NaN ("no data"), with the number of masked bins of each row.
    pub fn read_stored_rows(&self, rows: Range<usize>) -> Result<StoredRows, RunFileError> {
        let what = format!("reading spectra of steps {}..{} (corrupted file?)", rows.start, rows.end);
        let hdf5_error = |what: String| {
            let path = self.path.clone();
            move |source| RunFileError::Hdf5 { path, what, source }
        };
        let n_rows = rows.len();
        let flags: Option<Array2<u8>> = match &self.mask {
            Some(mask) => Some(mask.read_slice_2d((rows.clone(), ..)).map_err(hdf5_error(format!("{what} of mask")))?),
            None => None,
        };
        let masked_per_row = match &flags {
            Some(f) => f.outer_iter().map(|row| row.iter().map(|&m| usize::from(m != 0)).sum()).collect(),
            None => vec![0; n_rows],
        };
        let power = if self.spectra.dtype().map_err(hdf5_error(what.clone()))?.size() == 4 {
            let mut power: Array2<f32> = self.spectra.read_slice_2d((rows, ..)).map_err(hdf5_error(what))?;
            if let Some(f) = &flags {
                ndarray::Zip::from(&mut power).and(f).for_each(|p, &m| *p = if m != 0 { f32::NAN } else { *p });
            }
            StoredPower::F32(power)
        } else {
            let mut power: Array2<f64> = self.spectra.read_slice_2d((rows, ..)).map_err(hdf5_error(what))?;
            if let Some(f) = &flags {
                ndarray::Zip::from(&mut power).and(f).for_each(|p, &m| *p = if m != 0 { f64::NAN } else { *p });
            }
            StoredPower::F64(power)
        };
        Ok(StoredRows { power, masked_per_row })
    }
}

/// Raw power of consecutive rows in the precision the file stores.
#[derive(Debug)]
pub enum StoredPower {
    /// Stored as f32.
    F32(Array2<f32>),
    /// Stored as f64.
    F64(Array2<f64>),
}

/// Rows read by [`RunReader::read_stored_rows`].
#[derive(Debug)]
pub struct StoredRows {
    /// Raw power per row and bin (masked bins NaN).
    pub power: StoredPower,
    /// Bins the mask marks in each row.
    pub masked_per_row: Vec<usize>,
}

/// Refuses a `spectra` dataset whose declared size the file does not hold: an uncompressed
/// dataset must have all its bytes allocated, a compressed one at least some.
fn check_stored(ds: &hdf5::Dataset, n_steps: usize, n_bins: usize, elem: u64) -> Result<(), String> {
    let declared = n_steps as u64 * n_bins as u64 * elem;
    let stored = ds.storage_size();
    let compressed = !ds.filters().is_empty();
    if (!compressed && stored < declared) || stored == 0 {
        return Err(format!(
            "declares [{n_steps}, {n_bins}] values ({declared} bytes) but only {stored} bytes are stored: written incompletely, or the shape is wrong"
        ));
    }
    Ok(())
}

/// Reads the optional root attribute `bin_correlation`: each value finite and in [-1, 1].
fn read_bin_correlation(file: &hdf5::File, path: &Path) -> Result<Vec<f64>, RunFileError> {
    let invalid = |message: String| RunFileError::Invalid { path: path.to_path_buf(), field: "bin_correlation".into(), step: None, message };
    let values = attrs::read_optional_f64_list(file, "bin_correlation", MAX_CORRELATION_LAGS).map_err(invalid)?.unwrap_or_default();
    if let Some((d, rho)) = values.iter().enumerate().find(|(_, r)| !(r.abs() <= 1.0)) {
        return Err(invalid(format!("value at lag {} is {rho}, a correlation coefficient must be in [-1, 1]", d + 1)));
    }
    Ok(values)
}

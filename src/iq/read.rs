//! Reading and validating IQ captures, samples by hyperslab.

use super::{FORMAT_NAME, FORMAT_VERSION, IqHeader, IqStepMeta, MAX_SAMPLES_PER_STEP, MAX_STEPS_PER_FILE, SampleKind, steps};
use crate::runfile::RunFileError;
use crate::runfile::{attrs, header};
use hdf5::types::TypeDescriptor;
use std::ops::Range;
use std::path::{Path, PathBuf};

/// Samples of one piece of one step, I and Q interleaved, as stored.
#[derive(Debug, Clone, PartialEq)]
pub enum Samples {
    /// Volts.
    F32(Vec<f32>),
    /// Counts (volts = counts * `iq_scale`).
    I16(Vec<i16>),
}

/// An open, validated capture. Metadata is held in memory; samples are read on demand.
pub struct IqReader {
    path: PathBuf,
    iq: hdf5::Dataset,
    header: IqHeader,
    kind: SampleKind,
    steps: Vec<IqStepMeta>,
    n_samples: usize,
}

impl IqReader {
    /// Opens `path` and checks it completely before any sample is read: the file itself
    /// (exists, HDF5 signature), the format attributes, the header values, the shape, type and
    /// stored size of `iq`, `iq_scale` for integer samples, and every step's metadata. Errors
    /// name the file, the field and, for per-step values, the step (row) index.
    pub fn open(path: &Path) -> Result<Self, RunFileError> {
        let p = path.to_path_buf();
        let invalid = |field: &str, step: Option<usize>, message: String| RunFileError::Invalid { path: p.clone(), field: field.to_string(), step, message };
        let file = header::open_format(path, "IQ capture", FORMAT_NAME, FORMAT_VERSION, false)?;
        let facility = header::read_facility(&file, path)?;
        let header = IqHeader {
            sample_rate_hz: header::read_positive(&file, path, "sample_rate_hz")?,
            magnet_field_t: facility.magnet_field_t,
            cavity_volume_m3: facility.cavity_volume_m3,
            form_factor: facility.form_factor,
            run_label: facility.run_label,
        };
        let iq = file.dataset("iq").map_err(|_| invalid("iq", None, "dataset is missing".into()))?;
        let shape = iq.shape();
        if shape.len() != 3 || shape[2] != 2 {
            return Err(invalid("iq", None, format!("has shape {shape:?}, expected [n_steps, n_samples, 2] (I and Q of each sample)")));
        }
        let (n_steps, n_samples) = (shape[0], shape[1]);
        if n_steps == 0 || n_steps > MAX_STEPS_PER_FILE || n_samples == 0 || n_samples > MAX_SAMPLES_PER_STEP {
            return Err(invalid("iq", None, format!("shape {shape:?} is outside 1..={MAX_STEPS_PER_FILE} steps, 1..={MAX_SAMPLES_PER_STEP} samples per step")));
        }
        let stored = iq.dtype().and_then(|d| d.to_descriptor()).map_err(|e| invalid("iq", None, format!("type cannot be read: {e}")))?;
        let has_scale = file.attr("iq_scale").is_ok();
        let kind = match stored {
            TypeDescriptor::Float(hdf5::types::FloatSize::U4) if has_scale => {
                return Err(invalid("iq_scale", None, "is given but `iq` stores 32-bit floats (volts); iq_scale belongs to int16 counts only".into()));
            }
            TypeDescriptor::Float(hdf5::types::FloatSize::U4) => SampleKind::F32,
            TypeDescriptor::Integer(hdf5::types::IntSize::U2) if !has_scale => {
                return Err(invalid("iq_scale", None, "attribute is missing: `iq` stores int16 counts, and iq_scale (volts per count) is required".into()));
            }
            TypeDescriptor::Integer(hdf5::types::IntSize::U2) => SampleKind::I16 { iq_scale_v: header::read_positive(&file, path, "iq_scale")? },
            other => return Err(invalid("iq", None, format!("is a {}, expected 32-bit floats or 16-bit signed integers", attrs::type_name(&other)))),
        };
        check_stored(&iq, n_steps, n_samples, kind.bytes_per_sample() as u64).map_err(|m| invalid("iq", None, m))?;
        let group = file.group("steps").map_err(|_| invalid("steps", None, "group is missing".into()))?;
        let steps = steps::read_steps(&group, n_steps).map_err(|(field, step, message)| invalid(&field, step, message))?;
        Ok(Self { path: p, iq, header, kind, steps, n_samples })
    }

    /// The file's path.
    pub fn path(&self) -> &Path {
        &self.path
    }
    /// Facility parameters (root attributes).
    pub fn header(&self) -> &IqHeader {
        &self.header
    }
    /// Per-step metadata, in file order.
    pub fn steps(&self) -> &[IqStepMeta] {
        &self.steps
    }
    /// Complex samples per step.
    pub fn n_samples(&self) -> usize {
        self.n_samples
    }
    /// How the samples are stored.
    pub fn kind(&self) -> SampleKind {
        self.kind
    }

    /// Reads samples `range` of step `step` (a hyperslab), as stored, I and Q interleaved.
    pub fn read_samples(&self, step: usize, range: Range<usize>) -> Result<Samples, RunFileError> {
        let hdf5_error = |source| RunFileError::Hdf5 {
            path: self.path.clone(),
            what: format!("reading `iq`, step {step}, samples {}..{} (corrupted file?)", range.start, range.end),
            source,
        };
        let selection = (step, range.clone(), ..);
        Ok(match self.kind {
            SampleKind::F32 => Samples::F32(self.iq.read_slice::<f32, _, ndarray::Ix2>(selection).map_err(hdf5_error)?.into_raw_vec_and_offset().0),
            SampleKind::I16 { .. } => Samples::I16(self.iq.read_slice::<i16, _, ndarray::Ix2>(selection).map_err(hdf5_error)?.into_raw_vec_and_offset().0),
        })
    }
}

/// Refuses an `iq` dataset whose declared size the file does not hold: an uncompressed
/// dataset must have all its bytes allocated, a compressed one at least some.
fn check_stored(ds: &hdf5::Dataset, n_steps: usize, n_samples: usize, bytes_per_sample: u64) -> Result<(), String> {
    let declared = (n_steps as u64).saturating_mul(n_samples as u64).saturating_mul(bytes_per_sample);
    let stored = ds.storage_size();
    if (ds.filters().is_empty() && stored < declared) || stored == 0 {
        return Err(format!(
            "declares [{n_steps}, {n_samples}, 2] values ({declared} bytes) but only {stored} bytes are stored: written incompletely, or the shape is wrong"
        ));
    }
    Ok(())
}

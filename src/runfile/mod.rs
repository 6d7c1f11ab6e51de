//! The HDF5 run-file format, version 1: one night (or part of one) of tuning steps.
//!
//! Layout (names are part of the interface; see README "Run-file format"):
//! root attributes `format` = "axsift-run", `format_version` = 1, `bin_width_hz`,
//! `magnet_field_t`, `cavity_volume_m3`, `form_factor`, `run_label`; dataset `spectra`
//! `[n_steps, n_bins]` (f32 or f64, raw linear power per bin, chunked by row); group `steps`
//! with 1-D datasets `start_freq_hz`, `cavity_freq_hz`, `loaded_q`, `coupling_beta`,
//! `noise_temp_k`, `n_averages`, `timestamp_s`; optional `mask` `[n_steps, n_bins]` u8;
//! optional root attribute `bin_correlation` (1-D f64, see [`RunHeader::bin_correlation`]).

pub(crate) mod attrs;
pub(crate) mod header;
pub(crate) mod probe;
mod read;
pub(crate) mod steps;
pub(crate) mod write;

pub use read::{RunReader, StoredPower, StoredRows};
pub use write::RunWriter;

use std::path::PathBuf;

/// Value of the root `format` attribute.
pub const FORMAT_NAME: &str = "axsift-run";
/// The format version this build reads and writes.
pub const FORMAT_VERSION: u32 = 1;
/// Largest number of bins per step accepted before any allocation (a chunk of 64 steps of
/// this size is 512 MiB of f64).
pub const MAX_BINS_PER_STEP: usize = 1 << 20;
/// Smallest number of bins per step accepted.
pub const MIN_BINS_PER_STEP: usize = 16;
/// Largest RF grid of one reduction, in bins, accepted before any allocation (a 3.3 GHz span
/// at 100 Hz bins): steps spread further apart point to a corrupt frequency.
pub const MAX_RF_BINS: usize = 1 << 25;
/// Largest number of steps per file accepted before any allocation.
pub const MAX_STEPS_PER_FILE: usize = 10_000_000;
/// Most lags a `bin_correlation` attribute may list.
pub const MAX_CORRELATION_LAGS: usize = 256;

/// Facility-wide parameters stored as root attributes of a run file.
#[derive(Debug, Clone, PartialEq)]
pub struct RunHeader {
    /// Width of one spectral bin, Hz.
    pub bin_width_hz: f64,
    /// Magnet field in the cavity, tesla.
    pub magnet_field_t: f64,
    /// Cavity volume, cubic metres.
    pub cavity_volume_m3: f64,
    /// Mode form factor C (dimensionless, 0..1).
    pub form_factor: f64,
    /// Free-text label of the run.
    pub run_label: String,
    /// Correlation coefficient of the noise power of two bins d = 1, 2, ... apart within one
    /// spectrum (element d - 1), for Gaussian noise through the spectrum estimator: a
    /// windowed FFT correlates neighbouring bins (Hann without overlap: 4/9 and 1/36).
    /// Empty (the attribute absent): independent bins.
    pub bin_correlation: Vec<f64>,
}

/// Per-step receiver and cavity parameters (one row of the `steps` group).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct StepMeta {
    /// RF frequency of the centre of bin 0, Hz.
    pub start_freq_hz: f64,
    /// Cavity resonance frequency, Hz.
    pub cavity_freq_hz: f64,
    /// Loaded quality factor Q_L.
    pub loaded_q: f64,
    /// Antenna coupling beta.
    pub coupling_beta: f64,
    /// System noise temperature referred to the cavity output, kelvin.
    pub noise_temp_k: f64,
    /// Number of averaged spectra N (dimensionless).
    pub n_averages: u64,
    /// Start of the step, Unix seconds.
    pub timestamp_s: f64,
}

/// A run-file problem, naming the file and, where known, the step and field.
#[derive(Debug, thiserror::Error)]
pub enum RunFileError {
    /// The file is missing, empty, a directory, or not an HDF5 file.
    #[error("{path}: {message}")]
    File { path: PathBuf, message: String },
    /// The HDF5 library refused the file or an object in it.
    #[error("{path}: {what}: {source}")]
    Hdf5 {
        path: PathBuf,
        what: String,
        #[source]
        source: hdf5::Error,
    },
    /// A field is missing, of the wrong shape, or out of its valid range.
    #[error("{path}: field `{field}`{}: {message}", step.map(|s| format!(", step {s}")).unwrap_or_default())]
    Invalid { path: PathBuf, field: String, step: Option<usize>, message: String },
}

//! Digitised IQ captures (format "axsift-iq", version 1) and their averaging into run files.
//!
//! Layout (names are part of the interface; see README "IQ-capture format"): root attributes
//! `format` = "axsift-iq", `format_version` = 1, `sample_rate_hz` (complex sampling rate),
//! `magnet_field_t`, `cavity_volume_m3`, `form_factor`, `run_label`, and `iq_scale` (volts per
//! count) when the samples are integers; dataset `iq` `[n_steps, n_samples, 2]` (I and Q of
//! each tuning step, float32 volts or int16 counts); group `steps` with 1-D datasets
//! `lo_freq_hz`, `cavity_freq_hz`, `loaded_q`, `coupling_beta`, `noise_temp_k`, `timestamp_s`.
//!
//! [`IqReader`] validates a capture and reads it by hyperslab, [`IqWriter`] writes one (the
//! simulator's captures, tests), and [`average`] turns captures into a run file of averaged
//! power spectra ([`welch`] holds the estimator).

mod read;
mod steps;
pub mod welch;
mod write;

pub use read::{IqReader, Samples};
pub use write::IqWriter;

pub mod average;

/// Value of the root `format` attribute of a capture.
pub const FORMAT_NAME: &str = "axsift-iq";
/// The capture format version this build reads and writes.
pub const FORMAT_VERSION: u32 = 1;
/// Largest number of samples per step accepted before anything is read (2^40 complex
/// samples: 4 TiB of int16 per step; the averaging streams, so only the step count and the
/// metadata are held in memory).
pub const MAX_SAMPLES_PER_STEP: usize = 1 << 40;
/// Largest number of steps per capture accepted before any allocation.
pub const MAX_STEPS_PER_FILE: usize = crate::runfile::MAX_STEPS_PER_FILE;

/// Facility-wide parameters stored as root attributes of a capture.
#[derive(Debug, Clone, PartialEq)]
pub struct IqHeader {
    /// Complex sampling rate: samples per second of each of I and Q, Hz.
    pub sample_rate_hz: f64,
    /// Magnet field in the cavity, tesla.
    pub magnet_field_t: f64,
    /// Cavity volume, cubic metres.
    pub cavity_volume_m3: f64,
    /// Mode form factor C (dimensionless, 0..1).
    pub form_factor: f64,
    /// Free-text label of the run.
    pub run_label: String,
}

/// How the samples are stored.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum SampleKind {
    /// 32-bit floats, volts.
    F32,
    /// 16-bit integer counts; volts = counts * `iq_scale_v` (the root attribute `iq_scale`).
    I16 {
        /// Volts per count.
        iq_scale_v: f64,
    },
}

impl SampleKind {
    /// Bytes of one complex sample (I and Q) on disk and in memory.
    pub fn bytes_per_sample(self) -> usize {
        match self {
            SampleKind::F32 => 8,
            SampleKind::I16 { .. } => 4,
        }
    }
    /// Volts per stored unit (1 for floats).
    pub fn volts_per_unit(self) -> f64 {
        match self {
            SampleKind::F32 => 1.0,
            SampleKind::I16 { iq_scale_v } => iq_scale_v,
        }
    }
}

/// Per-step receiver and cavity parameters of a capture (one row of its `steps` group).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct IqStepMeta {
    /// RF frequency that maps to zero offset after down-conversion, Hz.
    pub lo_freq_hz: f64,
    /// Cavity resonance frequency, Hz.
    pub cavity_freq_hz: f64,
    /// Loaded quality factor Q_L.
    pub loaded_q: f64,
    /// Antenna coupling beta.
    pub coupling_beta: f64,
    /// System noise temperature referred to the cavity output, kelvin.
    pub noise_temp_k: f64,
    /// Start of the step, Unix seconds.
    pub timestamp_s: f64,
}

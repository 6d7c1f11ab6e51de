//! axsift: nightly reduction of axion haloscope data.
//!
//! Raw per-step power spectra go in (HDF5 run files, [`runfile`]); a pipeline file
//! ([`config`]) names the stages ([`stage`]) that turn them into a baseline-free, optimally
//! filtered grand spectrum over all scanned RF frequencies and a list of rescan candidates
//! ([`pipeline`]); [`output`] writes the results. [`sim`] writes realistic run files of an
//! invented facility for demos and tests. [`physics`] holds constants, signal power, halo
//! lineshapes and unit conversions; [`dsp`] the Savitzky-Golay smoother.

// Comparisons such as `!(x > threshold)` are meant to hold for NaN (no data), which the
// `partial_cmp` form clippy suggests would hide.
#![allow(clippy::neg_cmp_op_on_partial_ord)]

pub mod calib;
pub mod config;
pub mod dsp;
pub mod fonts;
pub mod inject;
pub mod iq;
pub mod limits;
pub mod output;
pub mod physics;
pub mod pipeline;
pub mod progress;
pub mod report;
pub mod runfile;
pub mod shard;
pub mod sim;
mod simd;
pub mod stage;
pub mod state;
pub mod stats;

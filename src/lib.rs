//! axsift: nightly reduction of axion haloscope data.
//!
//! Raw per-step power spectra go in; a baseline-free, optimally filtered grand
//! spectrum over all scanned RF frequencies and a list of rescan candidates come out.
//! This version provides the physics (constants, signal power, halo lineshapes, unit
//! conversions) and the HDF5 run-file format.

pub mod dsp;
pub mod physics;
pub mod runfile;

//! The analysis state: what all nights so far add up to, kept in a folder between mornings.
//!
//! Layout (schema version [`STATE_SCHEMA_VERSION`]):
//! - `state.json`: schema version, tool version, config hash, the RF grid (origin, bin width,
//!   length), every night added (its run files with SHA-256 and step counts), the tracked
//!   candidates with their class and evidence, and the name of the current sums file;
//! - `sums-<generation>.h5`: per RF bin the maximum-likelihood sums of all nights,
//!   `weight` = sum 1/sigma^2, `weighted_sum` = sum R/sigma^2 (reference-axion units), `coverage`.
//!
//! An update writes a new sums file, then a new `state.json` (each under a temporary name,
//! renamed into place); the rename of `state.json` is the commit. A run killed at any point
//! leaves the previous `state.json` and the sums file it names untouched.
//!
//! The common gain shape is formed per night (the receiver chain is re-tuned between nights),
//! so the steps of one night are combined with each other first, and nights are then added in
//! order. Reducing N nights in one call performs the same operations in the same order as N
//! nightly updates, so the two give bit-identical grand spectra.

mod accumulate;
mod rescan;
mod store;

pub use accumulate::{RESCAN_TARGET_SNR, ReducedNight, Update, add_nights, add_reduced_night, plan_hash, reduce_night};
pub use rescan::{Class, TrackedCandidate};
pub use store::{State, StateError};

/// Version of the state layout this build reads and writes.
pub const STATE_SCHEMA_VERSION: u32 = 1;

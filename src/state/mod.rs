//! The analysis state: what all nights so far add up to, kept in a folder between mornings.
//!
//! Layout (schema version [`STATE_SCHEMA_VERSION`]; a state of another version is refused with
//! a message naming `state.json` and the field):
//! - `state.json`: schema version, tool version, config hash, the RF grid (origin, bin width),
//!   every night added (its run files with SHA-256 and step counts, the steps used, and the
//!   lines of its IF profile: `if_lines` with `if_bin`, `if_offset_hz`, `if_profile_sigma`,
//!   `n_steps`), the tracked candidates with their class (`new`, `persists`, `cleared`,
//!   `interference`), evidence text and, for interference, `interference` (the IF lines
//!   behind it, the steps, the grand value without them), the `limit` range of the latest
//!   calibrated update (or null), and the generation of the current sums file;
//! - `sums-<generation>.h5`: per RF bin the maximum-likelihood sums of all nights,
//!   `weight` = sum 1/sigma^2, `weighted_sum` = sum R/sigma^2 (reference-axion units), `coverage`;
//!   the part of those sums that comes from IF-line samples, `line_weight`,
//!   `line_weighted_sum`, `line_steps`, with `line_night` and `line_if_bin` of the latest such
//!   sample (-1 = none); and per night a group `night-<index>` with its IF profile,
//!   `if_profile_sigma` (excess scatter per IF bin, normal sigma) and `if_steps`.
//!
//! Interference: see [`interference`] for the IF profile. Candidates are judged on the
//! spectrum with and without the IF-line samples; one that is above threshold only with them
//! is `interference`, with the IF offsets, their IF-profile significance and the number of
//! steps as evidence. It needs no rescan and does not block the limit: the spectrum without
//! those samples is below threshold there.
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
pub mod interference;
mod rescan;
mod status;
mod store;

pub use accumulate::{RESCAN_TARGET_SNR, ReducedNight, Update, add_nights, add_reduced_night, plan_hash, reduce_night};
pub use interference::{IF_LINE_SIGMA, IfLine, IfProfile, IfScan};
pub use rescan::{Class, InterferenceEvidence, LineSource, TrackedCandidate};
pub use status::{CandidateSummary, ClassCounts, NightSummary, StatusSummary};
pub use store::{LimitRange, State, StateError};

/// Version of the state layout this build reads and writes.
pub const STATE_SCHEMA_VERSION: u32 = 2;

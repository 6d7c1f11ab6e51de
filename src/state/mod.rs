//! The analysis state: what all nights so far add up to, kept in a folder between mornings.
//!
//! Layout (schema version [`STATE_SCHEMA_VERSION`]; a state of another version is refused with
//! a message naming `state.json` and the field):
//! - `state.json`: schema version, tool version, config hash, the RF grid (origin: the first
//!   night's lowest bin, bin width, the nights' shared `bin_correlation`, `block_bins`,
//!   `grid_bins` spanned so far), the stored `blocks` (index, the generation that wrote it,
//!   covered bins), every night added (its run
//!   files with SHA-256 and step counts, the steps used, and the lines of its IF profile:
//!   `if_lines` with `if_bin`, `if_offset_hz`, `if_profile_sigma`, `n_steps`), `candidates`
//!   (`by_class`: the tracked candidates per class over the campaign; `blocks`: the stored
//!   candidate blocks, index, generation and count), the `limit` range of the latest
//!   calibrated update (or null), and the generation (updates saved); it grows with the
//!   nights and the blocks, not with the candidates;
//! - `blocks/b<index>-g<generation>.h5`: the sums of grid bins `index * block_bins ..`
//!   `(index + 1) * block_bins` ([`block_file`]): per RF bin the maximum-likelihood sums of all
//!   nights, `weight` = sum 1/sigma^2, `weighted_sum` = sum R/sigma^2 (reference-axion units),
//!   `coverage`, and, for the bins that hold IF-line samples, the part of those sums that comes
//!   from them with the night, IF bin and IF-profile significance of the latest such sample;
//! - `candidates/c<index>-g<generation>.json`: the tracked candidates whose frequency lies in
//!   block `index` ([`candidate_file`], [`candidates`]), with their class (`new`, `persists`,
//!   `cleared`, `interference`), evidence text and, for interference, `interference` (the IF
//!   lines behind it, the steps, the grand value without them);
//! - `nights/night-<index>.h5`: each night's IF profile ([`profile_file`]), written once.
//!
//! An update costs in proportion to the night's RF span, not the campaign's: it reads and
//! rewrites only the blocks the night covers, recomputes the grand spectrum only on the tiles
//! that read those blocks ([`tiles`]), and reads and rewrites only the candidate blocks of that
//! span (and reads those within a line width of it); the rest of the grand spectrum and the
//! candidates there are unchanged because their data are. Listing every candidate (`status`,
//! the rescan plan) reads every candidate block.
//!
//! Interference: see [`interference`] for the IF profile. Candidates are judged on the
//! spectrum with and without the IF-line samples; one that is above threshold only with them
//! is `interference`, with the IF offsets, their IF-profile significance and the number of
//! steps as evidence. It needs no rescan and does not block the limit: the spectrum without
//! those samples is below threshold there.
//!
//! An update writes the blocks of the sums and of the candidates it changed under its new
//! generation and the new night's IF profile (each under a temporary name, renamed into
//! place; the blocks of the sums as soon as the night is through them when the state is
//! staged in its folder, [`State::stage_in`], so that memory is bounded whatever the night's
//! RF span), then a new `state.json`; the rename of `state.json` is the commit, after which the
//! files it no longer names are removed. A run killed at any point leaves the previous `state.json` and the files it names
//! untouched.
//!
//! The common gain shape is formed per night (the receiver chain is re-tuned between nights),
//! so the steps of one night are combined with each other first, and nights are then added in
//! order. Reducing N nights in one call performs the same operations in the same order as N
//! nightly updates, so the two give bit-identical grand spectra.

mod accumulate;
mod block_file;
mod candidate_file;
mod candidates;
mod export;
pub mod interference;
mod limit_tally;
mod night_sums;
mod profile_file;
mod rescan;
mod span;
mod status;
mod store;
mod sums;
mod tiles;
mod top_spill;

pub use accumulate::{RESCAN_TARGET_SNR, ReducedNight, Update, add_night, add_nights, add_reduced_night, collecting_span, plan_hash, reduce_night};
pub use candidates::{CandidateBlockRecord, Candidates};
pub use export::export_grand;
pub use interference::{IF_LINE_SIGMA, IfLine, IfProfile, IfScan, TopSamples};
pub use limit_tally::LimitTally;
pub use profile_file::IfProfileRecord;
pub use rescan::{Class, InterferenceEvidence, LineSource, TrackedCandidate};
pub use status::{CandidateSummary, ClassCounts, LISTED_CANDIDATES, NightSummary, StatusSummary, strongest};
pub use store::{BLOCK_BINS, BlockRecord, FileRecord, LimitRange, NightRecord, State, StateError};
pub use sums::Sums;

/// Version of the state layout this build reads and writes.
pub const STATE_SCHEMA_VERSION: u32 = 4;

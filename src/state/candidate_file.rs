//! The file of one block's tracked candidates: `candidates/c<index>-g<generation>.json`.
//!
//! A JSON object with `block` (the block index, i64) and `candidates`: the tracked candidates
//! whose frequency lies in the block's RF bins, in increasing frequency, each as in
//! [`TrackedCandidate`] (frequency and cavity frequency in Hz, rescan integration in s, null
//! when not finite).

use super::TrackedCandidate;
use super::store::{StateError, io};
use serde::{Deserialize, Serialize};
use std::path::Path;

#[derive(Deserialize)]
struct CandidateBlock {
    block: i64,
    candidates: Vec<TrackedCandidate>,
}

#[derive(Serialize)]
struct CandidateBlockRef<'a> {
    block: i64,
    candidates: &'a [TrackedCandidate],
}

/// Writes the candidates of block `block` to `path` (the caller renames it into place).
pub(super) fn write(path: &Path, block: i64, candidates: &[TrackedCandidate]) -> Result<(), StateError> {
    let json = serde_json::to_string_pretty(&CandidateBlockRef { block, candidates }).map_err(|e| io(path, e))?;
    std::fs::write(path, json).map_err(|e| io(path, e))
}

/// Reads the candidates of block `block` stored in `path`; `count` is how many `state.json`
/// says it holds.
pub(super) fn read(path: &Path, block: i64, count: usize) -> Result<Vec<TrackedCandidate>, StateError> {
    let text = std::fs::read_to_string(path).map_err(|e| io(path, e))?;
    let stored: CandidateBlock = serde_json::from_str(&text).map_err(|e| io(path, format!("not a candidate block: {e}")))?;
    if stored.block != block {
        return Err(io(path, format!("field `block` is {}; state.json names this file for block {block}", stored.block)));
    }
    if stored.candidates.len() != count {
        return Err(io(path, format!("field `candidates` holds {} candidates; state.json says {count}", stored.candidates.len())));
    }
    Ok(stored.candidates)
}

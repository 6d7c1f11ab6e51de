//! The tracked candidates of a state, stored with the blocks of the RF grid they lie in.
//!
//! A candidate belongs to the block holding the grid bin of its frequency (the bin whose
//! line starts there) and is kept in that block's candidate file,
//! `candidates/c<index>-g<generation>.json` ([`candidate_file`]), written under the
//! generation of the update that last changed it, like the blocks of the sums. `state.json`
//! names the files (`candidates.blocks`: index, generation, count) and keeps the counts per
//! class of the whole campaign (`candidates.by_class`). An update reads the candidate blocks
//! of the span it recomputes and the blocks within a line width of it (a candidate flagged at
//! the span's edge is matched against those), and writes only the blocks whose candidates
//! changed. A listing of the whole campaign ([`Candidates::all`]) reads every candidate file
//! once, when first asked for.

use super::candidate_file;
use super::status::ClassCounts;
use super::store::{State, StateError};
use super::{Class, TrackedCandidate};
use serde::{Deserialize, Serialize};
use std::borrow::Cow;
use std::collections::{BTreeMap, BTreeSet};
use std::ops::{Range, RangeInclusive};
use std::path::{Path, PathBuf};
use std::sync::OnceLock;

/// One stored block of candidates: `candidates/c<index>-g<generation>.json`.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct CandidateBlockRecord {
    /// Block index: its candidates lie in grid bins `index * block_bins ..` `(index + 1) * block_bins`.
    pub index: i64,
    /// Update (state generation) that last wrote it.
    pub generation: u64,
    /// Candidates it holds.
    pub count: usize,
}

/// File name of a candidate block.
pub(super) fn candidate_name(index: i64, generation: u64) -> String {
    format!("c{index}-g{generation}.json")
}

/// The tracked candidates of a state: counts per class and the stored blocks (in
/// `state.json`), the blocks read or changed since the state was loaded, and the listing of
/// the whole campaign, read when first needed.
#[derive(Debug, Clone, Default, Serialize, Deserialize)]
pub struct Candidates {
    /// Tracked candidates per class over the whole campaign.
    pub by_class: ClassCounts,
    /// The stored candidate blocks, by index.
    pub blocks: Vec<CandidateBlockRecord>,
    /// Folder the stored blocks are read from (None for a state not yet saved).
    #[serde(skip)]
    pub(super) source: Option<PathBuf>,
    /// Blocks read or changed since the state was loaded, by index.
    #[serde(skip)]
    loaded: BTreeMap<i64, Vec<TrackedCandidate>>,
    /// Blocks changed since the state was loaded or saved.
    #[serde(skip)]
    changed: BTreeSet<i64>,
    /// Every candidate, in increasing frequency, once asked for.
    #[serde(skip)]
    listing: OnceLock<Vec<TrackedCandidate>>,
}

impl PartialEq for Candidates {
    /// Equal when they hold the same candidates, in the same order, and the same counts.
    fn eq(&self, other: &Self) -> bool {
        self.by_class == other.by_class && matches!((self.all(), other.all()), (Ok(a), Ok(b)) if a == b)
    }
}

impl ClassCounts {
    fn add(&mut self, candidates: &[TrackedCandidate], sign: isize) {
        for c in candidates {
            let n = match c.class {
                Class::New => &mut self.new,
                Class::Persists => &mut self.persists,
                Class::Cleared => &mut self.cleared,
                Class::Interference => &mut self.interference,
            };
            *n = n.wrapping_add_signed(sign);
        }
    }

    /// Candidates of every class.
    pub fn total(&self) -> usize {
        self.new + self.persists + self.cleared + self.interference
    }
}

impl Candidates {
    /// Every tracked candidate of the campaign, in increasing frequency: the blocks changed
    /// in memory as they are now, the others as stored (each candidate file is read once).
    pub fn all(&self) -> Result<&[TrackedCandidate], StateError> {
        if let Some(listing) = self.listing.get() {
            return Ok(listing);
        }
        let indices: BTreeSet<i64> = self.blocks.iter().map(|b| b.index).chain(self.loaded.keys().copied()).collect();
        let mut listing = Vec::with_capacity(self.by_class.total());
        for index in indices {
            listing.extend_from_slice(&self.block(index)?);
        }
        Ok(self.listing.get_or_init(|| listing))
    }

    /// Number of tracked candidates (from the counts in `state.json`; reads no file).
    pub fn len(&self) -> usize {
        self.by_class.total()
    }

    /// Whether no candidate is tracked.
    pub fn is_empty(&self) -> bool {
        self.len() == 0
    }

    /// The candidates of block `index`: as changed or read since loading, as stored, or none.
    fn block(&self, index: i64) -> Result<Cow<'_, [TrackedCandidate]>, StateError> {
        if let Some(list) = self.loaded.get(&index) {
            return Ok(Cow::Borrowed(list));
        }
        match (&self.source, self.blocks.binary_search_by_key(&index, |b| b.index)) {
            (Some(dir), Ok(i)) => {
                let record = &self.blocks[i];
                candidate_file::read(&dir.join("candidates").join(candidate_name(index, record.generation)), index, record.count).map(Cow::Owned)
            }
            _ => Ok(Cow::Borrowed(&[])),
        }
    }

    /// The candidates of blocks `blocks`, in increasing frequency (reading the stored ones once).
    fn take(&mut self, blocks: &RangeInclusive<i64>) -> Result<Vec<TrackedCandidate>, StateError> {
        let (lo, hi) = (self.blocks.partition_point(|b| b.index < *blocks.start()), self.blocks.partition_point(|b| b.index <= *blocks.end()));
        let stored: BTreeSet<i64> = self.blocks[lo..hi].iter().map(|b| b.index).chain(self.loaded.range(blocks.clone()).map(|(&i, _)| i)).collect();
        let mut out = Vec::new();
        for index in stored {
            if !self.loaded.contains_key(&index) {
                let list = self.block(index)?.into_owned();
                self.loaded.insert(index, list);
            }
            out.extend_from_slice(&self.loaded[&index]);
        }
        Ok(out)
    }

    /// Replaces the candidates of blocks `taken` by `list` (in increasing frequency), each
    /// put in block `block_of(frequency_hz)`; a candidate outside `taken` joins its block's
    /// stored ones. Only blocks whose candidates differ are marked changed.
    fn put(&mut self, taken: &RangeInclusive<i64>, list: Vec<TrackedCandidate>, block_of: impl Fn(f64) -> i64) -> Result<(), StateError> {
        let mut by_block: BTreeMap<i64, Vec<TrackedCandidate>> = BTreeMap::new();
        for index in self.loaded.range(taken.clone()).map(|(&i, _)| i) {
            by_block.insert(index, Vec::new());
        }
        for c in list {
            by_block.entry(block_of(c.frequency_hz)).or_default().push(c);
        }
        for (index, mut new) in by_block {
            let old = self.block(index)?.into_owned();
            if !taken.contains(&index) {
                new.extend_from_slice(&old);
                new.sort_by(|a, b| a.frequency_hz.total_cmp(&b.frequency_hz));
            }
            if new != old {
                self.by_class.add(&old, -1);
                self.by_class.add(&new, 1);
                self.changed.insert(index);
                self.loaded.insert(index, new);
            }
        }
        self.listing = OnceLock::new();
        Ok(())
    }

    /// The blocks changed since loading or saving, with their candidates.
    pub(super) fn changed(&self) -> impl Iterator<Item = (i64, &[TrackedCandidate])> {
        self.changed.iter().map(|&i| (i, self.loaded.get(&i).map_or(&[][..], Vec::as_slice)))
    }

    /// Whether block `index` changed since loading or saving.
    pub(super) fn is_changed(&self, index: i64) -> bool {
        self.changed.contains(&index)
    }

    /// After a save to `dir` named the changed blocks in `state.json`.
    pub(super) fn saved(&mut self, dir: &Path) {
        self.changed.clear();
        self.source = Some(dir.to_path_buf());
    }

    /// Checks the fields of `state.json` against each other (`index` is its path).
    pub(super) fn check(&self, index: &Path) -> Result<(), StateError> {
        if self.blocks.windows(2).any(|w| w[0].index >= w[1].index) {
            return Err(super::store::io(index, "field `candidates.blocks` must list each block once, in increasing `index`"));
        }
        let stored: usize = self.blocks.iter().map(|b| b.count).sum();
        if stored != self.by_class.total() {
            return Err(super::store::io(
                index,
                format!("field `candidates.by_class` counts {} candidates, `candidates.blocks` {stored}", self.by_class.total()),
            ));
        }
        Ok(())
    }
}

impl State {
    /// The candidates of the blocks holding grid bins `bins` widened by `reach` bins on each
    /// side, and those blocks.
    pub(super) fn take_candidates(&mut self, bins: Range<i64>, reach: i64) -> Result<(RangeInclusive<i64>, Vec<TrackedCandidate>), StateError> {
        let blocks = self.block_of(bins.start - reach - 1)..=self.block_of(bins.end + reach);
        let list = self.candidates.take(&blocks)?;
        Ok((blocks, list))
    }

    /// Stores `list` as the candidates of `blocks` (taken with [`State::take_candidates`]).
    pub(super) fn put_candidates(&mut self, blocks: &RangeInclusive<i64>, list: Vec<TrackedCandidate>) -> Result<(), StateError> {
        let (origin_hz, bin_width_hz, n) = (self.rf_origin_hz, self.bin_width_hz, self.block_bins as i64);
        let block_of = |f: f64| (((f + bin_width_hz / 2.0 - origin_hz) / bin_width_hz).round() as i64).div_euclid(n);
        self.candidates.put(blocks, list, block_of)
    }

    /// The open candidates of the blocks within `reach` bins of grid bins `bins`, for the
    /// limit of an update (those blocks were read by the update; a state loaded afresh reads
    /// them, and errors naming a file that cannot be read).
    pub(super) fn open_candidates_near(&mut self, bins: Range<i64>, reach: i64) -> Result<Vec<TrackedCandidate>, StateError> {
        let (_, list) = self.take_candidates(bins, reach)?;
        Ok(list.into_iter().filter(|c| c.class.is_open()).collect())
    }
}

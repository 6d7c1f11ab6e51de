//! Loading and saving the state folder: `state.json`, the blocks of the sums and of the
//! candidates, the nights' IF profiles.

use super::candidate_file;
use super::candidates::{CandidateBlockRecord, Candidates, candidate_name};
use super::interference::IfLine;
use super::profile_file::{self, IfProfileRecord};
use super::sums::Sums;
use super::{STATE_SCHEMA_VERSION, block_file};
use serde::{Deserialize, Serialize};
use std::collections::{BTreeMap, BTreeSet};
use std::ops::Range;
use std::path::{Path, PathBuf};

/// A run file included in the state.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct FileRecord {
    /// Path as given.
    pub path: String,
    /// SHA-256 of its content.
    pub sha256: String,
    /// Steps read from it.
    pub n_steps: usize,
}

/// One night added to the state (its IF profile is kept in `nights/night-<index>.h5`, read
/// with [`State::if_profile`]).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct NightRecord {
    /// Position in the sequence of nights (0 = first).
    pub index: usize,
    /// Its files.
    pub files: Vec<FileRecord>,
    /// Steps that reached the combination.
    pub n_steps_used: usize,
    /// Lines found in the night's IF profile.
    pub if_lines: Vec<IfLine>,
}

impl NightRecord {
    /// Its files as (path as given, SHA-256), the form of [`crate::output::Provenance`].
    pub fn inputs(&self) -> Vec<(String, String)> {
        self.files.iter().map(|f| (f.path.clone(), f.sha256.clone())).collect()
    }
}

/// RF bins per block of a new state's sums: 6.5536 MHz at 100 Hz bins, 1.3 MB on disk.
pub const BLOCK_BINS: usize = 65536;

/// One stored block of the sums: `blocks/b<index>-g<generation>.h5`.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct BlockRecord {
    /// Block index: the block holds grid bins `index * block_bins ..` `(index + 1) * block_bins`.
    pub index: i64,
    /// Update (state generation) that last wrote it.
    pub generation: u64,
    /// Bins of the block with at least one contributing step.
    pub covered_bins: usize,
}

/// The persistent state: the content of `state.json`, with the blocks of the sums read from
/// the folder as they are needed and the blocks an update changed held until it is saved.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct State {
    /// Layout version.
    pub schema_version: u32,
    /// axsift version that wrote it.
    pub tool_version: String,
    /// SHA-256 over every stage's kind and resolved options.
    pub config_hash: String,
    /// RF bin width, Hz.
    pub bin_width_hz: f64,
    /// Correlation of the noise power of bins 1, 2, ... apart that every night shares (the run
    /// files' `bin_correlation`; empty: independent bins).
    #[serde(default)]
    pub bin_correlation: Vec<f64>,
    /// Bin-centre frequency of grid bin 0 (the first night's lowest bin), Hz.
    pub rf_origin_hz: f64,
    /// RF bins per block.
    pub block_bins: usize,
    /// Grid bins spanned by the nights so far, [first, end) (null when empty).
    pub grid_bins: Option<(i64, i64)>,
    /// The stored blocks, by index.
    pub blocks: Vec<BlockRecord>,
    /// Nights in order.
    pub nights: Vec<NightRecord>,
    /// Candidates ever flagged, with their class: counts per class and the candidate
    /// blocks in `state.json`, the candidates themselves in `candidates/` (read as needed).
    pub candidates: Candidates,
    /// Number of updates saved (each writes the blocks it changed under this generation).
    pub generation: u64,
    /// The limit range of the latest update made with a calibration, if any.
    pub limit: Option<LimitRange>,
    /// Folder the stored blocks are read from (None for a state not yet saved).
    #[serde(skip)]
    source: Option<PathBuf>,
    /// Blocks changed since the state was loaded or saved, by index, held in memory.
    #[serde(skip)]
    changed: BTreeMap<i64, Sums>,
    /// Folder that changed blocks are written to as soon as an update finishes them
    /// ([`State::stage_in`]); None: they are held in memory until saved.
    #[serde(skip)]
    staging: Option<PathBuf>,
    /// Blocks changed since then and written to the staging folder under the next
    /// generation's names, by index, with their covered bins.
    #[serde(skip)]
    staged: BTreeMap<i64, usize>,
    /// IF profiles of the nights added since then, by night.
    #[serde(skip)]
    new_profiles: BTreeMap<usize, IfProfileRecord>,
}

/// The range of the per-bin limit on |g_gamma| relative to KSVZ over the bins that are
/// covered and not held by an open candidate, from the latest calibrated update.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct LimitRange {
    /// Night of the update that computed it.
    pub night: usize,
    /// Confidence level.
    pub confidence: f64,
    /// Bins with a limit.
    pub excluded_bins: usize,
    /// Lowest (best) limit, |g_gamma| / |g_gamma KSVZ|.
    pub min_rel_ksvz: f64,
    /// Highest limit, |g_gamma| / |g_gamma KSVZ|.
    pub max_rel_ksvz: f64,
    /// RF span of the excluded bins (axion frequency, line start), Hz.
    pub excluded_span_hz: (f64, f64),
}

/// State-folder problems.
#[derive(Debug, thiserror::Error)]
pub enum StateError {
    /// Reading or writing failed.
    #[error("{path}: {message}")]
    Io {
        /// The file concerned.
        path: PathBuf,
        /// What went wrong.
        message: String,
    },
    /// The state cannot take this update.
    #[error("{0}")]
    Refused(String),
}

pub(super) fn io(path: &Path, e: impl std::fmt::Display) -> StateError {
    StateError::Io { path: path.to_path_buf(), message: e.to_string() }
}

fn block_name(index: i64, generation: u64) -> String {
    format!("b{index}-g{generation}.h5")
}

fn night_name(index: usize) -> String {
    format!("night-{index}.h5")
}

/// Writes a file under a temporary name in its folder, then renames it into place.
fn write_renamed(path: &Path, write: impl FnOnce(&Path) -> Result<(), StateError>) -> Result<(), StateError> {
    let name = path.file_name().map(|n| n.to_string_lossy().into_owned()).unwrap_or_default();
    let tmp = path.with_file_name(format!(".tmp.{name}"));
    write(&tmp)?;
    std::fs::rename(&tmp, path).map_err(|e| io(path, e))
}

impl State {
    /// An empty state for a config, with blocks of [`BLOCK_BINS`].
    pub fn new(config_hash: String) -> Self {
        Self::with_block_bins(config_hash, BLOCK_BINS)
    }

    /// An empty state for a config whose sums are stored in blocks of `block_bins` RF bins
    /// (at least 1). The block size fixes which bins an update recomputes together, and so
    /// enters the grand spectrum's rounding: states with different block sizes agree to
    /// rounding, not bit for bit.
    pub fn with_block_bins(config_hash: String, block_bins: usize) -> Self {
        Self {
            schema_version: STATE_SCHEMA_VERSION,
            tool_version: env!("CARGO_PKG_VERSION").into(),
            config_hash,
            bin_width_hz: 0.0,
            bin_correlation: Vec::new(),
            rf_origin_hz: 0.0,
            block_bins: block_bins.max(1),
            grid_bins: None,
            blocks: Vec::new(),
            nights: Vec::new(),
            candidates: Candidates::default(),
            generation: 0,
            limit: None,
            source: None,
            changed: BTreeMap::new(),
            staging: None,
            staged: BTreeMap::new(),
            new_profiles: BTreeMap::new(),
        }
    }

    /// Takes the update lock of the state folder `dir` (created if new): an exclusive lock
    /// on `dir/.lock`, held until the returned file is dropped, so that two updates of one
    /// state cannot interleave their files. Refused, naming the file, while another process
    /// holds it.
    pub fn lock_folder(dir: &Path) -> Result<std::fs::File, StateError> {
        std::fs::create_dir_all(dir).map_err(|e| io(dir, e))?;
        let path = dir.join(".lock");
        let file = std::fs::OpenOptions::new().create(true).truncate(false).write(true).open(&path).map_err(|e| io(&path, e))?;
        match file.try_lock() {
            Ok(()) => Ok(file),
            Err(std::fs::TryLockError::WouldBlock) => {
                Err(StateError::Refused(format!("{}: another axsift is updating this state; wait for it to finish", path.display())))
            }
            Err(std::fs::TryLockError::Error(e)) => Err(io(&path, e)),
        }
    }

    /// Writes the blocks of the sums an update finishes into `dir` (the folder the state is
    /// to be saved to) as soon as they are finished, under the next generation's names,
    /// instead of holding them in memory until [`State::save`]: memory then stays bounded
    /// whatever the RF span of a night. Until the save commits, `state.json` names none of
    /// them, so a run killed before it leaves the previous state as it was (the next save
    /// removes the files).
    pub fn stage_in(&mut self, dir: &Path) -> Result<(), StateError> {
        let blocks = dir.join("blocks");
        std::fs::create_dir_all(&blocks).map_err(|e| io(&blocks, e))?;
        self.staging = Some(dir.to_path_buf());
        Ok(())
    }

    /// Loads the index of the state in `dir` (blocks are read when needed), or `None` if the
    /// folder holds none yet.
    pub fn load(dir: &Path) -> Result<Option<Self>, StateError> {
        let index = dir.join("state.json");
        if !index.exists() {
            return Ok(None);
        }
        let text = std::fs::read_to_string(&index).map_err(|e| io(&index, e))?;
        let version: serde_json::Value = serde_json::from_str(&text).map_err(|e| io(&index, format!("not a state index: {e}")))?;
        match version.get("schema_version").and_then(|v| v.as_u64()) {
            Some(v) if v == u64::from(STATE_SCHEMA_VERSION) => {}
            Some(v) => {
                return Err(io(
                    &index,
                    format!(
                        "field `schema_version` is {v}; this build reads version {STATE_SCHEMA_VERSION} only ({})",
                        "version 3 and earlier kept the candidates in state.json; start a new state folder and add the nights again"
                    ),
                ));
            }
            None => return Err(io(&index, "field `schema_version` is missing")),
        }
        let mut state: State = serde_json::from_str(&text).map_err(|e| io(&index, format!("not a state index: {e}")))?;
        if state.block_bins == 0 {
            return Err(io(&index, "field `block_bins` must be at least 1"));
        }
        if state.blocks.windows(2).any(|w| w[0].index >= w[1].index) {
            return Err(io(&index, "field `blocks` must list each block once, in increasing `index`"));
        }
        state.candidates.check(&index)?;
        state.source = Some(dir.to_path_buf());
        state.candidates.source = Some(dir.to_path_buf());
        Ok(Some(state))
    }

    /// Grid bins `block * block_bins ..` `(block + 1) * block_bins`.
    pub fn block_range(&self, block: i64) -> Range<i64> {
        let n = self.block_bins as i64;
        block * n..(block + 1) * n
    }

    /// The block holding grid bin `bin`.
    pub fn block_of(&self, bin: i64) -> i64 {
        bin.div_euclid(self.block_bins as i64)
    }

    /// Bin-centre RF frequency of grid bin `bin`, Hz.
    pub fn freq_hz(&self, bin: i64) -> f64 {
        self.rf_origin_hz + bin as f64 * self.bin_width_hz
    }

    /// Lowest and highest bin-centre RF frequency of the grid, Hz (None when empty).
    pub fn rf_span_hz(&self) -> Option<(f64, f64)> {
        self.grid_bins.map(|(a, b)| (self.freq_hz(a), self.freq_hz(b - 1)))
    }

    /// Bins with at least one contributing step, over the whole grid.
    pub fn covered_bins(&self) -> usize {
        let stored: usize = self.blocks.iter().filter(|b| !self.is_changed(b.index)).map(|b| b.covered_bins).sum();
        stored + self.changed.values().map(Sums::covered_bins).sum::<usize>() + self.staged.values().sum::<usize>()
    }

    /// Whether block `index` was changed since the state was loaded or saved.
    fn is_changed(&self, index: i64) -> bool {
        self.changed.contains_key(&index) || self.staged.contains_key(&index)
    }

    /// One block of the sums: as changed by an update not yet saved, as stored, or empty.
    pub fn block(&self, index: i64) -> Result<Sums, StateError> {
        let range = self.block_range(index);
        if let Some(sums) = self.changed.get(&index) {
            return Ok(sums.clone());
        }
        if let (Some(dir), true) = (&self.staging, self.staged.contains_key(&index)) {
            return block_file::read(&dir.join("blocks").join(block_name(index, self.generation + 1)), range.start, self.block_bins);
        }
        match (&self.source, self.blocks.binary_search_by_key(&index, |b| b.index)) {
            (Some(dir), Ok(i)) => block_file::read(&dir.join("blocks").join(block_name(index, self.blocks[i].generation)), range.start, self.block_bins),
            _ => Ok(Sums::empty(range.start, self.block_bins)),
        }
    }

    /// The sums over grid bins `bins`, read block by block.
    pub fn sums(&self, bins: Range<i64>) -> Result<Sums, StateError> {
        let mut sums = Sums::empty(bins.start, (bins.end - bins.start).max(0) as usize);
        if sums.is_empty() {
            return Ok(sums);
        }
        for index in self.block_of(bins.start)..=self.block_of(bins.end - 1) {
            sums.copy_overlap(&self.block(index)?);
        }
        Ok(sums)
    }

    /// Replaces block `index` (`sums` holds exactly its bins): written to the staging folder
    /// if there is one ([`State::stage_in`]), held in memory until saved otherwise.
    pub(super) fn put_block(&mut self, index: i64, sums: Sums) -> Result<(), StateError> {
        match &self.staging {
            Some(dir) => {
                let path = dir.join("blocks").join(block_name(index, self.generation + 1));
                write_renamed(&path, |tmp| block_file::write(tmp, &sums))?;
                self.changed.remove(&index);
                self.staged.insert(index, sums.covered_bins());
            }
            None => {
                self.changed.insert(index, sums);
            }
        }
        Ok(())
    }

    /// Records the IF profile of a night being added.
    pub(super) fn put_profile(&mut self, night: usize, profile: IfProfileRecord) {
        self.new_profiles.insert(night, profile);
    }

    /// A night's IF profile.
    pub fn if_profile(&self, night: usize) -> Result<IfProfileRecord, StateError> {
        if let Some(p) = self.new_profiles.get(&night) {
            return Ok(p.clone());
        }
        match &self.source {
            Some(dir) if night < self.nights.len() => profile_file::read(&dir.join("nights").join(night_name(night))),
            _ => Err(StateError::Refused(format!("the state holds no night {night}"))),
        }
    }

    /// Saves as the next generation: the changed blocks of the sums and of the candidates and
    /// the new nights' IF profiles under new names, then `state.json` (the commit, a rename),
    /// then removes the files the new index no longer names. A run killed at any point leaves either the previous
    /// `state.json` with every file it names, or the new one with every file it names.
    pub fn save(&mut self, dir: &Path) -> Result<(), StateError> {
        let (blocks_dir, nights_dir, cands_dir) = (dir.join("blocks"), dir.join("nights"), dir.join("candidates"));
        for d in [&blocks_dir, &nights_dir, &cands_dir] {
            std::fs::create_dir_all(d).map_err(|e| io(d, e))?;
        }
        let generation = self.generation + 1;
        let same_folder = |a: &Path| a.canonicalize().ok() == dir.canonicalize().ok();
        // A state saved to another folder takes its unchanged blocks and profiles along.
        if let Some(source) = self.source.clone().filter(|s| !same_folder(s)) {
            for b in self.blocks.iter().filter(|b| !self.is_changed(b.index)) {
                let name = block_name(b.index, b.generation);
                let from = source.join("blocks").join(&name);
                write_renamed(&blocks_dir.join(&name), |tmp| std::fs::copy(&from, tmp).map(|_| ()).map_err(|e| io(&from, e)))?;
            }
            for n in (0..self.nights.len()).filter(|n| !self.new_profiles.contains_key(n)) {
                let from = source.join("nights").join(night_name(n));
                write_renamed(&nights_dir.join(night_name(n)), |tmp| std::fs::copy(&from, tmp).map(|_| ()).map_err(|e| io(&from, e)))?;
            }
            for b in self.candidates.blocks.iter().filter(|b| !self.candidates.is_changed(b.index)) {
                let name = candidate_name(b.index, b.generation);
                let from = source.join("candidates").join(&name);
                write_renamed(&cands_dir.join(&name), |tmp| std::fs::copy(&from, tmp).map(|_| ()).map_err(|e| io(&from, e)))?;
            }
        }
        let mut records: BTreeMap<i64, BlockRecord> = self.blocks.iter().map(|b| (b.index, b.clone())).collect();
        for (&index, sums) in &self.changed {
            write_renamed(&blocks_dir.join(block_name(index, generation)), |tmp| block_file::write(tmp, sums))?;
            records.insert(index, BlockRecord { index, generation, covered_bins: sums.covered_bins() });
        }
        for (&index, &covered_bins) in &self.staged {
            // Staged in another folder than this one: copied here.
            if let Some(staging) = self.staging.clone().filter(|s| !same_folder(s)) {
                let name = block_name(index, generation);
                let from = staging.join("blocks").join(&name);
                write_renamed(&blocks_dir.join(&name), |tmp| std::fs::copy(&from, tmp).map(|_| ()).map_err(|e| io(&from, e)))?;
            }
            records.insert(index, BlockRecord { index, generation, covered_bins });
        }
        for (&night, profile) in &self.new_profiles {
            write_renamed(&nights_dir.join(night_name(night)), |tmp| profile_file::write(tmp, profile))?;
        }
        let mut cand_records: BTreeMap<i64, CandidateBlockRecord> = self.candidates.blocks.iter().map(|b| (b.index, b.clone())).collect();
        for (index, list) in self.candidates.changed() {
            write_renamed(&cands_dir.join(candidate_name(index, generation)), |tmp| candidate_file::write(tmp, index, list))?;
            cand_records.insert(index, CandidateBlockRecord { index, generation, count: list.len() });
        }
        let previous = (
            std::mem::replace(&mut self.blocks, records.into_values().collect()),
            std::mem::replace(&mut self.candidates.blocks, cand_records.into_values().collect()),
            self.generation,
        );
        self.generation = generation;
        let index = dir.join("state.json");
        let committed = serde_json::to_string_pretty(self)
            .map_err(|e| io(&index, e))
            .and_then(|json| write_renamed(&index, |tmp| std::fs::write(tmp, json).map_err(|e| io(tmp, e))));
        if let Err(e) = committed {
            (self.blocks, self.candidates.blocks, self.generation) = previous;
            return Err(e);
        }
        self.changed.clear();
        self.staged.clear();
        self.new_profiles.clear();
        self.source = Some(dir.to_path_buf());
        self.candidates.saved(dir);
        self.remove_unnamed(&blocks_dir, &nights_dir, &cands_dir);
        Ok(())
    }

    /// Removes the files of the folder that `state.json` does not name: blocks of the sums
    /// and of the candidates replaced by this update, and what a killed update left behind.
    /// Failures are harmless (the next save tries again).
    fn remove_unnamed(&self, blocks_dir: &Path, nights_dir: &Path, cands_dir: &Path) {
        let named: BTreeSet<String> = self.blocks.iter().map(|b| block_name(b.index, b.generation)).collect();
        let nights: BTreeSet<String> = (0..self.nights.len()).map(night_name).collect();
        let cands: BTreeSet<String> = self.candidates.blocks.iter().map(|b| candidate_name(b.index, b.generation)).collect();
        for (folder, keep) in [(blocks_dir, &named), (nights_dir, &nights), (cands_dir, &cands)] {
            let Ok(entries) = std::fs::read_dir(folder) else { continue };
            for entry in entries.flatten() {
                if !keep.contains(&entry.file_name().to_string_lossy().into_owned()) {
                    let _ = std::fs::remove_file(entry.path());
                }
            }
        }
    }

    /// The night and file that already hold a file with this content hash, if any.
    pub fn holder_of(&self, sha256: &str) -> Option<(usize, &FileRecord)> {
        self.nights.iter().find_map(|n| n.files.iter().find(|f| f.sha256 == sha256).map(|f| (n.index, f)))
    }
}

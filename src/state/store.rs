//! Loading and saving the state folder.

use super::{STATE_SCHEMA_VERSION, TrackedCandidate};
use hdf5::types::VarLenUnicode;
use serde::{Deserialize, Serialize};
use std::path::{Path, PathBuf};
use std::str::FromStr;

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

/// One night added to the state.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct NightRecord {
    /// Position in the sequence of nights (0 = first).
    pub index: usize,
    /// Its files.
    pub files: Vec<FileRecord>,
    /// Steps that reached the combination.
    pub n_steps_used: usize,
}

/// The persistent state (the content of `state.json` plus the sums).
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
    /// Bin-centre frequency of RF bin 0, Hz.
    pub rf_origin_hz: f64,
    /// Nights in order.
    pub nights: Vec<NightRecord>,
    /// Candidates ever flagged, with their class.
    pub candidates: Vec<TrackedCandidate>,
    /// Generation of the sums file (`sums-<generation>.h5`).
    pub generation: u64,
    /// Sum of 1/sigma^2 per RF bin.
    #[serde(skip)]
    pub weight: Vec<f64>,
    /// Sum of R/sigma^2 per RF bin.
    #[serde(skip)]
    pub weighted_sum: Vec<f64>,
    /// Steps contributing per RF bin.
    #[serde(skip)]
    pub coverage: Vec<u32>,
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

fn io(path: &Path, e: impl std::fmt::Display) -> StateError {
    StateError::Io { path: path.to_path_buf(), message: e.to_string() }
}

impl State {
    /// An empty state for a config.
    pub fn new(config_hash: String) -> Self {
        Self {
            schema_version: STATE_SCHEMA_VERSION,
            tool_version: env!("CARGO_PKG_VERSION").into(),
            config_hash,
            bin_width_hz: 0.0,
            rf_origin_hz: 0.0,
            nights: Vec::new(),
            candidates: Vec::new(),
            generation: 0,
            weight: Vec::new(),
            weighted_sum: Vec::new(),
            coverage: Vec::new(),
        }
    }

    /// Loads the state in `dir`, or `None` if the folder holds none yet.
    pub fn load(dir: &Path) -> Result<Option<Self>, StateError> {
        let index = dir.join("state.json");
        if !index.exists() {
            return Ok(None);
        }
        let text = std::fs::read_to_string(&index).map_err(|e| io(&index, e))?;
        let version: serde_json::Value = serde_json::from_str(&text).map_err(|e| io(&index, format!("not a state index: {e}")))?;
        match version.get("schema_version").and_then(|v| v.as_u64()) {
            Some(v) if v == u64::from(STATE_SCHEMA_VERSION) => {}
            Some(v) => return Err(io(&index, format!("field `schema_version` is {v}; this build reads version {STATE_SCHEMA_VERSION}"))),
            None => return Err(io(&index, "field `schema_version` is missing")),
        }
        let mut state: State = serde_json::from_str(&text).map_err(|e| io(&index, format!("not a state index: {e}")))?;
        let sums = dir.join(state.sums_name());
        let file = hdf5::File::open(&sums).map_err(|e| io(&sums, e))?;
        let read = |name: &str| file.dataset(name).and_then(|d| d.read_raw::<f64>()).map_err(|e| io(&sums, format!("dataset `{name}`: {e}")));
        state.weight = read("weight")?;
        state.weighted_sum = read("weighted_sum")?;
        state.coverage = file.dataset("coverage").and_then(|d| d.read_raw::<u32>()).map_err(|e| io(&sums, format!("dataset `coverage`: {e}")))?;
        if state.weighted_sum.len() != state.weight.len() || state.coverage.len() != state.weight.len() {
            return Err(io(&sums, "datasets `weight`, `weighted_sum` and `coverage` differ in length"));
        }
        Ok(Some(state))
    }

    fn sums_name(&self) -> String {
        format!("sums-{}.h5", self.generation)
    }

    /// Saves as the next generation: sums first, then the index (the commit), then removes
    /// the previous sums file.
    pub fn save(&mut self, dir: &Path) -> Result<(), StateError> {
        std::fs::create_dir_all(dir).map_err(|e| io(dir, e))?;
        let previous = dir.join(self.sums_name());
        self.generation += 1;
        let sums = dir.join(self.sums_name());
        let tmp = dir.join(format!(".tmp.{}", self.sums_name()));
        {
            let file = hdf5::File::create(&tmp).map_err(|e| io(&tmp, e))?;
            let text = |s: &str| VarLenUnicode::from_str(s).unwrap_or_default();
            let write = |name: &str, units: &str, description: &str, f: &dyn Fn(&str) -> hdf5::Result<hdf5::Dataset>| -> hdf5::Result<()> {
                let ds = f(name)?;
                ds.new_attr::<VarLenUnicode>().create("units")?.write_scalar(&text(units))?;
                ds.new_attr::<VarLenUnicode>().create("description")?.write_scalar(&text(description))
            };
            write("weight", "reference-axion power^-2", "sum over steps of 1/sigma^2", &|n| file.new_dataset_builder().with_data(&self.weight).create(n)).map_err(|e| io(&tmp, e))?;
            write("weighted_sum", "reference-axion power^-1", "sum over steps of R/sigma^2", &|n| file.new_dataset_builder().with_data(&self.weighted_sum).create(n)).map_err(|e| io(&tmp, e))?;
            write("coverage", "steps", "steps contributing to the bin", &|n| file.new_dataset_builder().with_data(&self.coverage).create(n)).map_err(|e| io(&tmp, e))?;
            file.close().map_err(|e| io(&tmp, e))?;
        }
        std::fs::rename(&tmp, &sums).map_err(|e| io(&sums, e))?;
        let index = dir.join("state.json");
        let tmp_index = dir.join(".tmp.state.json");
        let json = serde_json::to_string_pretty(self).map_err(|e| io(&index, e))?;
        std::fs::write(&tmp_index, json).map_err(|e| io(&tmp_index, e))?;
        std::fs::rename(&tmp_index, &index).map_err(|e| io(&index, e))?;
        if previous != sums {
            let _ = std::fs::remove_file(previous);
        }
        Ok(())
    }

    /// The night and file that already hold a file with this content hash, if any.
    pub fn holder_of(&self, sha256: &str) -> Option<(usize, &FileRecord)> {
        self.nights.iter().find_map(|n| n.files.iter().find(|f| f.sha256 == sha256).map(|f| (n.index, f)))
    }
}

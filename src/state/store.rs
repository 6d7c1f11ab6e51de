//! Loading and saving the state folder.

use super::interference::IfLine;
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
    /// Lines found in the night's IF profile.
    pub if_lines: Vec<IfLine>,
    /// The night's IF profile: excess scatter per IF bin, normal sigma (NaN = too few steps).
    #[serde(skip)]
    pub if_profile_sigma: Vec<f64>,
    /// Steps with a valid sample per IF bin.
    #[serde(skip)]
    pub if_steps: Vec<u32>,
}

impl NightRecord {
    /// Its files as (path as given, SHA-256), the form of [`crate::output::Provenance`].
    pub fn inputs(&self) -> Vec<(String, String)> {
        self.files.iter().map(|f| (f.path.clone(), f.sha256.clone())).collect()
    }
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
    /// The limit range of the latest update made with a calibration, if any.
    pub limit: Option<LimitRange>,
    /// Sum of 1/sigma^2 per RF bin.
    #[serde(skip)]
    pub weight: Vec<f64>,
    /// Sum of R/sigma^2 per RF bin.
    #[serde(skip)]
    pub weighted_sum: Vec<f64>,
    /// Steps contributing per RF bin.
    #[serde(skip)]
    pub coverage: Vec<u32>,
    /// Per RF bin: sum of 1/sigma^2 of the samples set aside as IF-line samples (they are
    /// included in `weight`).
    #[serde(skip)]
    pub line_weight: Vec<f64>,
    /// Per RF bin: sum of R/sigma^2 of those samples (included in `weighted_sum`).
    #[serde(skip)]
    pub line_weighted_sum: Vec<f64>,
    /// Per RF bin: number of those samples.
    #[serde(skip)]
    pub line_steps: Vec<u32>,
    /// Per RF bin: night of the latest such sample (-1 = none).
    #[serde(skip)]
    pub line_night: Vec<i32>,
    /// Per RF bin: IF bin of the latest such sample (-1 = none).
    #[serde(skip)]
    pub line_if_bin: Vec<i32>,
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
            limit: None,
            weight: Vec::new(),
            weighted_sum: Vec::new(),
            coverage: Vec::new(),
            line_weight: Vec::new(),
            line_weighted_sum: Vec::new(),
            line_steps: Vec::new(),
            line_night: Vec::new(),
            line_if_bin: Vec::new(),
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
        let read_u32 = |name: &str| file.dataset(name).and_then(|d| d.read_raw::<u32>()).map_err(|e| io(&sums, format!("dataset `{name}`: {e}")));
        let read_i32 = |name: &str| file.dataset(name).and_then(|d| d.read_raw::<i32>()).map_err(|e| io(&sums, format!("dataset `{name}`: {e}")));
        state.weight = read("weight")?;
        state.weighted_sum = read("weighted_sum")?;
        state.coverage = read_u32("coverage")?;
        state.line_weight = read("line_weight")?;
        state.line_weighted_sum = read("line_weighted_sum")?;
        state.line_steps = read_u32("line_steps")?;
        state.line_night = read_i32("line_night")?;
        state.line_if_bin = read_i32("line_if_bin")?;
        let n = state.weight.len();
        let lengths = [
            state.weighted_sum.len(),
            state.coverage.len(),
            state.line_weight.len(),
            state.line_weighted_sum.len(),
            state.line_steps.len(),
            state.line_night.len(),
            state.line_if_bin.len(),
        ];
        if lengths.iter().any(|&l| l != n) {
            return Err(io(&sums, format!("the RF datasets differ in length ({n} in `weight`, {lengths:?} in the others)")));
        }
        for night in &mut state.nights {
            let i = night.index;
            night.if_profile_sigma = read(&format!("night-{i}/if_profile_sigma"))?;
            night.if_steps = read_u32(&format!("night-{i}/if_steps"))?;
            if night.if_steps.len() != night.if_profile_sigma.len() {
                return Err(io(&sums, format!("datasets `night-{i}/if_profile_sigma` and `night-{i}/if_steps` differ in length")));
            }
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
            write("weight", "reference-axion power^-2", "sum over steps of 1/sigma^2", &|n| file.new_dataset_builder().with_data(&self.weight).create(n))
                .map_err(|e| io(&tmp, e))?;
            write("weighted_sum", "reference-axion power^-1", "sum over steps of R/sigma^2", &|n| {
                file.new_dataset_builder().with_data(&self.weighted_sum).create(n)
            })
            .map_err(|e| io(&tmp, e))?;
            write("coverage", "steps", "steps contributing to the bin", &|n| file.new_dataset_builder().with_data(&self.coverage).create(n))
                .map_err(|e| io(&tmp, e))?;
            write("line_weight", "reference-axion power^-2", "sum of 1/sigma^2 of the IF-line samples (included in weight)", &|n| {
                file.new_dataset_builder().with_data(&self.line_weight).create(n)
            })
            .map_err(|e| io(&tmp, e))?;
            write("line_weighted_sum", "reference-axion power^-1", "sum of R/sigma^2 of the IF-line samples (included in weighted_sum)", &|n| {
                file.new_dataset_builder().with_data(&self.line_weighted_sum).create(n)
            })
            .map_err(|e| io(&tmp, e))?;
            write("line_steps", "steps", "IF-line samples in the bin", &|n| file.new_dataset_builder().with_data(&self.line_steps).create(n))
                .map_err(|e| io(&tmp, e))?;
            write("line_night", "night index", "night of the latest IF-line sample (-1 = none)", &|n| {
                file.new_dataset_builder().with_data(&self.line_night).create(n)
            })
            .map_err(|e| io(&tmp, e))?;
            write("line_if_bin", "IF bin", "IF bin of the latest IF-line sample (-1 = none)", &|n| {
                file.new_dataset_builder().with_data(&self.line_if_bin).create(n)
            })
            .map_err(|e| io(&tmp, e))?;
            for night in &self.nights {
                let group = file.create_group(&format!("night-{}", night.index)).map_err(|e| io(&tmp, e))?;
                write("if_profile_sigma", "normal sigma", "excess scatter of the night's steps per IF bin (NaN = fewer than 3 steps)", &|n| {
                    group.new_dataset_builder().with_data(&night.if_profile_sigma).create(n)
                })
                .map_err(|e| io(&tmp, e))?;
                write("if_steps", "steps", "steps with a valid sample per IF bin", &|n| group.new_dataset_builder().with_data(&night.if_steps).create(n))
                    .map_err(|e| io(&tmp, e))?;
            }
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

//! Planning: dividing a reprocessing (by nights) or a calibration campaign (by realisation
//! ranges) into shards, with the resources each shard needs.

use super::ShardError;
use crate::calib::{CampaignSpec, campaign_size};
use crate::pipeline::open_night;
use crate::sim::Scenario;
use serde::{Deserialize, Serialize};
use sha2::{Digest, Sha256};
use std::path::{Path, PathBuf};

/// Version of the plan file layout.
pub const PLAN_VERSION: u32 = 1;
/// Name of the plan file inside the work folder.
pub const PLAN_FILE: &str = "plan.json";
/// Resident memory of one reduction per 32768 bins of step width, MB (model fitted to the
/// measured ~100 MB of a 3000-step x 32768-bin night together with [`RF_BIN_BYTES`]).
pub const BASE_MB_PER_32K_BINS: f64 = 40.0;
/// Resident bytes per bin of the night's RF grid during the spectrum stages.
pub const RF_BIN_BYTES: f64 = 100.0;
/// Bytes per RF bin a shard keeps of each reduced night until its file is written (combined
/// value, sigma and coverage, and the IF scan's per-RF-bin samples).
pub const KEPT_BYTES_PER_RF_BIN: f64 = 48.0;
/// Throughput assumed per core when sizing the time limit, bins per second (about half the
/// figure measured on a busy 2-core machine, so the limit is generous).
pub const BINS_PER_S_PER_CORE: f64 = 10.0e6;
/// Smallest memory request per shard, MB.
pub const MIN_MEM_MB: u64 = 256;
/// Smallest time limit per shard, s.
pub const MIN_TIME_S: u64 = 300;

/// What is divided.
#[derive(Debug, Clone, Serialize, Deserialize)]
pub enum Work {
    /// Reprocess nights into a new analysis state: each night is a list of run files in
    /// acquisition order; nights are added in the given order.
    Reduction {
        /// The nights.
        nights: Vec<Vec<PathBuf>>,
    },
    /// A calibration campaign by signal injection.
    Campaign {
        /// Its size and seed.
        spec: CampaignSpec,
        /// Where the noise comes from.
        noise: CampaignNoise,
    },
}

/// The noise of a sharded campaign (see [`crate::calib::NoiseSource`]).
#[derive(Debug, Clone, Serialize, Deserialize)]
pub enum CampaignNoise {
    /// A scenario simulated afresh for every realisation (its TOML text).
    Simulated {
        /// Scenario TOML text.
        scenario_text: String,
    },
    /// Recorded run files, the same noise every realisation.
    Recorded {
        /// Run files.
        runs: Vec<PathBuf>,
    },
}

/// What one shard computes: a contiguous range of items, `first..first + count`.
/// Items are nights for a reduction; for a campaign, shard 0 is the head (the null and eta
/// realisations, `count` of them) and later shards hold ranges of efficiency jobs.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ShardSpec {
    /// Shard index (0-based; the Slurm array task id).
    pub index: usize,
    /// First item.
    pub first: usize,
    /// Number of items.
    pub count: usize,
}

/// Resources of one shard (the largest over all shards).
#[derive(Debug, Clone, Serialize, Deserialize)]
pub struct Resources {
    /// Memory of a shard, MB.
    pub mem_mb: u64,
    /// Memory of the merge, MB (the accumulated grid of all nights and one night at a time).
    pub merge_mem_mb: u64,
    /// Cores.
    pub cpus: usize,
    /// Time limit, s.
    pub time_s: u64,
}

/// A divided reduction or campaign, as stored in `plan.json` in the work folder.
#[derive(Debug, Clone, Serialize, Deserialize)]
pub struct ShardPlan {
    /// Layout version ([`PLAN_VERSION`]).
    pub version: u32,
    /// axsift version that planned it.
    pub tool_version: String,
    /// The pipeline TOML text (every shard and the merge use this text, not the file).
    pub config_text: String,
    /// The pipeline file's name as given (for messages).
    pub config_name: String,
    /// What is divided.
    pub work: Work,
    /// The shards, by index.
    pub shards: Vec<ShardSpec>,
    /// Resources per shard.
    pub resources: Resources,
}

/// Splits `n` items into at most `parts` contiguous ranges of near-equal size.
fn split(n: usize, parts: usize, first_index: usize, offset: usize) -> Vec<ShardSpec> {
    let parts = parts.clamp(1, n.max(1));
    (0..parts)
        .map(|i| {
            let (a, b) = (i * n / parts, (i + 1) * n / parts);
            ShardSpec { index: first_index + i, first: offset + a, count: b - a }
        })
        .filter(|s| s.count > 0)
        .collect()
}

/// Memory of one reduction of a night with this step width and RF grid, MB.
fn night_mem_mb(n_bins: usize, rf_bins: f64) -> f64 {
    BASE_MB_PER_32K_BINS * n_bins as f64 / 32768.0 + RF_BIN_BYTES * rf_bins / 1e6
}

/// What reducing one night costs, from its run files' metadata.
struct NightCost {
    /// Steps x bins.
    bins: f64,
    /// Resident memory of its reduction, MB.
    mem_mb: f64,
    /// Bins of its RF grid.
    rf_bins: f64,
    /// Lowest and highest RF bin centre, Hz.
    span_hz: (f64, f64),
    /// Bin width, Hz.
    bin_width_hz: f64,
}

fn night_cost(paths: &[PathBuf]) -> Result<NightCost, ShardError> {
    let (readers, night) = open_night(paths).map_err(|e| ShardError::BadInput(e.to_string()))?;
    let steps: usize = readers.iter().map(|r| r.steps().len()).sum();
    let rf_bins = (night.rf_span_hz.1 - night.rf_span_hz.0) / night.bin_width_hz + 1.0;
    Ok(NightCost {
        bins: (steps * night.n_bins) as f64,
        mem_mb: night_mem_mb(night.n_bins, rf_bins),
        rf_bins,
        span_hz: night.rf_span_hz,
        bin_width_hz: night.bin_width_hz,
    })
}

/// Resources from the largest shard: memory twice the model (at least [`MIN_MEM_MB`]), time
/// three times the bins over the throughput of `cpus` cores (at least [`MIN_TIME_S`]).
fn resources(bins: f64, mem_mb: f64, merge_mem_mb: f64, cpus: usize) -> Resources {
    let request = |mb: f64| ((2.0 * mb).ceil() as u64).max(MIN_MEM_MB);
    Resources {
        mem_mb: request(mem_mb),
        merge_mem_mb: request(merge_mem_mb),
        cpus,
        time_s: ((3.0 * bins / (BINS_PER_S_PER_CORE * cpus as f64)).ceil() as u64).max(MIN_TIME_S),
    }
}

impl ShardPlan {
    /// Plans a reprocessing of `nights` into at most `shards` shards of consecutive nights
    /// (fewer if there are fewer nights), each run with `cpus` cores.
    pub fn reduction(config_text: &str, config_name: &str, nights: Vec<Vec<PathBuf>>, shards: usize, cpus: usize) -> Result<Self, ShardError> {
        crate::config::load(config_text, config_name).map_err(|e| ShardError::BadInput(e.to_string()))?;
        if nights.is_empty() {
            return Err(ShardError::BadInput("no nights given (--night FILE[,FILE...], once per night)".into()));
        }
        let nights: Vec<Vec<PathBuf>> = nights.into_iter().map(|n| n.into_iter().map(absolute).collect::<Result<_, _>>()).collect::<Result<_, _>>()?;
        let mut seen = std::collections::HashMap::new();
        for (i, path) in nights.iter().enumerate().flat_map(|(i, n)| n.iter().map(move |p| (i, p))) {
            let key = std::fs::canonicalize(path).unwrap_or_else(|_| path.clone());
            if let Some(j) = seen.insert(key, i).filter(|&j| j != i) {
                return Err(ShardError::BadInput(format!("{}: given in night {j} and in night {i}; a run file belongs to one night", path.display())));
            }
        }
        let costs = nights.iter().map(|n| night_cost(n)).collect::<Result<Vec<_>, _>>()?;
        let specs = split(nights.len(), shards, 0, 0);
        let of = |s: &ShardSpec| &costs[s.first..s.first + s.count];
        let largest_bins = specs.iter().map(|s| of(s).iter().map(|c| c.bins).sum::<f64>()).fold(0.0, f64::max);
        let shard_mem =
            |s: &ShardSpec| of(s).iter().map(|c| c.mem_mb).fold(0.0, f64::max) + of(s).iter().map(|c| c.rf_bins).sum::<f64>() * KEPT_BYTES_PER_RF_BIN / 1e6;
        let largest_mem = specs.iter().map(shard_mem).fold(0.0, f64::max);
        // The merge holds the grid of all nights (each bin as in the state and its spectrum
        // stages) and decodes one night at a time.
        let (lo, hi) = costs.iter().fold((f64::INFINITY, f64::NEG_INFINITY), |(lo, hi), c| (lo.min(c.span_hz.0), hi.max(c.span_hz.1)));
        let grid_bins = (hi - lo) / costs[0].bin_width_hz + 1.0;
        let merge_mem = grid_bins * RF_BIN_BYTES / 1e6 + costs.iter().map(|c| c.mem_mb).fold(0.0, f64::max);
        Ok(Self::new(config_text, config_name, Work::Reduction { nights }, specs, resources(largest_bins, largest_mem, merge_mem, cpus)))
    }

    /// Plans a campaign into shard 0 (null and eta realisations) and up to `shards - 1`
    /// shards of efficiency jobs; each shard runs `cpus` realisations at a time.
    pub fn campaign(config_text: &str, config_name: &str, spec: CampaignSpec, noise: CampaignNoise, shards: usize, cpus: usize) -> Result<Self, ShardError> {
        crate::config::load(config_text, config_name).map_err(|e| ShardError::BadInput(e.to_string()))?;
        let noise = match noise {
            CampaignNoise::Recorded { runs } => CampaignNoise::Recorded { runs: runs.into_iter().map(absolute).collect::<Result<_, _>>()? },
            simulated => simulated,
        };
        let (bins, night_mem) = match &noise {
            CampaignNoise::Recorded { runs } => night_cost(runs).map(|c| (c.bins, c.mem_mb))?,
            CampaignNoise::Simulated { scenario_text } => {
                let sc = Scenario::from_toml(scenario_text).map_err(|e| ShardError::BadInput(format!("scenario: {e}")))?;
                let rf_bins = ((sc.scan.n_steps.saturating_sub(1)) * sc.scan.step_bins + sc.scan.n_bins) as f64;
                ((sc.scan.n_steps * sc.scan.n_bins) as f64, night_mem_mb(sc.scan.n_bins, rf_bins))
            }
        };
        let (head, efficiency) = campaign_size(&spec);
        let mut specs = vec![ShardSpec { index: 0, first: 0, count: head }];
        specs.extend(split(efficiency, shards.saturating_sub(1), 1, 0));
        let largest = specs.iter().map(|s| s.count).max().unwrap_or(1) as f64;
        let res = resources(largest * bins, cpus as f64 * night_mem, night_mem, cpus);
        Ok(Self::new(config_text, config_name, Work::Campaign { spec, noise }, specs, res))
    }

    fn new(config_text: &str, config_name: &str, work: Work, shards: Vec<ShardSpec>, resources: Resources) -> Self {
        Self {
            version: PLAN_VERSION,
            tool_version: env!("CARGO_PKG_VERSION").into(),
            config_text: config_text.into(),
            config_name: config_name.into(),
            work,
            shards,
            resources,
        }
    }

    /// Writes `plan.json` into `work` (created if needed) under a temporary name, then renames
    /// it into place. Refuses a folder that already holds a plan: shards of the old plan
    /// would otherwise sit beside the new one.
    pub fn save(&self, work: &Path) -> Result<PathBuf, ShardError> {
        std::fs::create_dir_all(work).map_err(|e| ShardError::io(work, e))?;
        let path = work.join(PLAN_FILE);
        if path.exists() {
            return Err(ShardError::BadInput(format!("{}: a plan is already there; plan into a new work folder", path.display())));
        }
        let text = serde_json::to_string_pretty(self).map_err(|e| ShardError::io(&path, e))?;
        super::write_atomic(&path, text.as_bytes())?;
        Ok(path)
    }

    /// Reads a plan file; returns it with the SHA-256 of its bytes (the plan hash that every
    /// shard file carries).
    pub fn load(path: &Path) -> Result<(Self, String), ShardError> {
        let bytes = std::fs::read(path).map_err(|e| ShardError::io(path, e))?;
        let plan: Self = serde_json::from_slice(&bytes).map_err(|e| ShardError::BadInput(format!("{}: not a shard plan: {e}", path.display())))?;
        if plan.version != PLAN_VERSION {
            return Err(ShardError::BadInput(format!("{}: field `version` is {} (this build reads {PLAN_VERSION})", path.display(), plan.version)));
        }
        plan.check().map_err(|e| ShardError::BadInput(format!("{}: {e}", path.display())))?;
        let hash = Sha256::digest(&bytes).iter().map(|b| format!("{b:02x}")).collect();
        Ok((plan, hash))
    }

    /// Items the shards divide: nights, or for a campaign the head's realisations (shard 0)
    /// and the efficiency jobs (the others).
    fn check(&self) -> Result<(), String> {
        let (head, items) = match &self.work {
            Work::Reduction { nights } => (None, nights.len()),
            Work::Campaign { spec, .. } => {
                let (head, efficiency) = campaign_size(spec);
                (Some(head), efficiency)
            }
        };
        let mut next = 0;
        for (i, s) in self.shards.iter().enumerate() {
            let expected = match (head, i) {
                (Some(h), 0) => s.first == 0 && s.count == h,
                _ => s.first == next && s.first + s.count <= items && s.count > 0,
            };
            if s.index != i || !expected {
                return Err(format!("field `shards`, entry {i} (index {}, items {}..{}) does not continue the division", s.index, s.first, s.first + s.count));
            }
            if head.is_none() || i > 0 {
                next = s.first + s.count;
            }
        }
        if next != items || self.shards.is_empty() {
            return Err(format!("field `shards` covers items 0..{next} of 0..{items}"));
        }
        Ok(())
    }
}

fn absolute(p: PathBuf) -> Result<PathBuf, ShardError> {
    std::path::absolute(&p).map_err(|e| ShardError::io(&p, e))
}

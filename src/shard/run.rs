//! Running one shard of a plan.

use super::plan::{CampaignNoise, ShardPlan, Work};
use super::wire::NightWire;
use super::{Payload, SHARD_VERSION, ShardError, ShardFile, read_shard, shard_path, write_atomic};
use crate::calib::{self, NoiseSource};
use crate::sim::Scenario;
use std::path::{Path, PathBuf};

/// Environment variable Slurm sets to the array task id.
pub const ARRAY_TASK_VAR: &str = "SLURM_ARRAY_TASK_ID";

/// The shard index: `given` if any, else the Slurm array task id from the environment.
pub fn shard_index(given: Option<usize>) -> Result<usize, ShardError> {
    if let Some(i) = given {
        return Ok(i);
    }
    let value = std::env::var(ARRAY_TASK_VAR)
        .map_err(|_| ShardError::BadInput(format!("no shard index: give --index N or run as a Slurm array task ({ARRAY_TASK_VAR} is unset)")))?;
    value.trim().parse().map_err(|_| ShardError::BadInput(format!("{ARRAY_TASK_VAR} = {value:?} is not a shard index")))
}

/// Calls `f` with the campaign's noise source; simulated nights go into `scratch`.
pub(super) fn with_noise<T>(noise: &CampaignNoise, scratch: &Path, f: impl FnOnce(&NoiseSource) -> Result<T, ShardError>) -> Result<T, ShardError> {
    match noise {
        CampaignNoise::Recorded { runs } => f(&NoiseSource::Recorded(runs)),
        CampaignNoise::Simulated { scenario_text } => {
            let scenario = Scenario::from_toml(scenario_text).map_err(|e| ShardError::BadInput(format!("plan field `scenario_text`: {e}")))?;
            f(&NoiseSource::Simulated { scenario: &scenario, scratch })
        }
    }
}

/// Runs shard `index` of the plan at `plan_path` (its work folder is the plan's folder) and
/// writes `shards/shard-NNNN.json` atomically. Rerunning a shard replaces its file with an
/// identical result. A campaign shard other than 0 needs shard 0's file.
pub fn run_shard(plan_path: &Path, index: usize, progress: &(dyn Fn(usize, usize) + Sync)) -> Result<PathBuf, ShardError> {
    let (plan, hash) = ShardPlan::load(plan_path)?;
    let work = plan_path.parent().unwrap_or(Path::new("."));
    let spec = plan.shards.get(index).cloned().ok_or_else(|| {
        ShardError::BadInput(format!(
            "{}: shard {index} does not exist (the plan has {} shards, 0..{})",
            plan_path.display(),
            plan.shards.len(),
            plan.shards.len()
        ))
    })?;
    let pipeline = crate::config::load(&plan.config_text, &plan.config_name)
        .map_err(|e| ShardError::BadInput(format!("{}: field `config_text`: {e}", plan_path.display())))?;
    let items = spec.first..spec.first + spec.count;
    let payload = match &plan.work {
        Work::Reduction { nights } => {
            let mut out = Vec::new();
            for (k, paths) in nights[items.clone()].iter().enumerate() {
                let night = crate::state::reduce_night(&pipeline, paths).map_err(|e| ShardError::Failed(format!("night {}: {e}", spec.first + k)))?;
                out.push(NightWire::from_night(&night));
                progress(k + 1, spec.count);
            }
            Payload::Nights(out)
        }
        Work::Campaign { spec: campaign, noise } => {
            let scratch = work.join("scratch").join(format!("shard-{index:04}"));
            std::fs::create_dir_all(&scratch).map_err(|e| ShardError::io(&scratch, e))?;
            let failed = |e: calib::CalibrationError| ShardError::Failed(format!("shard {index}: {e}"));
            let result = with_noise(noise, &scratch, |source| {
                if index == 0 {
                    return Ok(Payload::Head(Box::new(calib::campaign_head(&pipeline, source, campaign, progress).map_err(failed)?)));
                }
                let head = match read_shard(work, &plan, &hash, 0)?.payload {
                    Payload::Head(head) => head,
                    _ => return Err(ShardError::BadInput(format!("{}: not a campaign head", shard_path(work, 0).display()))),
                };
                Ok(Payload::Efficiency(calib::campaign_efficiency(&pipeline, source, campaign, &head, items.clone(), progress).map_err(failed)?))
            });
            let _ = std::fs::remove_dir_all(&scratch);
            result?
        }
    };
    let file = ShardFile { version: SHARD_VERSION, plan_sha256: hash, spec, payload };
    let path = shard_path(work, index);
    let dir = work.join(super::SHARDS_DIR);
    std::fs::create_dir_all(&dir).map_err(|e| ShardError::io(&dir, e))?;
    let text = serde_json::to_vec(&file).map_err(|e| ShardError::io(&path, e))?;
    write_atomic(&path, &text)?;
    Ok(path)
}

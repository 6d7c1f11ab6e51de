//! Sharded reductions and calibration campaigns, for a cluster with a shared filesystem.
//!
//! A work folder holds `plan.json` ([`plan`]: what is divided, the shards, the resources per
//! shard) and `shards/shard-NNNN.json`, one per finished shard ([`run`]). A shard file carries
//! the SHA-256 of the plan file's bytes, its index and the item range it computed; it is
//! written under a temporary name and renamed into place, so a shard killed at any point
//! leaves either no file or a complete one. The merge ([`merge`]) refuses missing, duplicated
//! and foreign shards, then adds the partial results in shard order through the same
//! functions a single-machine run uses, so its outputs are bit-identical to that run.
//!
//! - Reduction (reprocessing nights into a new analysis state): a shard reduces its nights
//!   through the combine stage ([`crate::state::reduce_night`]); the merge adds the nights in
//!   order ([`crate::state::add_reduced_night`]), exactly as nightly `reduce --state` does.
//! - Campaign: shard 0 runs the null and eta realisations ([`crate::calib::campaign_head`]);
//!   the other shards need its result (the injected amplitudes depend on eta), read it from
//!   shard 0's file and run ranges of efficiency jobs ([`crate::calib::campaign_efficiency`]);
//!   the merge assembles the calibration ([`crate::calib::assemble`]).
//!
//! [`slurm`] writes the job-array and merge scripts and can submit them.

pub mod bits;
pub mod merge;
pub mod plan;
pub mod run;
pub mod slurm;
mod wire;

use crate::calib::{CampaignHead, InjectionRecord};
use serde::{Deserialize, Serialize};
use std::path::{Path, PathBuf};

pub use merge::{Merged, merge};
pub use plan::{CampaignNoise, Resources, ShardPlan, ShardSpec, Work};
pub use run::{run_shard, shard_index};

/// Version of the shard file layout.
pub const SHARD_VERSION: u32 = 1;
/// Folder of the shard files inside the work folder.
pub const SHARDS_DIR: &str = "shards";

/// Problems of planning, running or merging shards.
#[derive(Debug, thiserror::Error)]
pub enum ShardError {
    /// A file could not be read or written.
    #[error("{path}: {message}")]
    Io {
        /// The file concerned.
        path: PathBuf,
        /// What went wrong.
        message: String,
    },
    /// Bad arguments, plan or shard files (missing, duplicated, foreign, malformed).
    #[error("{0}")]
    BadInput(String),
    /// A reduction or the merge itself failed.
    #[error("{0}")]
    Failed(String),
}

impl ShardError {
    fn io(path: &Path, e: impl std::fmt::Display) -> Self {
        ShardError::Io { path: path.to_path_buf(), message: e.to_string() }
    }
}

/// What one shard computed.
#[derive(Debug, Serialize, Deserialize)]
enum Payload {
    /// Reduction: its nights through the combine stage, in order.
    Nights(Vec<wire::NightWire>),
    /// Campaign shard 0: null and eta realisations.
    Head(Box<CampaignHead>),
    /// Campaign shards 1..: the efficiency records of their jobs, in job order.
    Efficiency(Vec<InjectionRecord>),
}

/// The content of `shards/shard-NNNN.json`.
#[derive(Debug, Serialize, Deserialize)]
struct ShardFile {
    version: u32,
    /// SHA-256 of the plan file the shard was computed for.
    plan_sha256: String,
    /// Which shard, and the items it computed.
    spec: ShardSpec,
    payload: Payload,
}

/// Path of shard `index`'s file in the work folder.
pub fn shard_path(work: &Path, index: usize) -> PathBuf {
    work.join(SHARDS_DIR).join(format!("shard-{index:04}.json"))
}

/// Writes `bytes` to `path` through a temporary file in the same folder (named after the
/// process, so concurrent writers never share one), then renames it into place.
fn write_atomic(path: &Path, bytes: &[u8]) -> Result<(), ShardError> {
    let name = path.file_name().map(|n| n.to_string_lossy().into_owned()).unwrap_or_default();
    let tmp = path.with_file_name(format!(".{name}.tmp.{}", std::process::id()));
    let written = std::fs::write(&tmp, bytes).and_then(|()| std::fs::rename(&tmp, path));
    if let Err(e) = written {
        let _ = std::fs::remove_file(&tmp);
        return Err(ShardError::io(path, e));
    }
    Ok(())
}

/// Reads shard `index`'s file and checks it belongs to the plan with hash `plan_sha256` and
/// holds the shard the plan expects there.
fn read_shard(work: &Path, plan: &ShardPlan, plan_sha256: &str, index: usize) -> Result<ShardFile, ShardError> {
    let path = shard_path(work, index);
    let rerun = format!("axsift shard-run --plan {} --index {index}", work.join(plan::PLAN_FILE).display());
    let bytes = match std::fs::read(&path) {
        Ok(b) => b,
        Err(e) if e.kind() == std::io::ErrorKind::NotFound => {
            return Err(ShardError::BadInput(format!("{}: missing (shard {index} has not finished); run it with `{rerun}`", path.display())));
        }
        Err(e) => return Err(ShardError::io(&path, e)),
    };
    let file: ShardFile =
        serde_json::from_slice(&bytes).map_err(|e| ShardError::BadInput(format!("{}: not a shard file: {e}; rerun it with `{rerun}`", path.display())))?;
    if file.version != SHARD_VERSION {
        return Err(ShardError::BadInput(format!("{}: field `version` is {} (this build reads {SHARD_VERSION})", path.display(), file.version)));
    }
    if file.plan_sha256 != plan_sha256 {
        return Err(ShardError::BadInput(format!(
            "{}: foreign shard: field `plan_sha256` is {}, the plan's is {}; remove it and rerun with `{rerun}`",
            path.display(),
            &file.plan_sha256[..file.plan_sha256.len().min(12)],
            &plan_sha256[..12]
        )));
    }
    if file.spec.index != index {
        return Err(ShardError::BadInput(format!(
            "{}: duplicated shard: holds shard {} (a copy of {}); remove it and rerun with `{rerun}`",
            path.display(),
            file.spec.index,
            shard_path(work, file.spec.index).display()
        )));
    }
    if plan.shards.get(index) != Some(&file.spec) {
        return Err(ShardError::BadInput(format!(
            "{}: field `spec` (items {}..{}) differs from the plan's shard {index}",
            path.display(),
            file.spec.first,
            file.spec.first + file.spec.count
        )));
    }
    Ok(file)
}

//! Slurm job scripts for a plan: one job array over the shards (two for a campaign, whose
//! efficiency shards wait for shard 0) and a merge job that depends on them.
//!
//! Assumes a shared filesystem: the axsift binary, the plan's work folder, the run files
//! and the output folders must be visible at the same paths on every node.

use super::ShardError;
use super::plan::{PLAN_FILE, ShardPlan, Work};
use std::path::{Path, PathBuf};
use std::process::Command;

/// Folder of the scripts and job logs inside the work folder.
pub const SLURM_DIR: &str = "slurm";

/// The written scripts and the array ranges to submit, in order.
#[derive(Debug, Clone)]
pub struct Scripts {
    /// The shard script (one array task per shard; `SLURM_ARRAY_TASK_ID` is the index).
    pub shard_script: PathBuf,
    /// The merge script.
    pub merge_script: PathBuf,
    /// Inclusive shard-index ranges, one array job each; each waits for the one before.
    pub waves: Vec<(usize, usize)>,
}

/// `path` as text for a script line; refuses characters a job script line cannot carry safely.
fn script_path(path: &Path) -> Result<String, ShardError> {
    let text = path.display().to_string();
    if text.chars().any(|c| c.is_whitespace() || "'\"\\$`".contains(c)) {
        return Err(ShardError::BadInput(format!("{text}: paths in Slurm scripts may not hold spaces, quotes, backslashes, `$` or backquotes")));
    }
    Ok(text)
}

/// Writes `slurm/shard.sbatch` and `slurm/merge.sbatch` into the plan's work folder. The
/// shard script requests the plan's resources (memory in MB, cpus, time in minutes rounded
/// up); the merge (one cpu, the plan's merge memory, the shard time limit) reads every shard
/// and writes `out` (and, for a reduction, `state_dir`).
/// `exe` is the axsift binary the jobs run; `partition` is passed on if given.
pub fn write_scripts(
    plan_path: &Path,
    exe: &Path,
    out: &Path,
    state_dir: Option<&Path>,
    calibration: Option<&Path>,
    partition: Option<&str>,
) -> Result<Scripts, ShardError> {
    let (plan, _) = ShardPlan::load(plan_path)?;
    let absolute = |p: &Path| std::path::absolute(p).map_err(|e| ShardError::Io { path: p.to_path_buf(), message: e.to_string() });
    let plan_path = absolute(plan_path)?;
    let work = plan_path.parent().unwrap_or(Path::new("/")).to_path_buf();
    let dir = work.join(SLURM_DIR);
    std::fs::create_dir_all(&dir).map_err(|e| ShardError::Io { path: dir.clone(), message: e.to_string() })?;
    let (exe_s, plan_s, dir_s, work_s, out_s) =
        (script_path(exe)?, script_path(&plan_path)?, script_path(&dir)?, script_path(&work)?, script_path(&absolute(out)?)?);
    let state_arg = match (&plan.work, state_dir) {
        (Work::Reduction { .. }, Some(s)) => format!(" --state {}", script_path(&absolute(s)?)?),
        (Work::Reduction { .. }, None) => return Err(ShardError::BadInput("a reduction plan needs --state DIR for the merged analysis state".into())),
        (Work::Campaign { .. }, _) => String::new(),
    };
    let partition = partition.map(|p| format!("#SBATCH --partition={p}\n")).unwrap_or_default();
    let r = &plan.resources;
    let header = |name: &str, log: &str, mem_mb: u64, cpus: usize, minutes: u64| {
        format!(
            "#!/bin/sh\n#SBATCH --job-name=axsift-{name}\n#SBATCH --chdir={work_s}\n#SBATCH --output={dir_s}/{log}\n#SBATCH --mem={mem_mb}M\n#SBATCH --cpus-per-task={cpus}\n#SBATCH --time={minutes}\n{partition}\
             # Written by axsift shard-slurm for the plan\n# {plan_s}\n# HDF5 file locking is off: network filesystems often refuse it, and the jobs only\n# read the run files they share.\n\
             export HDF5_USE_FILE_LOCKING=FALSE\nexport RAYON_NUM_THREADS=\"${{SLURM_CPUS_PER_TASK:-{cpus}}}\"\n"
        )
    };
    let shard_text = format!("{}exec {exe_s} --quiet shard-run --plan {plan_s}\n", header("shard", "shard-%A_%a.log", r.mem_mb, r.cpus, r.time_s.div_ceil(60)));
    let calibration_arg = calibration.map(|c| absolute(c).and_then(|c| script_path(&c))).transpose()?.map_or(String::new(), |c| format!(" --calibration {c}"));
    let merge_text = format!(
        "{}exec {exe_s} --quiet shard-merge --plan {plan_s} --out {out_s}{state_arg}{calibration_arg}\n",
        header("merge", "merge-%j.log", r.merge_mem_mb, 1, r.time_s.div_ceil(60))
    );
    let shard_script = dir.join("shard.sbatch");
    let merge_script = dir.join("merge.sbatch");
    super::write_atomic(&shard_script, shard_text.as_bytes())?;
    super::write_atomic(&merge_script, merge_text.as_bytes())?;
    let last = plan.shards.len().saturating_sub(1);
    let waves = match plan.work {
        Work::Reduction { .. } => vec![(0, last)],
        Work::Campaign { .. } if last == 0 => vec![(0, 0)],
        Work::Campaign { .. } => vec![(0, 0), (1, last)],
    };
    Ok(Scripts { shard_script, merge_script, waves })
}

/// The sbatch argument lists, in submission order, with `{prev}` standing for the job id of
/// the previous submission.
pub fn submissions(scripts: &Scripts) -> Vec<Vec<String>> {
    let mut out = Vec::new();
    for (k, (a, b)) in scripts.waves.iter().enumerate() {
        let mut args = vec!["--parsable".to_string(), format!("--array={a}-{b}")];
        if k > 0 {
            args.extend(["--dependency=afterok:{prev}".to_string(), "--kill-on-invalid-dep=yes".to_string()]);
        }
        args.push(scripts.shard_script.display().to_string());
        out.push(args);
    }
    out.push(vec!["--parsable".into(), "--dependency=afterok:{prev}".into(), "--kill-on-invalid-dep=yes".into(), scripts.merge_script.display().to_string()]);
    out
}

/// Submits with `sbatch --parsable`, each job depending on the one before; returns the job
/// ids in submission order (the arrays, then the merge).
pub fn submit(scripts: &Scripts) -> Result<Vec<String>, ShardError> {
    let mut ids: Vec<String> = Vec::new();
    for args in submissions(scripts) {
        let args: Vec<String> = args.into_iter().map(|a| a.replace("{prev}", ids.last().map(String::as_str).unwrap_or(""))).collect();
        let run = Command::new("sbatch").args(&args).output().map_err(|e| ShardError::Failed(format!("cannot run sbatch: {e} (is Slurm installed here?)")))?;
        if !run.status.success() {
            return Err(ShardError::Failed(format!(
                "sbatch {} failed ({}): {}; jobs submitted so far: {ids:?}",
                args.join(" "),
                run.status,
                String::from_utf8_lossy(&run.stderr).trim()
            )));
        }
        let stdout = String::from_utf8_lossy(&run.stdout);
        // --parsable prints "id" or "id;cluster".
        let id = stdout.trim().split(';').next().unwrap_or("").to_string();
        if id.is_empty() || !id.chars().all(|c| c.is_ascii_digit()) {
            return Err(ShardError::Failed(format!("sbatch printed {stdout:?}, not a job id")));
        }
        ids.push(id);
    }
    Ok(ids)
}

/// How to rerun one failed shard and then the merge (for the console and the docs).
pub fn rerun_hint(scripts: &Scripts) -> String {
    let work = scripts.shard_script.parent().and_then(Path::parent).unwrap_or(Path::new("."));
    format!(
        "rerun a failed shard K alone with `sbatch --array=K {}` (or `axsift shard-run --plan {} --index K` on any node), then the merge with `sbatch {}`",
        scripts.shard_script.display(),
        work.join(PLAN_FILE).display(),
        scripts.merge_script.display()
    )
}

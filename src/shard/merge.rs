//! Merging the finished shards of a plan, in shard order.

use super::plan::{ShardPlan, Work};
use super::run::with_noise;
use super::{Payload, SHARDS_DIR, ShardError, read_shard};
use crate::calib::{self, Calibration};
use crate::limits::Limits;
use crate::output::Provenance;
use crate::state::{self, State, Update};
use std::path::{Path, PathBuf};

/// The merged result, already written.
#[derive(Debug)]
pub enum Merged {
    /// A reprocessing: the new state (saved) and the update of its last night, whose
    /// reduction describes all nights (written to the output folder).
    Reduction {
        /// The state after all nights.
        state: Box<State>,
        /// The last night's update.
        update: Box<Update>,
        /// Its provenance (the last night's files).
        provenance: Provenance,
        /// The calibration given to the merge and the limits it gave (written beside the results).
        calibrated: Option<(Box<Calibration>, Box<Limits>)>,
        /// Files written to the output folder.
        written: Vec<PathBuf>,
    },
    /// A campaign: the calibration (written to the output folder).
    Campaign {
        /// The calibration.
        calibration: Box<Calibration>,
        /// Files written.
        written: Vec<PathBuf>,
    },
}

/// Checks that the shard folder holds exactly the plan's shards: every `shard-NNNN.json`
/// with an index the plan does not have is refused as foreign.
fn check_no_extra(work: &Path, n: usize) -> Result<(), ShardError> {
    let dir = work.join(SHARDS_DIR);
    let entries = std::fs::read_dir(&dir).map_err(|e| ShardError::io(&dir, format!("{e} (no shard has finished?)")))?;
    for entry in entries.flatten() {
        let name = entry.file_name().to_string_lossy().into_owned();
        let index = name.strip_prefix("shard-").and_then(|s| s.strip_suffix(".json")).map(|s| s.parse::<usize>());
        match index {
            Some(Ok(i)) if i < n => {}
            Some(_) => return Err(ShardError::BadInput(format!("{}: foreign shard file: the plan has shards 0..{n} only; remove it", entry.path().display()))),
            None => {}
        }
    }
    Ok(())
}

/// Merges every shard of the plan at `plan_path`. A reduction is added night by night into a
/// new state saved in `state_dir` (which must not hold a state yet), and the accumulated
/// reduction is written to `out`, as the last nightly `reduce --state` would have; a campaign
/// writes its calibration to `out`, as `calibrate` would have. A reduction merged with a
/// `calibration` (made with the same pipeline) also gets its limits, as `reduce --calibration`.
pub fn merge(plan_path: &Path, out: &Path, state_dir: Option<&Path>, calibration: Option<&Path>) -> Result<Merged, ShardError> {
    let (plan, hash) = ShardPlan::load(plan_path)?;
    let work = plan_path.parent().unwrap_or(Path::new("."));
    let pipeline = crate::config::load(&plan.config_text, &plan.config_name)
        .map_err(|e| ShardError::BadInput(format!("{}: field `config_text`: {e}", plan_path.display())))?;
    let calibration = match (&plan.work, calibration) {
        (Work::Campaign { .. }, Some(_)) => {
            return Err(ShardError::BadInput("a campaign merge makes a calibration and takes none (--calibration is for a reduction)".into()));
        }
        (_, path) => path.map(|p| Calibration::load_for(p, &pipeline)).transpose().map_err(ShardError::BadInput)?,
    };
    check_no_extra(work, plan.shards.len())?;
    // Every shard is checked before anything is merged; a reduction's are then read again
    // one at a time, so the merge holds one shard's nights, not all of them.
    let mut files = Vec::new();
    for i in 0..plan.shards.len() {
        let file = read_shard(work, &plan, &hash, i)?;
        if matches!(plan.work, Work::Campaign { .. }) {
            files.push(file);
        }
    }
    let failed = |e: &dyn std::fmt::Display| ShardError::Failed(e.to_string());
    match &plan.work {
        Work::Reduction { .. } => {
            let state_dir = state_dir.ok_or_else(|| ShardError::BadInput("a reduction merge needs --state DIR for the new analysis state".into()))?;
            // Held until the merged state is saved.
            let _lock = State::lock_folder(state_dir).map_err(|e| ShardError::BadInput(e.to_string()))?;
            if state_dir.join("state.json").exists() {
                return Err(ShardError::BadInput(format!("{}: already holds a state; the merge builds a new one, give an empty folder", state_dir.display())));
            }
            let mut st = State::new(state::plan_hash(&pipeline));
            let mut last = None;
            for shard in &plan.shards {
                let Payload::Nights(parts) = read_shard(work, &plan, &hash, shard.index)?.payload else {
                    return Err(ShardError::BadInput(format!(
                        "{}: holds campaign results, the plan is a reduction",
                        super::shard_path(work, shard.index).display()
                    )));
                };
                for (k, part) in parts.into_iter().enumerate() {
                    let what = format!("{} night {}", super::shard_path(work, shard.index).display(), shard.first + k);
                    let night = part.into_night(&what).map_err(ShardError::BadInput)?;
                    // Every night's span is collected; the last one's is written.
                    let update = state::collecting_span(|out| state::add_reduced_night(&mut st, &pipeline, night, out));
                    last = Some(update.map_err(|e| failed(&e))?);
                }
            }
            let update = last.ok_or_else(|| ShardError::BadInput(format!("{}: the plan has no nights", plan_path.display())))?;
            // The shard hashed the night's files; the state holds those hashes.
            let provenance = Provenance::of_hashed(&plan.config_text, st.nights[update.night].inputs());
            let limits = calibration
                .as_ref()
                .map(|cal| crate::limits::for_reduction(&pipeline, &update.reduction.spectrum, cal, crate::limits::DEFAULT_CONFIDENCE))
                .transpose()
                .map_err(ShardError::BadInput)?;
            let written = update
                .reduction
                .write(out, &plan.config_text, &provenance, calibration.as_ref().zip(limits.as_ref()))
                .map_err(|e| failed(&format!("{e:#}")))?;
            if let Some(limits) = &limits {
                st.record_limit(limits, &update.reduction.spectrum, update.match_hz).map_err(|e| ShardError::BadInput(e.to_string()))?;
            }
            st.save(state_dir).map_err(|e| failed(&e))?;
            let calibrated = calibration.zip(limits).map(|(c, l)| (Box::new(c), Box::new(l)));
            Ok(Merged::Reduction { state: Box::new(st), update: Box::new(update), provenance, calibrated, written })
        }
        Work::Campaign { spec, noise } => {
            let mut files = files.into_iter();
            let head = match files.next().map(|f| f.payload) {
                Some(Payload::Head(head)) => *head,
                _ => return Err(ShardError::BadInput(format!("{}: not a campaign head", super::shard_path(work, 0).display()))),
            };
            let mut records = Vec::new();
            for (i, file) in files.enumerate() {
                match file.payload {
                    Payload::Efficiency(r) => records.extend(r),
                    _ => return Err(ShardError::BadInput(format!("{}: not an efficiency shard", super::shard_path(work, i + 1).display()))),
                }
            }
            let calibration = with_noise(noise, work, |source| Ok(calib::assemble(&pipeline, source, spec, head, records)))?;
            let written = calibration.write(out).map_err(|e| failed(&format!("{e:#}")))?;
            Ok(Merged::Campaign { calibration: Box::new(calibration), written })
        }
    }
}

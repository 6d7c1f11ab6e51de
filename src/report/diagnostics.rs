//! Per-step diagnostics for the report: every step's metadata and its measured residual
//! spread after the baseline stage.
//!
//! The reduction keeps only the steps that reached the combination, so this pass re-reads the
//! run files and re-applies the plan's per-step stages up to and including the baseline stage
//! (with the same survey passes), then takes the root mean square of each step's residual.
//! It costs one read of the night plus one baseline fit per step; nothing is combined.

use crate::config::{Built, Plan};
use crate::dsp::spread::filtered_noise_spread;
use crate::runfile::StepMeta;
use crate::stage::{Step, StepStage, Verdict};
use rayon::prelude::*;
use std::path::PathBuf;

/// Rows read and processed together.
const CHUNK_ROWS: usize = 64;

/// One tuning step as the report shows it.
#[derive(Debug, Clone)]
pub struct StepDiag {
    /// Global step index (input order).
    pub index: usize,
    /// The step's cavity and receiver parameters.
    pub meta: StepMeta,
    /// RMS of the baseline residual delta = P / (G SG) - 1 (dimensionless); `None` when a
    /// stage before the baseline cut the step or the plan has no baseline stage.
    pub residual_spread: Option<f64>,
}

/// The diagnostics of a night.
#[derive(Debug, Clone)]
pub struct StepDiagnostics {
    /// Every step of every input file, in input order.
    pub steps: Vec<StepDiag>,
    /// Share F of one bin's noise variance that the baseline fit leaves: 1 - h0 for
    /// independent bins (h0 the centre weight of its smoothing kernel), more with the run
    /// files' `bin_correlation`. The predicted residual spread of a step is sqrt(F / N).
    /// `None` without a baseline stage.
    pub residual_fraction: Option<f64>,
}

impl StepDiagnostics {
    /// Predicted residual spread of a step, sqrt(F / N) (dimensionless).
    pub fn predicted_spread(&self, meta: &StepMeta) -> Option<f64> {
        self.residual_fraction.map(|k| (k / meta.n_averages.max(1) as f64).sqrt())
    }
}

/// Reads the run files again and measures every step's residual spread after the plan's
/// baseline stage. Errors (as text) when a file cannot be read or a stage cannot be built.
pub fn measure(plan: &Plan, paths: &[PathBuf]) -> Result<StepDiagnostics, String> {
    let (readers, night) = crate::pipeline::open_night(paths).map_err(|e| e.to_string())?;
    let baseline_at = plan.stages.iter().position(|s| s.config.baseline_kernel().is_some());
    let residual_fraction =
        plan.stages.iter().find_map(|s| s.config.baseline_kernel()).map(|k| filtered_noise_spread(&[1.0], Some(&k), &night.bin_correlation).powi(2));
    let mut stages: Vec<Box<dyn StepStage>> = Vec::new();
    if let Some(last) = baseline_at {
        for built in plan.build(&night)?.into_iter().take(last + 1) {
            if let Built::Step(s) = built {
                stages.push(s);
            }
        }
    }
    // Survey passes, as the reduction runs them: each surveying stage sees the steps kept
    // by the stages before it.
    for s in 0..stages.len() {
        if !stages[s].needs_survey() {
            continue;
        }
        let (before, rest) = stages.split_at_mut(s);
        let before: &[Box<dyn StepStage>] = before;
        for_each_chunk(&readers, &mut |chunk| {
            let kept: Vec<bool> = chunk.par_iter_mut().map(|step| before.iter().all(|st| st.apply(step, &night) == Verdict::Keep)).collect();
            for (step, keep) in chunk.iter().zip(kept) {
                if keep {
                    rest[0].survey(step);
                }
            }
        })?;
        stages[s].finish_survey()?;
    }
    let mut steps = Vec::new();
    let stages: &[Box<dyn StepStage>] = &stages;
    for_each_chunk(&readers, &mut |chunk| {
        let spreads: Vec<Option<f64>> = chunk
            .par_iter_mut()
            .map(|step| {
                if stages.is_empty() {
                    return None;
                }
                let (last, first) = stages.split_last().expect("not empty");
                if first.iter().any(|st| st.apply(step, &night) != Verdict::Keep) {
                    return None;
                }
                // The baseline leaves its residual in place whether it keeps or cuts the step.
                let _ = last.apply(step, &night);
                Some(rms_of_finite(&step.values))
            })
            .collect();
        steps.extend(chunk.iter().zip(spreads).map(|(step, residual_spread)| StepDiag { index: step.index, meta: step.meta, residual_spread }));
    })?;
    Ok(StepDiagnostics { steps, residual_fraction: baseline_at.and(residual_fraction) })
}

/// Reads every file in chunks of rows (on this thread) and hands each chunk of steps to `f`.
fn for_each_chunk(readers: &[crate::runfile::RunReader], f: &mut dyn FnMut(&mut [Step])) -> Result<(), String> {
    let mut index = 0;
    for (file, reader) in readers.iter().enumerate() {
        let n = reader.steps().len();
        for start in (0..n).step_by(CHUNK_ROWS) {
            let end = (start + CHUNK_ROWS).min(n);
            let rows = reader.read_rows(start..end).map_err(|e| e.to_string())?;
            let mut chunk: Vec<Step> = rows
                .outer_iter()
                .enumerate()
                .map(|(r, row)| Step {
                    index: index + r,
                    file,
                    index_in_file: start + r,
                    meta: reader.steps()[start + r],
                    values: row.to_vec(),
                    standard: Default::default(),
                    no_data: Default::default(),
                })
                .collect();
            index += end - start;
            f(&mut chunk);
        }
    }
    Ok(())
}

/// Root mean square of the finite values (NaN if there are none).
fn rms_of_finite(x: &[f64]) -> f64 {
    let (sum, n) = x.iter().filter(|v| v.is_finite()).fold((0.0, 0usize), |(s, n), v| (s + v * v, n + 1));
    if n == 0 { f64::NAN } else { (sum / n as f64).sqrt() }
}

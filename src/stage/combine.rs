//! Combine: the maximum-likelihood (inverse-variance) weighted mean of all steps per RF bin.
//!
//! The RF grid starts at the lowest step start frequency and has the night's bin width.
//! A step whose start is not a whole number of bins from the grid origin (within
//! `max_misalignment_bins`) is an error naming it: steps are never silently shifted.

use super::{Combiner, NightInfo, Spectrum, Standardised, Step, written_zeros};
use crate::config::{BuildContext, Built, StageConfig};
use crate::simd::per_bin_loop;
use rayon::prelude::*;
use serde::Deserialize;

/// Options of the `combine` stage.
#[derive(Debug, Clone, Deserialize, serde::Serialize)]
#[serde(deny_unknown_fields)]
pub struct CombineConfig {
    /// Largest accepted offset of a step from the RF grid, in bins.
    #[serde(default = "default_tolerance")]
    pub max_misalignment_bins: f64,
}

fn default_tolerance() -> f64 {
    1e-3
}

impl StageConfig for CombineConfig {
    fn options(&self) -> toml::Table {
        crate::config::options_of(self)
    }
    fn validate(&self) -> Vec<(String, String)> {
        if self.max_misalignment_bins > 0.0 && self.max_misalignment_bins < 0.5 {
            Vec::new()
        } else {
            vec![("max_misalignment_bins".into(), format!("{} must be in (0, 0.5)", self.max_misalignment_bins))]
        }
    }
    fn build(&self, night: &NightInfo, _ctx: &BuildContext) -> Result<Built, String> {
        let (lo, hi) = night.rf_span_hz;
        let n = ((hi - lo) / night.bin_width_hz).round() as usize + 1;
        Ok(Built::Combine(Box::new(MlCombiner {
            tolerance: self.max_misalignment_bins,
            step_span_hz: (night.n_bins - 1) as f64 * night.bin_width_hz,
            origin_hz: lo,
            bin_width_hz: night.bin_width_hz,
            weighted_sum: written_zeros(n),
            weight: written_zeros(n),
            coverage: written_zeros(n),
        })))
    }
}

struct MlCombiner {
    tolerance: f64,
    step_span_hz: f64,
    origin_hz: f64,
    bin_width_hz: f64,
    weighted_sum: Vec<f64>,
    weight: Vec<f64>,
    coverage: Vec<u32>,
}

/// RF bins one task of [`MlCombiner::add_all`] accumulates.
const PIECE_BINS: usize = 8192;

impl MlCombiner {
    /// RF bin of the step's first bin, or the error naming a step off the grid.
    fn first_bin(&self, step: &Step) -> Result<usize, String> {
        let offset = (step.meta.start_freq_hz - self.origin_hz) / self.bin_width_hz;
        let whole = offset.round();
        if (offset - whole).abs() > self.tolerance {
            return Err(format!(
                "step {} (file {}, row {}): start_freq_hz = {} Hz is {:.4} bins off the RF grid (tolerance {})",
                step.index,
                step.file,
                step.index_in_file,
                step.meta.start_freq_hz,
                offset - whole,
                self.tolerance
            ));
        }
        Ok(whole as usize)
    }
}

per_bin_loop! {
    /// Adds a step's standardised bins (significance `z`, inverse sigma `inv`, both 0 where there
    /// is no sample) into the sums of the same RF bins: weighted value z inv, weight inv^2, one
    /// more step where inv > 0. Equal-length slices, no division and no branch: the loop
    /// vectorises.
    fn accumulate(sums: &mut [f64], weights: &mut [f64], coverage: &mut [u32], z: &[f32], inv: &[f32]) {
        let n = sums.len().min(weights.len()).min(coverage.len()).min(z.len()).min(inv.len());
        let (sums, weights, coverage, z, inv) = (&mut sums[..n], &mut weights[..n], &mut coverage[..n], &z[..n], &inv[..n]);
        for k in 0..n {
            let (z, inv) = (f64::from(z[k]), f64::from(inv[k]));
            sums[k] += z * inv;
            weights[k] += inv * inv;
            coverage[k] += u32::from(inv > 0.0);
        }
    }
}

impl Combiner for MlCombiner {
    fn add(&mut self, step: &Step) -> Result<(), String> {
        let first = self.first_bin(step)?;
        let Standardised { z, inverse_sigma } = &step.standard;
        let n = step.standard.len();
        accumulate(&mut self.weighted_sum[first..first + n], &mut self.weight[first..first + n], &mut self.coverage[first..first + n], z, inverse_sigma);
        Ok(())
    }
    /// Pieces of [`PIECE_BINS`] RF bins in parallel; within a piece the steps are added in
    /// their order, so every bin sees the same additions in the same order as with
    /// [`Combiner::add`], whatever the number of threads.
    fn add_all(&mut self, steps: &[&Step]) -> Result<(), String> {
        let placed: Vec<(usize, &Step)> = steps.iter().map(|&step| Ok((self.first_bin(step)?, step))).collect::<Result<_, String>>()?;
        let Some(lo) = placed.iter().map(|&(first, _)| first).min() else { return Ok(()) };
        let hi = placed.iter().map(|&(first, step)| first + step.standard.len()).max().unwrap_or(lo);
        let (sums, weights, coverage) = (&mut self.weighted_sum[lo..hi], &mut self.weight[lo..hi], &mut self.coverage[lo..hi]);
        sums.par_chunks_mut(PIECE_BINS).zip(weights.par_chunks_mut(PIECE_BINS)).zip(coverage.par_chunks_mut(PIECE_BINS)).enumerate().for_each(
            |(piece, ((sums, weights), coverage))| {
                // This piece holds RF bins a..b.
                let a = lo + piece * PIECE_BINS;
                let b = a + sums.len();
                for &(first, step) in &placed {
                    let Standardised { z, inverse_sigma } = &step.standard;
                    let n = step.standard.len();
                    let (from, to) = (first.max(a), (first + n).min(b));
                    if from < to {
                        let (here, there) = (from - a..to - a, from - first..to - first);
                        accumulate(&mut sums[here.clone()], &mut weights[here.clone()], &mut coverage[here], &z[there.clone()], &inverse_sigma[there]);
                    }
                }
            },
        );
        Ok(())
    }
    fn finish(self: Box<Self>) -> Spectrum {
        let combined = self.weighted_sum.iter().zip(&self.weight).map(|(s, w)| if *w > 0.0 { s / w } else { f64::NAN }).collect();
        let combined_sigma = self.weight.iter().map(|w| if *w > 0.0 { w.sqrt().recip() } else { f64::INFINITY }).collect();
        Spectrum {
            rf_start_hz: self.origin_hz,
            bin_width_hz: self.bin_width_hz,
            combined,
            combined_sigma,
            coverage: self.coverage,
            step_span_hz: self.step_span_hz,
            ..Spectrum::default()
        }
    }
}

//! Combine: the maximum-likelihood (inverse-variance) weighted mean of all steps per RF bin.
//!
//! The RF grid starts at the lowest step start frequency and has the night's bin width.
//! A step whose start is not a whole number of bins from the grid origin (within
//! `max_misalignment_bins`) is an error naming it: steps are never silently shifted.

use super::grid_sums::GridSums;
use super::{BLOCK_BINS, Combiner, NightInfo, Spectrum, Standardised, Step};
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
            sums: GridSums::new(n),
        })))
    }
}

struct MlCombiner {
    tolerance: f64,
    step_span_hz: f64,
    origin_hz: f64,
    bin_width_hz: f64,
    sums: GridSums,
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

per_bin_loop! {
    /// The combined value sum / weight (NaN where weight = 0) and its sigma 1 / sqrt(weight)
    /// (infinite there), per bin.
    fn combine_values(weighted_sum: &[f64], weight: &[f64], combined: &mut [f64], sigma: &mut [f64]) {
        for (((s, w), c), sd) in weighted_sum.iter().zip(weight).zip(combined.iter_mut()).zip(sigma.iter_mut()) {
            (*c, *sd) = if *w > 0.0 { (s / w, w.sqrt().recip()) } else { (f64::NAN, f64::INFINITY) };
        }
    }
}

impl Combiner for MlCombiner {
    fn add(&mut self, step: &Step) -> Result<(), String> {
        self.add_all(&[step])
    }
    /// Pieces of at most [`PIECE_BINS`] RF bins in parallel; within a piece the steps are
    /// added in their order, so every bin sees the same additions in the same order as with
    /// [`Combiner::add`] on each step, whatever the number of threads.
    fn add_all(&mut self, steps: &[&Step]) -> Result<(), String> {
        let placed: Vec<(usize, &Step)> = steps.iter().map(|&step| Ok((self.first_bin(step)?, step))).collect::<Result<_, String>>()?;
        let Some(lo) = placed.iter().map(|&(first, _)| first).min() else { return Ok(()) };
        let hi = placed.iter().map(|&(first, step)| first + step.standard.len()).max().unwrap_or(lo);
        self.sums.pieces(lo, hi, PIECE_BINS).into_par_iter().for_each(|piece| {
            // This piece holds RF bins a..b.
            let a = piece.first_bin;
            let b = a + piece.weight.len();
            for &(first, step) in &placed {
                let Standardised { z, inverse_sigma } = &step.standard;
                let n = step.standard.len();
                let (from, to) = (first.max(a), (first + n).min(b));
                if from < to {
                    let (here, there) = (from - a..to - a, from - first..to - first);
                    accumulate(
                        &mut piece.weighted_sum[here.clone()],
                        &mut piece.weight[here.clone()],
                        &mut piece.coverage[here],
                        &z[there.clone()],
                        &inverse_sigma[there],
                    );
                }
            }
        });
        Ok(())
    }
    fn grid_bins(&self) -> usize {
        self.sums.grid_bins()
    }
    fn finish_block(&mut self, block: usize, combined: &mut Vec<f64>, sigma: &mut Vec<f64>, coverage: Option<&mut Vec<u32>>) {
        self.sums.close(block, |sums| {
            let (c0, s0, n) = (combined.len(), sigma.len(), sums.weight.len());
            combined.resize(c0 + n, 0.0);
            sigma.resize(s0 + n, 0.0);
            // Element-wise, in parallel pieces.
            combined[c0..].par_chunks_mut(PIECE_BINS).zip(sigma[s0..].par_chunks_mut(PIECE_BINS)).enumerate().for_each(|(p, (c, s))| {
                let r = p * PIECE_BINS..p * PIECE_BINS + c.len();
                combine_values(&sums.weighted_sum[r.clone()], &sums.weight[r], c, s);
            });
            if let Some(coverage) = coverage {
                coverage.extend_from_slice(&sums.coverage);
            }
        });
    }
    fn finish(mut self: Box<Self>) -> Spectrum {
        let n = self.grid_bins();
        let (mut combined, mut combined_sigma, mut coverage) = (Vec::with_capacity(n), Vec::with_capacity(n), Vec::with_capacity(n));
        for block in 0..n.div_ceil(BLOCK_BINS) {
            self.finish_block(block, &mut combined, &mut combined_sigma, Some(&mut coverage));
        }
        Spectrum {
            rf_start_hz: self.origin_hz,
            bin_width_hz: self.bin_width_hz,
            combined,
            combined_sigma,
            coverage,
            step_span_hz: self.step_span_hz,
            ..Spectrum::default()
        }
    }
}

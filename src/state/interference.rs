//! Interference fixed in IF: the night's IF profile, and the step samples it explains.
//!
//! An axion stays at one RF frequency as the LO moves; a receiver line stays at one IF offset
//! (RF frequency minus the step's `start_freq_hz`). The night's gain shape is the mean raw
//! power per IF bin, so a line of constant power in every step is divided out before it
//! reaches the spectrum, and the mean residual of every IF bin over the night is close to zero
//! by construction. What a line leaves behind is the part that comes and goes: extra scatter
//! across the steps at its IF bin. The IF profile is therefore, per IF bin k, the weighted
//! scatter of the combined-stage inputs (reference-axion units, weights 1/sigma^2) about
//! their weighted mean,
//!     chi2_k = sum w r^2 - (sum w r)^2 / sum w,   nu_k = steps_k - 1 degrees of freedom,
//! scaled by the median of chi2_k / nu_k over all IF bins (the baseline fit removes a little
//! of the variance, the same in every bin; a line touches few bins, so the median is the null
//! scale) and turned into a significance with the Wilson-Hilferty normal approximation of
//! chi-square (Wilson & Hilferty, PNAS 17, 684 (1931)). An IF bin above [`IF_LINE_SIGMA`]
//! holds a line.
//!
//! While the steps stream through, every RF bin also keeps its most significant single-step
//! sample (r / sigma) and the IF bin it came from. Where that sample sits in a line's IF bin,
//! it is the line's sample: the state keeps it aside, and the spectrum without those samples
//! tells whether a candidate is explained by them alone. Cost: a few operations per bin and
//! step, arrays of the IF and RF lengths; the accumulation runs in step order, so the result
//! does not depend on the thread count.

use crate::simd::per_bin_loop;
use crate::stage::{BLOCK_BINS, NightInfo, Standardised, Step};
use rayon::prelude::*;
use serde::{Deserialize, Serialize};
use std::collections::BTreeMap;

/// Bins one parallel task of [`IfProfile::add_all`] works on.
const PIECE_BINS: usize = 8192;

/// Bins [`keep_top`] tests at once for a new maximum.
const TOP_BLOCK_BINS: usize = 64;

/// Significance in the IF profile (excess scatter, in normal sigma) above which an IF bin
/// holds a line. With 4096 IF bins a null night puts a bin above 5 sigma with probability
/// 4096 x 2.9e-7 = 1.2e-3 (one-sided normal tail, computed).
pub const IF_LINE_SIGMA: f64 = 5.0;

/// The streaming accumulator: fed every step that reaches the combination, in step order.
#[derive(Debug, Clone, Default)]
pub struct IfProfile {
    origin_hz: f64,
    bin_width_hz: f64,
    /// Per IF bin: valid samples, sum w, sum w r, sum w r^2.
    steps: Vec<u32>,
    weight: Vec<f64>,
    weighted_sum: Vec<f64>,
    weighted_sq_sum: Vec<f64>,
    /// RF bins of the night's grid.
    n_rf: usize,
    /// Per RF bin of the night's grid, in blocks of [`BLOCK_BINS`] made when a step first
    /// touches them: the most significant sample.
    top: BTreeMap<usize, TopSamples>,
}

/// For consecutive RF bins of a night's grid (one block): the most significant single-step
/// sample of each (z = r / sigma), its 1 / sigma and IF bin (z = -infinity: no sample yet).
#[derive(Debug, Clone, Default, PartialEq)]
pub struct TopSamples {
    /// z of the sample.
    pub z: Vec<f32>,
    /// Its 1 / sigma, reference-axion power^-1.
    pub inverse_sigma: Vec<f32>,
    /// Its IF bin.
    pub if_bin: Vec<u32>,
}

impl TopSamples {
    fn empty(n: usize) -> Self {
        Self { z: vec![f32::NEG_INFINITY; n], inverse_sigma: vec![0.0; n], if_bin: vec![0; n] }
    }

    /// The samples sitting in an IF bin of `in_line` (true: the bin holds a line), as (index
    /// within these bins, weight 1 / sigma^2, weight times value r / sigma^2, IF bin).
    pub fn in_lines<'a>(&'a self, in_line: &'a [bool]) -> impl Iterator<Item = (usize, f64, f64, i32)> + 'a {
        (0..self.z.len()).filter_map(move |j| {
            let k = self.if_bin[j] as usize;
            (self.z[j].is_finite() && in_line.get(k).copied().unwrap_or(false)).then(|| {
                let (z, inv) = (f64::from(self.z[j]), f64::from(self.inverse_sigma[j]));
                (j, inv * inv, z * inv, k as i32)
            })
        })
    }
}

/// A line found in a night's IF profile.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct IfLine {
    /// IF bin (position within the step).
    pub if_bin: usize,
    /// IF offset: RF frequency minus the step's start frequency, Hz.
    pub if_offset_hz: f64,
    /// Excess scatter in the IF profile, normal sigma.
    pub if_profile_sigma: f64,
    /// Steps with a valid sample in this IF bin.
    pub n_steps: u32,
}

/// A night's finished IF profile and the RF samples its lines explain.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct IfScan {
    /// Per IF bin: excess scatter in normal sigma (NaN with fewer than 3 steps).
    pub if_profile_sigma: Vec<f64>,
    /// Per IF bin: steps with a valid sample.
    pub if_steps: Vec<u32>,
    /// IF bins above [`IF_LINE_SIGMA`].
    pub lines: Vec<IfLine>,
    /// Per RF bin of the night's grid (origin at the night's lowest start frequency): weight
    /// of the line sample set aside (0 = none).
    pub removed_weight: Vec<f64>,
    /// Per RF bin: weight times value of that sample.
    pub removed_weighted_sum: Vec<f64>,
    /// Per RF bin: IF bin of that sample (-1 = none).
    pub removed_if_bin: Vec<i32>,
}

impl IfProfile {
    /// An empty profile for a night's IF length and RF grid (the combine stage's grid).
    pub fn new(night: &NightInfo) -> Self {
        let (lo, hi) = night.rf_span_hz;
        let n_rf = ((hi - lo) / night.bin_width_hz).round().max(0.0) as usize + 1;
        Self {
            origin_hz: lo,
            bin_width_hz: night.bin_width_hz,
            steps: vec![0; night.n_bins],
            weight: vec![0.0; night.n_bins],
            weighted_sum: vec![0.0; night.n_bins],
            weighted_sq_sum: vec![0.0; night.n_bins],
            n_rf,
            top: BTreeMap::new(),
        }
    }

    /// Adds consecutive steps as they enter the combination, in step order, standardised
    /// ([`Step::standard`], reference-axion units). IF bins and RF bins are worked on in
    /// pieces in parallel; within a piece the steps are taken in their order, so the sums and
    /// the kept samples do not depend on the number of threads.
    pub fn add_all(&mut self, steps: &[&Step]) {
        let n_if = self.steps.len();
        let (steps_k, weight, weighted_sum, weighted_sq_sum) = (&mut self.steps, &mut self.weight, &mut self.weighted_sum, &mut self.weighted_sq_sum);
        steps_k
            .par_chunks_mut(PIECE_BINS)
            .zip(weight.par_chunks_mut(PIECE_BINS))
            .zip(weighted_sum.par_chunks_mut(PIECE_BINS))
            .zip(weighted_sq_sum.par_chunks_mut(PIECE_BINS))
            .enumerate()
            .for_each(|(piece, (((count, w_sum), wr_sum), wrr_sum))| {
                let a = piece * PIECE_BINS;
                for step in steps {
                    let Standardised { z, inverse_sigma } = &step.standard;
                    let n = count.len().min(step.standard.len().saturating_sub(a));
                    add_to_sums(&mut count[..n], &mut w_sum[..n], &mut wr_sum[..n], &mut wrr_sum[..n], &z[a..a + n], &inverse_sigma[a..a + n]);
                }
            });
        let placed: Vec<(i64, &Step)> =
            steps.iter().map(|&step| (((step.meta.start_freq_hz - self.origin_hz) / self.bin_width_hz).round() as i64, step)).collect();
        // The blocks these steps touch, made on first touch.
        for &(first, step) in &placed {
            let last = (first + step.standard.len().min(n_if) as i64 - 1).min(self.n_rf as i64 - 1);
            if first > last || last < 0 {
                continue;
            }
            for block in (first.max(0) as usize / BLOCK_BINS)..=(last as usize / BLOCK_BINS) {
                let n = BLOCK_BINS.min(self.n_rf - block * BLOCK_BINS);
                self.top.entry(block).or_insert_with(|| TopSamples::empty(n));
            }
        }
        // First RF bin of each piece, and its z, 1 / sigma and IF bin.
        type Piece<'a> = (i64, &'a mut [f32], &'a mut [f32], &'a mut [u32]);
        let mut pieces: Vec<Piece> = Vec::new();
        for (&block, top) in self.top.iter_mut() {
            let zs = top.z.chunks_mut(PIECE_BINS);
            let invs = top.inverse_sigma.chunks_mut(PIECE_BINS);
            let ks = top.if_bin.chunks_mut(PIECE_BINS);
            for (p, ((z, inv), k)) in zs.zip(invs).zip(ks).enumerate() {
                pieces.push(((block * BLOCK_BINS + p * PIECE_BINS) as i64, z, inv, k));
            }
        }
        pieces.into_par_iter().for_each(|(a, z_top, inv_top, k_top)| {
            // This piece holds RF bins a..b.
            let b = a + z_top.len() as i64;
            for &(first, step) in &placed {
                let Standardised { z, inverse_sigma } = &step.standard;
                let len = step.standard.len().min(n_if) as i64;
                let (j0, j1) = (first.max(a), (first + len).min(b));
                if j0 >= j1 {
                    continue;
                }
                let (k0, i0, n) = ((j0 - first) as usize, (j0 - a) as usize, (j1 - j0) as usize);
                let (here, there) = (i0..i0 + n, k0..k0 + n);
                // IF bins fit in u32: a step has at most `runfile::MAX_BINS_PER_STEP` (2^20) bins.
                keep_top(&mut z_top[here.clone()], &mut inv_top[here.clone()], &mut k_top[here], &z[there.clone()], &inverse_sigma[there], k0 as u32);
            }
        });
    }

    /// Takes block `block`'s most significant samples out (no step may touch it afterwards);
    /// None if no step touched it.
    pub fn take_block(&mut self, block: usize) -> Option<TopSamples> {
        self.top.remove(&block)
    }

    /// The profile's significances and its lines (no RF samples: see [`IfScan::removed_in`]).
    pub fn profile(&self) -> IfScan {
        let chi2: Vec<(f64, f64)> = (0..self.steps.len())
            .map(|k| {
                let nu = f64::from(self.steps[k]) - 1.0;
                let w = self.weight[k];
                let c = if nu >= 2.0 && w > 0.0 { (self.weighted_sq_sum[k] - self.weighted_sum[k] * self.weighted_sum[k] / w).max(0.0) } else { f64::NAN };
                (c, nu)
            })
            .collect();
        // Null scale: median over IF bins of chi2 / nu over the chi-square median's own ratio.
        let mut ratios: Vec<f64> = chi2.iter().filter(|(c, _)| c.is_finite()).map(|&(c, nu)| c / nu / (1.0 - 2.0 / (9.0 * nu)).powi(3)).collect();
        ratios.sort_by(f64::total_cmp);
        let scale = ratios.get(ratios.len() / 2).copied().filter(|s| *s > 0.0);
        let sigma: Vec<f64> = chi2
            .iter()
            .map(|&(c, nu)| match scale {
                Some(scale) if c.is_finite() => wilson_hilferty_sigma(c / scale, nu),
                _ => f64::NAN,
            })
            .collect();
        let lines: Vec<IfLine> = sigma
            .iter()
            .enumerate()
            .filter(|(_, z)| **z > IF_LINE_SIGMA)
            .map(|(k, &z)| IfLine { if_bin: k, if_offset_hz: k as f64 * self.bin_width_hz, if_profile_sigma: z, n_steps: self.steps[k] })
            .collect();
        IfScan { if_profile_sigma: sigma, if_steps: self.steps.clone(), lines, ..IfScan::default() }
    }

    /// The profile's significances, its lines, and the RF samples in those lines over the
    /// whole night (from the blocks not taken out).
    pub fn finish(&self) -> IfScan {
        let mut scan = self.profile();
        let in_line = scan.in_line();
        (scan.removed_weight, scan.removed_weighted_sum, scan.removed_if_bin) = (vec![0.0; self.n_rf], vec![0.0; self.n_rf], vec![-1; self.n_rf]);
        for (&block, top) in &self.top {
            for (j, w, ws, k) in top.in_lines(&in_line) {
                let at = block * BLOCK_BINS + j;
                (scan.removed_weight[at], scan.removed_weighted_sum[at], scan.removed_if_bin[at]) = (w, ws, k);
            }
        }
        scan
    }
}

impl IfScan {
    /// Per IF bin: whether it holds a line (significance above [`IF_LINE_SIGMA`]).
    pub fn in_line(&self) -> Vec<bool> {
        self.if_profile_sigma.iter().map(|z| *z > IF_LINE_SIGMA).collect()
    }
}

per_bin_loop! {
    /// Adds one step's standardised samples (equal-length slices; z and 1 / sigma, both 0 where
    /// there is no sample) to the per-IF-bin sums: w = inv^2, w r = z inv, w r^2 = z^2. No
    /// division and no branch, and the buffers come in as separate arguments, so the compiler
    /// knows they are distinct: the loop vectorises.
    fn add_to_sums(count: &mut [u32], w_sum: &mut [f64], wr_sum: &mut [f64], wrr_sum: &mut [f64], z: &[f32], inv: &[f32]) {
        let n = count.len().min(w_sum.len()).min(wr_sum.len()).min(wrr_sum.len()).min(z.len()).min(inv.len());
        for i in 0..n {
            let (z, inv) = (f64::from(z[i]), f64::from(inv[i]));
            count[i] += u32::from(inv > 0.0);
            w_sum[i] += inv * inv;
            wr_sum[i] += z * inv;
            wrr_sum[i] += z * z;
        }
    }
}

per_bin_loop! {
    /// Replaces, bin by bin, the kept most significant sample (z, 1 / sigma, IF bin) by one
    /// step's sample where that is a sample (inv > 0) and strictly more significant, so that of
    /// equal samples the first in step order stays. `first_if_bin` is the IF bin of the slices'
    /// first entry. A new maximum is rare after the first few steps, so each block of
    /// [`TOP_BLOCK_BINS`] is first tested as a whole, without a branch (a loop that
    /// vectorises), and only a block holding a new maximum is updated.
    fn keep_top(z_top: &mut [f32], inv_top: &mut [f32], k_top: &mut [u32], z: &[f32], inv: &[f32], first_if_bin: u32) {
        let n = z_top.len().min(inv_top.len()).min(k_top.len()).min(z.len()).min(inv.len());
        for start in (0..n).step_by(TOP_BLOCK_BINS) {
            let block = start..(start + TOP_BLOCK_BINS).min(n);
            let (tops, zs, invs) = (&z_top[block.clone()], &z[block.clone()], &inv[block.clone()]);
            let any = tops.iter().zip(zs).zip(invs).fold(false, |any, ((&top, &z), &inv)| any | ((inv > 0.0) & (z > top)));
            if any {
                for i in block {
                    if (inv[i] > 0.0) & (z[i] > z_top[i]) {
                        z_top[i] = z[i];
                        inv_top[i] = inv[i];
                        k_top[i] = first_if_bin + i as u32;
                    }
                }
            }
        }
    }
}

/// Normal significance of a chi-square value with `nu` degrees of freedom (Wilson-Hilferty:
/// (chi2 / nu)^(1/3) is close to normal with mean 1 - 2 / (9 nu), variance 2 / (9 nu)).
fn wilson_hilferty_sigma(chi2: f64, nu: f64) -> f64 {
    let v = 2.0 / (9.0 * nu);
    ((chi2 / nu).cbrt() - (1.0 - v)) / v.sqrt()
}

#[cfg(test)]
mod tests {
    use super::{keep_top, wilson_hilferty_sigma};

    /// The grouped top-sample update against the plain rule (a sample, inv > 0, replaces the
    /// kept one when its z is strictly higher; of equal ones the first stays), over steps of
    /// lengths that are not multiples of the group, with ties, missing samples and negative z.
    #[test]
    fn top_samples_follow_the_plain_rule() {
        for n in [0, 1, 3, 7, 8, 9, 17, 64] {
            let (mut z_top, mut inv_top, mut k_top) = (vec![f32::NEG_INFINITY; n], vec![0.0; n], vec![0u32; n]);
            let (mut z_want, mut inv_want, mut k_want) = (z_top.clone(), inv_top.clone(), k_top.clone());
            for step in 0..12u32 {
                // Values from a small set, so ties and repeats are common.
                let z: Vec<f32> = (0..n).map(|i| ((i as u32 * 7 + step * 5) % 9) as f32 - 4.0).collect();
                let inv: Vec<f32> = (0..n).map(|i| if (i as u32 + step).is_multiple_of(5) { 0.0 } else { 1.0 + step as f32 }).collect();
                keep_top(&mut z_top, &mut inv_top, &mut k_top, &z, &inv, 100 * step);
                for i in 0..n {
                    if inv[i] > 0.0 && z[i] > z_want[i] {
                        (z_want[i], inv_want[i], k_want[i]) = (z[i], inv[i], 100 * step + i as u32);
                    }
                }
            }
            assert_eq!((&z_top, &inv_top, &k_top), (&z_want, &inv_want, &k_want), "n = {n}");
        }
    }

    /// Wilson-Hilferty against chi-square quantiles computed with statrs (exact inverse CDF).
    #[test]
    fn wilson_hilferty_matches_chi_square_quantiles() {
        use statrs::distribution::{ChiSquared, ContinuousCDF, Normal};
        let normal = Normal::new(0.0, 1.0).unwrap();
        for nu in [10.0, 50.0, 200.0] {
            let chi = ChiSquared::new(nu).unwrap();
            for p in [0.5, 0.99, 1.0 - 2.87e-7] {
                let z = wilson_hilferty_sigma(chi.inverse_cdf(p), nu);
                assert!((z - normal.inverse_cdf(p)).abs() < 0.06 * normal.inverse_cdf(p).abs().max(1.0), "nu {nu} p {p}: {z}");
            }
        }
    }
}

//! Optimal filter with the standard halo lineshape: the grand spectrum.
//!
//! For an axion whose line starts at the lower edge of RF bin j the maximum-likelihood
//! amplitude is A_j = sum_k L_k R[j+k] / s[j+k]^2 / sum_k L_k^2 / s[j+k]^2 and
//! sigma_A,j = (sum_k L_k^2 / s[j+k]^2)^(-1/2), with L_k the fraction of the line's power in
//! bin k (lineshape integrated over the bin) and s the combined sigma. The lineshape is
//! evaluated anew every `segment_fraction` of relative frequency, so its width follows nu.
//!
//! Normalisation: the baseline fit also removes noise on the line's scale, so A/sigma_A has a
//! null spread below 1, and bins whose noise correlates (a windowed FFT's neighbours) raise it.
//! It is predicted from the kernels and the run files' `bin_correlation` as the spread of
//! (1 - h) * L over ||L|| (h the Savitzky-Golay interior kernel, * convolution; see
//! [`filtered_noise_spread`]), valid for Gaussian noise with weights that vary slowly across
//! the line, and the grand spectrum is A / (sigma_A * predicted spread). sigma_A itself is the
//! independent-bin formula: with correlated bins the filter is still unbiased but no longer
//! the minimum-variance one.
//! The night's own spread is reported beside it but never used.

use super::{BLOCK_BINS, Block, NightInfo, SpectrumStage, finite};
use crate::config::{BuildContext, Built, StageConfig};
use crate::dsp::correlate::{CorrelationScratch, Correlator, Planners};
use crate::dsp::spread::filtered_noise_spread;
use crate::physics::lineshape::HaloModel;
use crate::runfile::StepMeta;
use crate::simd::per_bin_loop;
use rayon::prelude::*;
use serde::Deserialize;

/// Halo model used by the filter.
#[derive(Debug, Clone, Copy, Deserialize, serde::Serialize, PartialEq)]
#[serde(rename_all = "snake_case")]
pub enum Halo {
    /// Isotropic Maxwellian at rest (Turner 1990).
    Maxwellian,
    /// The same halo seen from the moving Earth.
    LabFrame,
}

/// Options of the `filter` stage.
#[derive(Debug, Clone, Deserialize, serde::Serialize)]
#[serde(deny_unknown_fields)]
pub struct FilterConfig {
    /// "maxwellian" or "lab_frame".
    #[serde(default = "default_halo")]
    pub halo: Halo,
    /// RMS halo speed for the Maxwellian form, km/s.
    #[serde(default = "default_v_rms")]
    pub v_rms_km_s: f64,
    /// Circular speed v_0 for the lab-frame form, km/s.
    #[serde(default = "default_v0")]
    pub v0_km_s: f64,
    /// Earth's speed through the halo for the lab-frame form, km/s.
    #[serde(default = "default_v_earth")]
    pub v_earth_km_s: f64,
    /// Fraction of the line's power left outside the kernel.
    #[serde(default = "default_tail")]
    pub tail_fraction: f64,
    /// Relative frequency span over which one kernel is used.
    #[serde(default = "default_segment")]
    pub segment_fraction: f64,
}

fn default_halo() -> Halo {
    Halo::Maxwellian
}
fn default_v_rms() -> f64 {
    270.0
}
fn default_v0() -> f64 {
    220.0
}
fn default_v_earth() -> f64 {
    232.0
}
fn default_tail() -> f64 {
    1e-3
}
fn default_segment() -> f64 {
    1e-3
}

impl FilterConfig {
    /// The halo model these options describe.
    pub fn model(&self) -> HaloModel {
        match self.halo {
            Halo::Maxwellian => HaloModel::Maxwellian { v_rms_m_s: self.v_rms_km_s * 1e3 },
            Halo::LabFrame => HaloModel::LabFrame { v0_m_s: self.v0_km_s * 1e3, v_earth_m_s: self.v_earth_km_s * 1e3 },
        }
    }
}

impl StageConfig for FilterConfig {
    fn options(&self) -> toml::Table {
        crate::config::options_of(self)
    }
    fn validate(&self) -> Vec<(String, String)> {
        let mut p = Vec::new();
        for (k, v) in [("v_rms_km_s", self.v_rms_km_s), ("v0_km_s", self.v0_km_s)] {
            if !(v > 0.0 && v < 3e5) {
                p.push((k.to_string(), format!("{v} must be in (0, 3e5) km/s")));
            }
        }
        if !(self.v_earth_km_s >= 0.0 && self.v_earth_km_s < 3e5) {
            p.push(("v_earth_km_s".into(), format!("{} must be in [0, 3e5) km/s", self.v_earth_km_s)));
        }
        if !(self.tail_fraction > 0.0 && self.tail_fraction < 0.1) {
            p.push(("tail_fraction".into(), format!("{} must be in (0, 0.1)", self.tail_fraction)));
        }
        if !(self.segment_fraction > 0.0 && self.segment_fraction <= 0.1) {
            p.push(("segment_fraction".into(), format!("{} must be in (0, 0.1]", self.segment_fraction)));
        }
        p
    }
    fn build(&self, night: &NightInfo, ctx: &BuildContext) -> Result<Built, String> {
        let model = self.model();
        let (lo, hi) = night.rf_span_hz;
        let seg_bins = ((self.segment_fraction * lo / night.bin_width_hz).floor() as usize).max(1);
        let n = ((hi - lo) / night.bin_width_hz).round() as usize + 1;
        // Segments in parallel, each task's transforms planned once (the segments do not
        // depend on how they are shared out).
        let segments = (0..n.div_ceil(seg_bins))
            .into_par_iter()
            .map_init(Planners::default, |planners, s| {
                let centre_hz = lo + ((s * seg_bins) as f64 + seg_bins as f64 / 2.0) * night.bin_width_hz;
                let kernel = model.bin_fractions(centre_hz, night.bin_width_hz, self.tail_fraction);
                let spread = filtered_noise_spread(&kernel, ctx.baseline_kernel.as_deref(), &night.bin_correlation);
                let squared: Vec<f64> = kernel.iter().map(|l| l * l).collect();
                Segment { line: Correlator::with_planners(&kernel, planners), line_squared: Correlator::with_planners(&squared, planners), spread }
            })
            .collect();
        Ok(Built::Spectrum(Box::new(OptimalFilter { seg_bins, segments, mean_beta_sq: model.mean_beta_sq() })))
    }
}

/// RF bins whose filter outputs one task computes.
const PIECE_BINS: usize = 16384;

/// One lineshape kernel L_k and its square, prepared for FFT correlation.
struct Segment {
    line: Correlator,
    line_squared: Correlator,
    spread: f64,
}

struct OptimalFilter {
    seg_bins: usize,
    mean_beta_sq: f64,
    segments: Vec<Segment>,
}

impl SpectrumStage for OptimalFilter {
    /// The longest kernel's reach past a bin.
    fn lookahead_bins(&self) -> usize {
        self.segments.iter().map(|seg| seg.line.kernel_len().max(seg.line_squared.kernel_len()) - 1).max().unwrap_or(0)
    }
    /// Pieces of [`PIECE_BINS`] grid bins, counted from the grid's bin 0 (blocks start at
    /// multiples of it), each split where the kernel changes: every output comes from the
    /// same correlation of the same inputs however the grid is cut into blocks.
    fn apply_block(&self, sp: &mut Block, _steps: &[(usize, StepMeta)]) -> Result<(), String> {
        debug_assert!(sp.first_bin.is_multiple_of(PIECE_BINS) && BLOCK_BINS.is_multiple_of(PIECE_BINS));
        // The bins the block holds: its own and those read past its end.
        let n = sp.combined.len();
        let (mut weights, mut data) = (Vec::with_capacity(n), Vec::with_capacity(n));
        weigh(&sp.combined, &sp.combined_sigma, &mut weights, &mut data);
        // with_data[j]: bins with data before j. Every L_k is positive (the lineshape's power
        // fraction in a bin), so the denominator is zero exactly when no bin under the kernel
        // holds data; this decides it without the FFT's rounding.
        let mut with_data = Vec::with_capacity(n + 1);
        with_data.push(0u32);
        for w in &weights {
            with_data.push(with_data.last().copied().unwrap_or(0) + u32::from(*w > 0.0));
        }
        let len = sp.len;
        let mut amplitude = std::mem::take(&mut sp.amplitude);
        let mut sigma_a = std::mem::take(&mut sp.sigma_a);
        let mut spread = std::mem::take(&mut sp.predicted_spread);
        let mut grand = std::mem::take(&mut sp.grand);
        // Every value is written below: buffers of an earlier block of the same length are
        // taken as they are, not zeroed first.
        for v in [&mut amplitude, &mut sigma_a, &mut spread, &mut grand] {
            v.resize(len, 0.0);
        }
        let origin = sp.first_bin;
        // Fixed pieces, each computed alone: the result does not depend on the thread count.
        let pieces = amplitude.par_chunks_mut(PIECE_BINS).zip(sigma_a.par_chunks_mut(PIECE_BINS)).zip(spread.par_chunks_mut(PIECE_BINS));
        pieces.zip(grand.par_chunks_mut(PIECE_BINS)).enumerate().for_each(|(piece, (((num, den), spread), grand))| {
            let mut scratch = CorrelationScratch::default();
            // Block-local bins start..end; grid bin = origin + local bin.
            let start = piece * PIECE_BINS;
            let end = start + num.len();
            // Split the piece where the kernel changes.
            let mut a = start;
            while a < end {
                let seg = &self.segments[(origin + a) / self.seg_bins];
                let b = (((origin + a) / self.seg_bins + 1) * self.seg_bins - origin).min(end);
                let reach = (b + seg.line.kernel_len() - 1).min(n);
                let (lo, hi) = (a - start, b - start);
                seg.line.correlate_with(&data[a..reach], &mut num[lo..hi], &mut scratch);
                seg.line_squared.correlate_with(&weights[a..reach], &mut den[lo..hi], &mut scratch);
                // The counts of bins with data before each bin and before the kernel's end
                // (the grid's end where the kernel reaches past it).
                let ahead_start = (a + seg.line.kernel_len()).min(n);
                let inside = (n - ahead_start).min(b - a);
                let (with_data_here, mut with_data_ahead) = (&with_data[a..b], with_data[ahead_start..ahead_start + inside].to_vec());
                with_data_ahead.resize(b - a, with_data[n]);
                let outputs = Outputs { num: &mut num[lo..hi], den: &mut den[lo..hi], spread: &mut spread[lo..hi], grand: &mut grand[lo..hi] };
                finish_outputs(outputs, with_data_here, &with_data_ahead, seg.spread);
                a = b;
            }
        });
        drop((weights, data, with_data));
        sp.mean_beta_sq = self.mean_beta_sq;
        sp.grand = grand;
        sp.amplitude = amplitude;
        sp.sigma_a = sigma_a;
        sp.predicted_spread = spread;
        Ok(())
    }
}

per_bin_loop! {
    /// The filter's inputs from the combined spectrum: the weight 1 / sigma^2 of each bin (0
    /// without data) into `weights` and the weighted excess R / sigma^2 (0 without data)
    /// into `data`, appended.
    fn weigh(combined: &[f64], combined_sigma: &[f64], weights: &mut Vec<f64>, data: &mut Vec<f64>) {
        weights.extend(combined_sigma.iter().map(|&s| if finite(s) { 1.0 / (s * s) } else { 0.0 }));
        data.extend(combined.iter().zip(weights.iter()).map(|(&r, &w)| if w > 0.0 { r * w } else { 0.0 }));
    }
}

/// The filter's per-bin outputs over one run of bins with one kernel: on entry `num` and
/// `den` hold the two correlations.
struct Outputs<'a> {
    num: &'a mut [f64],
    den: &'a mut [f64],
    spread: &'a mut [f64],
    grand: &'a mut [f64],
}

per_bin_loop! {
    /// Turns the correlations into A (in `num`), sigma_A (in `den`), the predicted spread and
    /// the grand spectrum A / (sigma_A * predicted spread); A is NaN and sigma_A infinite
    /// where no bin under the kernel holds data (`with_data_ahead[j]`, the bins with data
    /// before the kernel's end, equals `with_data_here[j]`, those before bin j).
    fn finish_outputs<'a>(out: Outputs<'a>, with_data_here: &[u32], with_data_ahead: &[u32], predicted_spread: f64) {
        let Outputs { num, den, spread, grand } = out;
        let bins = num.iter_mut().zip(den.iter_mut()).zip(spread.iter_mut()).zip(grand.iter_mut());
        for ((((num, den), spread), grand), (&here, &ahead)) in bins.zip(with_data_here.iter().zip(with_data_ahead)) {
            let covered = ahead > here;
            (*num, *den) = if covered { (*num / *den, den.sqrt().recip()) } else { (f64::NAN, f64::INFINITY) };
            *spread = predicted_spread;
            *grand = *num / (*den * predicted_spread);
        }
    }
}

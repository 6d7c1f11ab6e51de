//! Baseline removal: the common gain shape, then a Savitzky-Golay fit per step.
//!
//! The gain shape G[k] is the mean raw power of all accepted steps in IF bin k, normalised
//! to mean 1. Each step is divided by G, smoothed with a Savitzky-Golay filter (Savitzky &
//! Golay, Anal. Chem. 36, 1627 (1964)) of `window_bins` and `order`, and turned into
//! delta = P / (G * SG) - 1. Edge bins: within half a window of either end the polynomial
//! fitted to the first or last `window_bins` bins is evaluated (as scipy's mode "interp"), so
//! every bin gets a value. Missing bins (NaN) are bridged by linear interpolation for the
//! fit only and stay NaN in the output. Steps whose residual spread departs from the
//! radiometer prediction sqrt(F / N) by more than `max_spread_deviation` are cut, F the share
//! of one bin's noise variance the fit leaves (1 - h0 for independent bins, h0 the kernel's
//! centre weight; with the run files' `bin_correlation`, see [`filtered_noise_spread`]).
//!
//! Precision: the interior of the fit is an FFT correlation with single-precision transforms,
//! taken about the step's mean level (edges, gain, residual and everything after are f64).
//! The fit is then within about 2e-7 of the step's largest departure from its mean: a few
//! 1e-10 in delta for a step with a 5 % ripple, a millionth of the radiometer spread of even
//! 1e6 averages, and below the f32 rounding of the stored spectra (tests/fast_paths.rs). It
//! halves the cost of the fit, the largest part of a reduction.

use super::{NightInfo, Step, StepStage, Verdict, finite};
use crate::config::{BuildContext, Built, StageConfig};
use crate::dsp::savgol::{SavitzkyGolay, SmoothingPlan, SmoothingScratch};
use crate::dsp::spread::filtered_noise_spread;
use crate::simd::per_bin_loop;
use rayon::prelude::*;
use serde::Deserialize;
use std::cell::RefCell;

/// Options of the `baseline` stage.
#[derive(Debug, Clone, Deserialize, serde::Serialize)]
#[serde(deny_unknown_fields)]
pub struct BaselineConfig {
    /// Savitzky-Golay window, bins (odd; several times the signal width).
    pub window_bins: usize,
    /// Savitzky-Golay polynomial order (< window_bins).
    pub order: usize,
    /// Largest accepted fractional departure of a step's residual spread from prediction.
    #[serde(default = "default_spread")]
    pub max_spread_deviation: f64,
}

fn default_spread() -> f64 {
    0.2
}

impl StageConfig for BaselineConfig {
    fn options(&self) -> toml::Table {
        crate::config::options_of(self)
    }
    fn validate(&self) -> Vec<(String, String)> {
        let mut p = Vec::new();
        if self.window_bins < 3 || self.window_bins.is_multiple_of(2) {
            p.push(("window_bins".into(), format!("{} must be odd and >= 3", self.window_bins)));
        }
        if self.order >= self.window_bins {
            p.push(("order".into(), format!("{} must be smaller than window_bins ({})", self.order, self.window_bins)));
        }
        if !(self.max_spread_deviation > 0.0 && self.max_spread_deviation.is_finite()) {
            p.push(("max_spread_deviation".into(), format!("{} must be > 0", self.max_spread_deviation)));
        }
        p
    }
    fn build(&self, night: &NightInfo, _ctx: &BuildContext) -> Result<Built, String> {
        if self.window_bins > night.n_bins {
            return Err(format!("window_bins = {} exceeds the {} bins per step", self.window_bins, night.n_bins));
        }
        let sg = SavitzkyGolay::new(self.window_bins, self.order).map_err(|e| e.to_string())?;
        let residual_fraction = filtered_noise_spread(&[1.0], Some(sg.coefficients()), &night.bin_correlation).powi(2);
        Ok(Built::Step(Box::new(Baseline {
            residual_fraction,
            plan: sg.plan_in::<f32>(night.n_bins).map_err(|e| e.to_string())?,
            max_dev: self.max_spread_deviation,
            gain_sum: vec![0.0; night.n_bins],
            gain_count: vec![0u32; night.n_bins],
            gain: Vec::new(),
            inverse_gain: Vec::new(),
        })))
    }
    fn baseline_kernel(&self) -> Option<Vec<f64>> {
        SavitzkyGolay::new(self.window_bins, self.order).ok().map(|s| s.coefficients().to_vec())
    }
}

struct Baseline {
    /// The Savitzky-Golay fit, planned once for the night's number of bins, with single-
    /// precision transforms (see the module documentation).
    plan: SmoothingPlan<f32>,
    /// Share of one bin's noise variance left in the residual (F in the module documentation).
    residual_fraction: f64,
    max_dev: f64,
    gain_sum: Vec<f64>,
    gain_count: Vec<u32>,
    gain: Vec<f64>,
    /// 1 / gain, so that each step is flattened by multiplication.
    inverse_gain: Vec<f64>,
}

/// Per-thread buffers of [`Baseline::apply`], reused from step to step.
#[derive(Default)]
struct Work {
    /// P / G with gaps bridged, bins.
    flat: Vec<f64>,
    /// The Savitzky-Golay fit of `flat`.
    fit: Vec<f64>,
    scratch: SmoothingScratch<f32>,
}

thread_local! {
    static WORK: RefCell<Work> = RefCell::new(Work::default());
}

impl StepStage for Baseline {
    fn needs_survey(&self) -> bool {
        true
    }
    fn survey(&mut self, step: &Step) {
        add_power(&mut self.gain_sum, &mut self.gain_count, &step.values);
    }
    /// IF pieces of [`SURVEY_PIECE_BINS`] in parallel, each summing the steps in their order.
    fn survey_all(&mut self, steps: &[&Step]) {
        self.gain_sum.par_chunks_mut(SURVEY_PIECE_BINS).zip(self.gain_count.par_chunks_mut(SURVEY_PIECE_BINS)).enumerate().for_each(
            |(piece, (sums, counts))| {
                let a = piece * SURVEY_PIECE_BINS;
                for step in steps {
                    if let Some(values) = step.values.get(a..) {
                        add_power(sums, counts, values);
                    }
                }
            },
        );
    }
    fn finish_survey(&mut self) -> Result<(), String> {
        let mean: Vec<f64> = self.gain_sum.iter().zip(&self.gain_count).map(|(&s, &c)| if c > 0 { s / f64::from(c) } else { f64::NAN }).collect();
        let finite: Vec<f64> = mean.iter().copied().filter(|v| v.is_finite()).collect();
        if finite.is_empty() {
            return Err("no accepted step holds valid power: cannot form the gain shape".into());
        }
        let norm = finite.iter().sum::<f64>() / finite.len() as f64;
        self.gain = mean.iter().map(|v| v / norm).collect();
        self.inverse_gain = self.gain.iter().map(|g| g.recip()).collect();
        Ok(())
    }
    fn apply(&self, step: &mut Step, _night: &NightInfo) -> Verdict {
        let n = self.plan.n_bins();
        if step.values.len() != n {
            return Verdict::Cut(format!("{} bins where the Savitzky-Golay fit was planned for {n}", step.values.len()));
        }
        WORK.with_borrow_mut(|work| {
            let Work { flat, fit, scratch } = work;
            flat.resize(n, 0.0);
            if multiply_counting_finite(&step.values, &self.inverse_gain, flat) < n {
                bridge_gaps(flat);
            }
            fit.resize(n, 0.0);
            self.plan.smooth_with(flat, fit, scratch).expect("buffers have the planned length");
            let measured = residual_and_its_rms(&mut step.values, flat, fit);
            let expected = (self.residual_fraction / step.meta.n_averages as f64).sqrt();
            if (measured / expected - 1.0).abs() > self.max_dev {
                return Verdict::Cut(format!("residual spread {measured:.3e} departs from predicted {expected:.3e} by more than {:.0}%", 100.0 * self.max_dev));
            }
            Verdict::Keep
        })
    }
}

/// IF bins one task of [`Baseline::survey_all`] accumulates.
const SURVEY_PIECE_BINS: usize = 4096;

per_bin_loop! {
    /// Adds the finite values to `sums` and counts them in `counts`, bin by bin over the common
    /// length.
    fn add_power(sums: &mut [f64], counts: &mut [u32], values: &[f64]) {
        for ((s, c), &p) in sums.iter_mut().zip(counts.iter_mut()).zip(values) {
            let valid = finite(p);
            *s += if valid { p } else { 0.0 };
            *c += u32::from(valid);
        }
    }
}

per_bin_loop! {
    /// `out[k] = a[k] * b[k]` over the common length; returns how many products are finite. The
    /// per-bin loops of this stage take slices as arguments, so the compiler knows the buffers
    /// are distinct, and count without branches: they vectorise.
    fn multiply_counting_finite(a: &[f64], b: &[f64], out: &mut [f64]) -> usize {
        let mut count = 0;
        for (o, (&a, &b)) in out.iter_mut().zip(a.iter().zip(b)) {
            *o = a * b;
            count += usize::from(finite(*o));
        }
        count
    }
}

per_bin_loop! {
    /// Replaces every value that holds data by delta = x / fit - 1 (bins without, NaN after
    /// ingest, are left as they are, since `flat` was bridged over them) and returns the root mean
    /// square of the finite deltas (0 if there are none). The ratio is formed in `fit` first, for
    /// every bin, so the division is not tied to the test; the second loop selects and sums in
    /// four interleaved partial sums, which keep the additions off one serial chain. Both loops
    /// vectorise, and the sum does not depend on the SIMD level.
    fn residual_and_its_rms(values: &mut [f64], flat: &[f64], fit: &mut [f64]) -> f64 {
        const LANES: usize = 4;
        let n = values.len().min(flat.len()).min(fit.len());
        let (values, flat, fit) = (&mut values[..n], &flat[..n], &mut fit[..n]);
        for (f, &x) in fit.iter_mut().zip(flat) {
            *f = x / *f - 1.0;
        }
        let (mut sums, mut counts) = ([0.0f64; LANES], [0u64; LANES]);
        let mut groups = values.chunks_exact_mut(LANES);
        for (v, delta) in (&mut groups).zip(fit.chunks_exact(LANES)) {
            for lane in 0..LANES {
                let valid = finite(v[lane]);
                v[lane] = if valid { delta[lane] } else { v[lane] };
                let counted = valid & finite(delta[lane]);
                sums[lane] += if counted { delta[lane] * delta[lane] } else { 0.0 };
                counts[lane] += u64::from(counted);
            }
        }
        let whole = n - n % LANES;
        for (v, &delta) in groups.into_remainder().iter_mut().zip(&fit[whole..]) {
            if finite(*v) {
                *v = delta;
                if finite(delta) {
                    sums[0] += delta * delta;
                    counts[0] += 1;
                }
            }
        }
        let count = counts.iter().sum::<u64>();
        ((sums[0] + sums[1] + (sums[2] + sums[3])) / count.max(1) as f64).sqrt()
    }
}

/// Linear interpolation across runs of non-finite values, in place (constant extension at
/// the ends; a slice with no finite value is left as it is).
fn bridge_gaps(x: &mut [f64]) {
    let n = x.len();
    let mut previous: Option<usize> = None;
    let mut i = 0;
    while i < n {
        if x[i].is_finite() {
            previous = Some(i);
            i += 1;
            continue;
        }
        let start = i;
        while i < n && !x[i].is_finite() {
            i += 1;
        }
        match (previous, i < n) {
            (Some(a), true) => {
                let (xa, xb) = (x[a], x[i]);
                for (k, slot) in x.iter_mut().enumerate().take(i).skip(start) {
                    let t = (k - a) as f64 / (i - a) as f64;
                    *slot = xa + t * (xb - xa);
                }
            }
            (Some(a), false) => {
                let xa = x[a];
                x[start..].fill(xa);
            }
            (None, true) => {
                let xb = x[i];
                x[..i].fill(xb);
            }
            (None, false) => {}
        }
    }
}

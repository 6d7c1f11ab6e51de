//! Baseline removal: the common gain shape, then a Savitzky-Golay fit per step.
//!
//! The gain shape G[k] is the mean raw power of all accepted steps in IF bin k, normalised
//! to mean 1. Each step is divided by G, smoothed with a Savitzky-Golay filter (Savitzky &
//! Golay, Anal. Chem. 36, 1627 (1964)) of `window_bins` and `order`, and turned into
//! delta = P / (G * SG) - 1. Edge bins: within half a window of either end the polynomial
//! fitted to the first or last `window_bins` bins is evaluated (as scipy's mode "interp"), so
//! every bin gets a value. Missing bins (NaN) are bridged by linear interpolation for the
//! fit only and stay NaN in the output. Steps whose residual spread departs from the
//! radiometer prediction sqrt((1 - h0) / N) by more than `max_spread_deviation` are cut.

use super::{NightInfo, Step, StepStage, Verdict};
use crate::config::{BuildContext, Built, StageConfig};
use crate::dsp::savgol::SavitzkyGolay;
use serde::Deserialize;

/// Options of the `baseline` stage.
#[derive(Debug, Clone, Deserialize)]
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
    fn validate(&self) -> Vec<(String, String)> {
        let mut p = Vec::new();
        if self.window_bins < 3 || self.window_bins % 2 == 0 {
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
        Ok(Built::Step(Box::new(Baseline {
            sg,
            max_dev: self.max_spread_deviation,
            gain_sum: vec![0.0; night.n_bins],
            gain_count: vec![0u32; night.n_bins],
            gain: Vec::new(),
        })))
    }
    fn baseline_kernel(&self) -> Option<Vec<f64>> {
        SavitzkyGolay::new(self.window_bins, self.order).ok().map(|s| s.coefficients().to_vec())
    }
}

struct Baseline {
    sg: SavitzkyGolay,
    max_dev: f64,
    gain_sum: Vec<f64>,
    gain_count: Vec<u32>,
    gain: Vec<f64>,
}

impl StepStage for Baseline {
    fn needs_survey(&self) -> bool {
        true
    }
    fn survey(&mut self, step: &Step) {
        for ((s, c), &p) in self.gain_sum.iter_mut().zip(&mut self.gain_count).zip(&step.values) {
            if p.is_finite() {
                *s += p;
                *c += 1;
            }
        }
    }
    fn finish_survey(&mut self) -> Result<(), String> {
        let mean: Vec<f64> = self.gain_sum.iter().zip(&self.gain_count).map(|(&s, &c)| if c > 0 { s / f64::from(c) } else { f64::NAN }).collect();
        let finite: Vec<f64> = mean.iter().copied().filter(|v| v.is_finite()).collect();
        if finite.is_empty() {
            return Err("no accepted step holds valid power: cannot form the gain shape".into());
        }
        let norm = finite.iter().sum::<f64>() / finite.len() as f64;
        self.gain = mean.iter().map(|v| v / norm).collect();
        Ok(())
    }
    fn apply(&self, step: &mut Step, _night: &NightInfo) -> Verdict {
        let flat: Vec<f64> = step.values.iter().zip(&self.gain).map(|(p, g)| p / g).collect();
        let filled = bridge_gaps(&flat);
        let Ok(fit) = self.sg.smooth(&filled) else {
            return Verdict::Cut("too few bins for the Savitzky-Golay window".into());
        };
        let (mut sum2, mut n) = (0.0, 0usize);
        for ((v, &x), &f) in step.values.iter_mut().zip(&flat).zip(&fit) {
            *v = x / f - 1.0;
            if v.is_finite() {
                sum2 += *v * *v;
                n += 1;
            }
        }
        let measured = (sum2 / n.max(1) as f64).sqrt();
        let expected = ((1.0 - self.sg.center_weight()) / step.meta.n_averages as f64).sqrt();
        if (measured / expected - 1.0).abs() > self.max_dev {
            return Verdict::Cut(format!("residual spread {measured:.3e} departs from predicted {expected:.3e} by more than {:.0}%", 100.0 * self.max_dev));
        }
        Verdict::Keep
    }
}

/// Linear interpolation across NaN runs (constant extension at the ends).
fn bridge_gaps(x: &[f64]) -> Vec<f64> {
    let mut out = x.to_vec();
    let good: Vec<usize> = (0..x.len()).filter(|&i| x[i].is_finite()).collect();
    let (Some(&first), Some(&last)) = (good.first(), good.last()) else { return out };
    for w in good.windows(2) {
        let (a, b) = (w[0], w[1]);
        for i in a + 1..b {
            let t = (i - a) as f64 / (b - a) as f64;
            out[i] = x[a] + t * (x[b] - x[a]);
        }
    }
    out[..first].fill(x[first]);
    out[last + 1..].fill(x[last]);
    out
}

//! Synthetic axion signals added to raw spectra: the simulator's axions and the
//! calibration's injections share this one model of what a signal looks like.
//!
//! An axion of frequency nu_a and coupling g_gamma deposits in a bin [f, f + dnu_b] the power
//! P_sig(nu_a) (F(f + dnu_b - nu_a) - F(f - nu_a)), with P_sig the cavity signal power (cavity
//! Lorentzian at nu_a included) and F the cumulative halo lineshape.

use crate::physics::lineshape::HaloModel;
use crate::physics::signal::{CavityState, Haloscope, signal_power_w};

/// Bins around an injected bin used to estimate the local raw power level.
const LEVEL_HALF_WIDTH_BINS: usize = 32;

/// One synthetic axion.
#[derive(Debug, Clone, Copy, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct SyntheticAxion {
    /// Axion frequency nu_a (where the line starts), Hz.
    pub freq_hz: f64,
    /// Dimensionless photon coupling g_gamma (KSVZ = -0.97; only its square matters).
    pub g_gamma: f64,
}

/// The halo and density that turn an axion into power.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct SignalModel {
    /// Lineshape of the signal.
    pub halo: HaloModel,
    /// Local dark-matter density, GeV/cm^3.
    pub dm_density_gev_per_cm3: f64,
}

impl SignalModel {
    /// Power (W) of each axion falling in consecutive bins of one step, added to `excess_w`.
    /// Bin k has centre `start_freq_hz + k * bin_width_hz`. Only bins the line reaches are
    /// visited: the line is taken to end 10 nu_a <beta^2> above nu_a (tail below 1e-9).
    pub fn add_power_w(&self, axions: &[SyntheticAxion], scope: &Haloscope, cavity: &CavityState, start_freq_hz: f64, bin_width_hz: f64, excess_w: &mut [f64]) {
        for a in axions {
            let total_w = signal_power_w(a.g_gamma, self.dm_density_gev_per_cm3, scope, cavity, a.freq_hz);
            let extent_hz = 10.0 * a.freq_hz * self.halo.mean_beta_sq();
            let to_bin = |f: f64| ((f - start_freq_hz) / bin_width_hz + 0.5).floor();
            let first = to_bin(a.freq_hz).max(0.0) as usize;
            let last = (to_bin(a.freq_hz + extent_hz) + 1.0).clamp(0.0, excess_w.len() as f64) as usize;
            for k in first..last {
                let lower_offset_hz = start_freq_hz + (k as f64 - 0.5) * bin_width_hz - a.freq_hz;
                let fraction = self.halo.cdf(a.freq_hz, lower_offset_hz + bin_width_hz) - self.halo.cdf(a.freq_hz, lower_offset_hz);
                excess_w[k] += fraction * total_w;
            }
        }
    }

    /// Adds the axions to a measured raw spectrum, whose receiver gain is unknown: the power
    /// in bin k is scaled by the local raw level (mean of the finite raw power within 32 bins)
    /// over the step's noise power `noise_w` = k_B T_sys dnu_b, so the signal sees the same gain
    /// as the noise around it.
    pub fn inject_into_raw(
        &self,
        axions: &[SyntheticAxion],
        scope: &Haloscope,
        cavity: &CavityState,
        start_freq_hz: f64,
        bin_width_hz: f64,
        noise_w: f64,
        raw: &mut [f64],
    ) {
        let mut excess_w = vec![0.0; raw.len()];
        self.add_power_w(axions, scope, cavity, start_freq_hz, bin_width_hz, &mut excess_w);
        let levels: Vec<(usize, f64)> = excess_w
            .iter()
            .enumerate()
            .filter(|(_, e)| **e > 0.0)
            .map(|(k, _)| {
                let window = &raw[k.saturating_sub(LEVEL_HALF_WIDTH_BINS)..(k + LEVEL_HALF_WIDTH_BINS + 1).min(raw.len())];
                let (sum, n) = window.iter().filter(|p| p.is_finite()).fold((0.0, 0usize), |(s, n), p| (s + p, n + 1));
                (k, if n > 0 { sum / n as f64 } else { f64::NAN })
            })
            .collect();
        for (k, level) in levels {
            raw[k] += excess_w[k] / noise_w * level;
        }
    }
}

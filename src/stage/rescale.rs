//! Rescale: each bin in units of the reference axion's power in that bin.
//!
//! R[k] = delta[k] * k_B T_sys dnu_b / P_sig(f_k) and sigma[k] = k_B T_sys dnu_b /
//! (P_sig(f_k) sqrt(N)), with P_sig the power of an axion of the reference coupling at the
//! bin's RF frequency f_k, cavity Lorentzian included. 1.0 means the whole power of the
//! reference axion falls in the bin.
//!
//! The stage writes the bins as the accumulations take them ([`Step::standard`]): the
//! significance z = R / sigma = delta sqrt(N), in which the scale cancels, and 1 / sigma.

use super::{NightInfo, Standardised, Step, StepStage, Verdict, finite};
use crate::config::{BuildContext, Built, StageConfig};
use crate::physics::constants::{BOLTZMANN_J_PER_K, G_GAMMA_DFSZ, G_GAMMA_KSVZ};
use crate::physics::signal::{CavityState, Haloscope, signal_power_w};
use crate::simd::per_bin_loop;
use serde::Deserialize;

/// The reference axion-photon coupling, as a model name or a value of g_gamma.
#[derive(Debug, Clone, Deserialize, serde::Serialize)]
#[serde(untagged)]
pub enum Reference {
    /// "ksvz" or "dfsz".
    Model(String),
    /// A dimensionless g_gamma.
    Value(f64),
}

/// Options of the `rescale` stage.
#[derive(Debug, Clone, Deserialize, serde::Serialize)]
#[serde(deny_unknown_fields)]
pub struct RescaleConfig {
    /// Reference coupling: "ksvz", "dfsz" or a number (g_gamma).
    #[serde(default = "default_reference")]
    pub reference: Reference,
    /// Local dark-matter density, GeV/cm^3.
    #[serde(default = "default_density")]
    pub dm_density_gev_per_cm3: f64,
}

fn default_reference() -> Reference {
    Reference::Model("ksvz".into())
}
fn default_density() -> f64 {
    crate::physics::constants::DEFAULT_DM_DENSITY_GEV_PER_CM3
}

/// Accepted magnitudes of a numeric reference g_gamma (the models sit near 1: KSVZ -0.97,
/// DFSZ 0.36). Within them 1 / sigma stays far inside the range of f32, in which the
/// standardised bins are held, for any Q, detuning and number of averages of a real step.
const G_GAMMA_RANGE: (f64, f64) = (1e-6, 1e6);

impl RescaleConfig {
    /// The reference g_gamma, if the option names a known model or a number whose magnitude
    /// lies in [`G_GAMMA_RANGE`].
    pub fn g_gamma(&self) -> Option<f64> {
        match &self.reference {
            Reference::Model(m) if m == "ksvz" => Some(G_GAMMA_KSVZ),
            Reference::Model(m) if m == "dfsz" => Some(G_GAMMA_DFSZ),
            Reference::Value(v) if (G_GAMMA_RANGE.0..=G_GAMMA_RANGE.1).contains(&v.abs()) => Some(*v),
            _ => None,
        }
    }
}

impl StageConfig for RescaleConfig {
    fn options(&self) -> toml::Table {
        crate::config::options_of(self)
    }
    fn validate(&self) -> Vec<(String, String)> {
        let mut p = Vec::new();
        if self.g_gamma().is_none() {
            let (lo, hi) = G_GAMMA_RANGE;
            let given = match &self.reference {
                Reference::Model(m) => format!("{m:?}"),
                Reference::Value(v) => format!("{v:e}"),
            };
            p.push(("reference".into(), format!("{given} is not valid; choose \"ksvz\", \"dfsz\" or a number of magnitude {lo:e} to {hi:e}")));
        }
        if !(self.dm_density_gev_per_cm3 > 0.0 && self.dm_density_gev_per_cm3 < 100.0) {
            p.push(("dm_density_gev_per_cm3".into(), format!("{} must be in (0, 100) GeV/cm^3", self.dm_density_gev_per_cm3)));
        }
        p
    }
    fn build(&self, _night: &NightInfo, _ctx: &BuildContext) -> Result<Built, String> {
        let g_gamma = self.g_gamma().ok_or("invalid reference coupling")?;
        Ok(Built::Step(Box::new(Rescale { g_gamma, density: self.dm_density_gev_per_cm3 })))
    }
}

struct Rescale {
    g_gamma: f64,
    density: f64,
}

impl StepStage for Rescale {
    fn apply(&self, step: &mut Step, night: &NightInfo) -> Verdict {
        let h = &night.headers[step.file];
        let scope = Haloscope { magnet_field_t: h.magnet_field_t, cavity_volume_m3: h.cavity_volume_m3, form_factor: h.form_factor };
        let m = step.meta;
        let cavity = CavityState { cavity_freq_hz: m.cavity_freq_hz, loaded_q: m.loaded_q, coupling_beta: m.coupling_beta };
        let noise_w = BOLTZMANN_J_PER_K * m.noise_temp_k * night.bin_width_hz;
        // P_sig(f) = P_sig(f_c) / (1 + 4 Q^2 (f / f_c - 1)^2): the on-resonance power once per
        // step, the Lorentzian per bin.
        let on_resonance = noise_w / signal_power_w(self.g_gamma, self.density, &scope, &cavity, m.cavity_freq_hz);
        // Detuning f_k / f_c - 1 of bin k, as its value at bin 0 plus k steps of dnu_b / f_c.
        let (detuning_0, detuning_step) = (m.start_freq_hz / m.cavity_freq_hz - 1.0, night.bin_width_hz / m.cavity_freq_hz);
        let four_q2 = 4.0 * m.loaded_q * m.loaded_q;
        let root_n = (m.n_averages as f64).sqrt();
        let Standardised { z, inverse_sigma } = &mut step.standard;
        // Every entry is written below; buffers reused from a step of the same length are not
        // touched by the resizing.
        z.resize(step.values.len(), 0.0);
        inverse_sigma.resize(step.values.len(), 0.0);
        standardise_bins(&step.values, z, inverse_sigma, Lorentzian { on_resonance, detuning_0, detuning_step, four_q2 }, root_n);
        Verdict::Keep
    }
}

/// Reference-axion power per bin as a Lorentzian in the detuning f_k / f_c - 1, in units of
/// the noise power per bin.
struct Lorentzian {
    /// Noise power over the on-resonance signal power.
    on_resonance: f64,
    /// Detuning of bin 0.
    detuning_0: f64,
    /// Detuning added per bin, dnu_b / f_c.
    detuning_step: f64,
    /// 4 Q_L^2.
    four_q2: f64,
}

per_bin_loop! {
    /// Fills `z` with delta sqrt(N) and `inverse_sigma` with sqrt(N) / scale, rounded to f32,
    /// both 0 where the bin holds no sample (delta not finite, or 1 / sigma not finite and
    /// positive in f32; the reference coupling's accepted range keeps it well inside). Equal-length
    /// slices, one division and no branch per bin: the loop vectorises. The bin index is counted
    /// as `i32` (a step has at most `runfile::MAX_BINS_PER_STEP` = 2^20 bins), which converts to
    /// f64 by a packed instruction where `usize` has none.
    fn standardise_bins(delta: &[f64], z: &mut [f32], inverse_sigma: &mut [f32], line: Lorentzian, root_n: f64) {
        let n = delta.len().min(z.len()).min(inverse_sigma.len());
        let (delta, z, inverse_sigma) = (&delta[..n], &mut z[..n], &mut inverse_sigma[..n]);
        for (((&d, z), inv), k) in delta.iter().zip(z.iter_mut()).zip(inverse_sigma.iter_mut()).zip(0i32..) {
            let inverse = (root_n / line.scale(k)) as f32;
            let valid = finite(d) & (inverse > 0.0) & (inverse <= f32::MAX);
            *z = if valid { (d * root_n) as f32 } else { 0.0 };
            *inv = if valid { inverse } else { 0.0 };
        }
    }
}

impl Lorentzian {
    /// The scale of bin `k`: noise power over the reference axion's power in that bin.
    #[inline]
    fn scale(&self, k: i32) -> f64 {
        let detuning = self.detuning_0 + f64::from(k) * self.detuning_step;
        self.on_resonance * (1.0 + self.four_q2 * detuning * detuning)
    }
}

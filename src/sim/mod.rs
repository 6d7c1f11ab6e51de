//! The simulator: writes realistic run files of an invented haloscope from a scenario TOML.
//!
//! Each step: raw power P[k] = G[k] b_i[k] (k_B T dnu_b (1 + n_k / sqrt(N)) + S_k + I_k), with
//! G a fixed gain ripple, b_i a slowly varying per-step baseline (random quadratic), n_k unit
//! Gaussian noise, S_k injected axion power (signal power formula times the lineshape
//! integrated over the bin) and I_k narrowband interference fixed in IF or RF (IF lines also as
//! bursts, on for a range of steps only). Step i uses a random stream seeded by (seed, i), so
//! files are reproducible whatever the thread count. [`capture`] writes the same night as an IQ
//! capture instead.

pub mod capture;

use crate::inject::{SignalModel, SyntheticAxion};
use crate::physics::constants::{BOLTZMANN_J_PER_K, DEFAULT_DM_DENSITY_GEV_PER_CM3, G_GAMMA_KSVZ};
use crate::physics::lineshape::HaloModel;
use crate::physics::signal::{CavityState, Haloscope};
use crate::runfile::{RunFileError, RunHeader, RunWriter, StepMeta};
use ndarray::Array1;
use rand::SeedableRng;
use rand::rngs::StdRng;
use rand_distr::{Distribution, StandardNormal, Uniform};
use rayon::prelude::*;
use serde::Deserialize;
use std::path::Path;

/// RMS halo speed of the simulated axions (the default Maxwellian), m/s.
pub const SIGNAL_V_RMS_M_S: f64 = 270e3;

/// A simulated night.
#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Scenario {
    /// Seed of all random streams.
    pub seed: u64,
    /// Label written into the file.
    pub run_label: String,
    /// Magnet and cavity.
    pub facility: Facility,
    /// Tuning and receiver settings.
    pub scan: Scan,
    /// Narrowband interference lines.
    #[serde(default)]
    pub interference: Vec<Interference>,
    /// Interference lines fixed in IF that are on for a range of steps only.
    #[serde(default)]
    pub if_burst: Vec<IfBurst>,
    /// Injected axion signals.
    #[serde(default)]
    pub axion: Vec<Axion>,
}

/// Magnet and cavity of the invented facility.
#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Facility {
    /// Field, tesla.
    pub magnet_field_t: f64,
    /// Cavity volume, cubic metres.
    pub cavity_volume_m3: f64,
    /// Form factor.
    pub form_factor: f64,
}

/// Tuning and receiver settings.
#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Scan {
    /// Cavity frequency of the first step, Hz.
    pub first_cavity_freq_hz: f64,
    /// Number of steps.
    pub n_steps: usize,
    /// Cavity (and LO) step between tuning steps, in bins.
    pub step_bins: usize,
    /// Bins per spectrum.
    pub n_bins: usize,
    /// Bin width, Hz.
    pub bin_width_hz: f64,
    /// Loaded Q.
    pub loaded_q: f64,
    /// Coupling beta.
    pub coupling_beta: f64,
    /// System noise temperature, K.
    pub noise_temp_k: f64,
    /// Spectra averaged per step.
    pub n_averages: u64,
    /// Fractional amplitude of the gain ripple.
    #[serde(default)]
    pub gain_ripple: f64,
    /// Period of the gain ripple, bins.
    #[serde(default = "default_period")]
    pub gain_ripple_period_bins: f64,
    /// Fractional amplitude of the per-step baseline drift.
    #[serde(default)]
    pub baseline_drift: f64,
}

fn default_period() -> f64 {
    4096.0
}

/// Where an interference line stays fixed.
#[derive(Debug, Clone, Copy, Deserialize, PartialEq)]
#[serde(rename_all = "snake_case")]
pub enum Frame {
    /// Fixed IF bin: moves in RF with the LO.
    If,
    /// Fixed RF frequency.
    Rf,
}

/// A narrowband interference line.
#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Interference {
    /// Fixed in "if" or "rf".
    pub frame: Frame,
    /// IF bin (frame "if") or RF frequency in Hz (frame "rf").
    pub position: f64,
    /// Power in units of the per-bin noise power k_B T dnu_b.
    pub power_rel: f64,
}

/// A narrowband line at a fixed IF bin, on from step `first_step` to `last_step` (inclusive).
/// A line of constant power in every step is absorbed by the night's gain shape; one that
/// comes and goes is what reaches the spectrum.
#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct IfBurst {
    /// IF bin of the line.
    pub if_bin: usize,
    /// Power in units of the per-bin noise power k_B T dnu_b.
    pub power_rel: f64,
    /// First step with the line on.
    pub first_step: usize,
    /// Last step with the line on.
    pub last_step: usize,
}

/// An injected axion.
#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Axion {
    /// Axion frequency nu_a (where the line starts), Hz.
    pub freq_hz: f64,
    /// Coupling relative to KSVZ, |g_gamma| / 0.97.
    pub coupling_rel_ksvz: f64,
}

impl Scenario {
    /// Reads a scenario TOML file.
    pub fn from_toml(text: &str) -> Result<Self, String> {
        toml::from_str(text).map_err(|e| e.to_string())
    }

    /// Start frequency of step i (centre of bin 0), on the bin grid, Hz.
    pub fn start_freq_hz(&self, i: usize) -> f64 {
        let s = &self.scan;
        let first = s.first_cavity_freq_hz - (s.n_bins / 2) as f64 * s.bin_width_hz;
        first + (i * s.step_bins) as f64 * s.bin_width_hz
    }
}

/// Writes the scenario's run file to `out` (temporary file renamed into place).
pub fn simulate(sc: &Scenario, out: &Path) -> Result<(), RunFileError> {
    let s = &sc.scan;
    let header = RunHeader {
        bin_width_hz: s.bin_width_hz,
        magnet_field_t: sc.facility.magnet_field_t,
        cavity_volume_m3: sc.facility.cavity_volume_m3,
        form_factor: sc.facility.form_factor,
        run_label: sc.run_label.clone(),
        bin_correlation: Vec::new(),
    };
    let mut writer = RunWriter::create(out, &header, s.n_steps, s.n_bins)?;
    let chunk = 64;
    for first in (0..s.n_steps).step_by(chunk) {
        let rows: Vec<(StepMeta, Array1<f32>)> = (first..(first + chunk).min(s.n_steps)).into_par_iter().map(|i| step(sc, i)).collect();
        for (meta, power) in rows {
            writer.push_step(meta, power.view())?;
        }
    }
    writer.finish()
}

fn step(sc: &Scenario, i: usize) -> (StepMeta, Array1<f32>) {
    let s = &sc.scan;
    let mut rng = StdRng::seed_from_u64(sc.seed.wrapping_mul(0x9E37_79B9_7F4A_7C15) ^ (i as u64).wrapping_add(1));
    let start = sc.start_freq_hz(i);
    let meta = StepMeta {
        start_freq_hz: start,
        cavity_freq_hz: start + (s.n_bins / 2) as f64 * s.bin_width_hz,
        loaded_q: s.loaded_q,
        coupling_beta: s.coupling_beta,
        noise_temp_k: s.noise_temp_k,
        n_averages: s.n_averages,
        timestamp_s: 1.0e9 + i as f64 * s.n_averages as f64 / s.bin_width_hz,
    };
    let scope = Haloscope { magnet_field_t: sc.facility.magnet_field_t, cavity_volume_m3: sc.facility.cavity_volume_m3, form_factor: sc.facility.form_factor };
    let cavity = CavityState { cavity_freq_hz: meta.cavity_freq_hz, loaded_q: s.loaded_q, coupling_beta: s.coupling_beta };
    let noise_w = BOLTZMANN_J_PER_K * s.noise_temp_k * s.bin_width_hz;
    let unit = Uniform::new(-1.0, 1.0).expect("valid range");
    let (c1, c2): (f64, f64) = (unit.sample(&mut rng), unit.sample(&mut rng));
    let root_n = (s.n_averages as f64).sqrt();
    let signals = SignalModel { halo: HaloModel::Maxwellian { v_rms_m_s: SIGNAL_V_RMS_M_S }, dm_density_gev_per_cm3: DEFAULT_DM_DENSITY_GEV_PER_CM3 };
    let axions: Vec<SyntheticAxion> = sc.axion.iter().map(|a| SyntheticAxion { freq_hz: a.freq_hz, g_gamma: G_GAMMA_KSVZ * a.coupling_rel_ksvz }).collect();
    let mut excess_w = vec![0.0; s.n_bins];
    signals.add_power_w(&axions, &scope, &cavity, start, s.bin_width_hz, &mut excess_w);
    let mut power = Array1::<f32>::zeros(s.n_bins);
    for (k, p) in power.iter_mut().enumerate() {
        let f = start + k as f64 * s.bin_width_hz;
        let x = 2.0 * k as f64 / (s.n_bins - 1) as f64 - 1.0;
        let gain = 1.0 + s.gain_ripple * (std::f64::consts::TAU * k as f64 / s.gain_ripple_period_bins).sin();
        let drift = 1.0 + s.baseline_drift * (c1 * x + c2 * x * x);
        let noise: f64 = StandardNormal.sample(&mut rng);
        let mut excess = excess_w[k];
        for line in &sc.interference {
            let here = match line.frame {
                Frame::If => (k as f64 - line.position).abs() < 0.5,
                Frame::Rf => (f - line.position).abs() < s.bin_width_hz / 2.0,
            };
            if here {
                excess += line.power_rel * noise_w;
            }
        }
        for burst in sc.if_burst.iter().filter(|b| b.if_bin == k && (b.first_step..=b.last_step).contains(&i)) {
            excess += burst.power_rel * noise_w;
        }
        *p = (gain * drift * (noise_w * (1.0 + noise / root_n) + excess)) as f32;
    }
    (meta, power)
}

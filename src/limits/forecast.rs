//! Forecasts: the reach (limit versus frequency) and the scan rate of a planned run, from the
//! radiometer equation, the pipeline's filter and baseline, and a measured eta.
//!
//! For a planned scan (cavity tuned from `start_hz` to `stop_hz` in steps of `step_hz`, each
//! step integrating t seconds with a spectrum of `n_bins` bins centred on the cavity), the
//! chain's filtered sensitivity to a reference axion at nu is
//!     1/sigma_A^2 = sum_i (P_sig,i(nu) / (k_B T_sys))^2 t sum_k L_k^2 / dnu_b
//! over the steps whose band holds the line (the optimal filter on white noise), and the limit
//! follows as in [`super::g_gamma_limit`] with sigma_eff = sigma_A s, s the predicted spread of
//! the pipeline's kernels. Since sigma_A ~ t^-1/2 the limit goes as t^-1/4, so the integration
//! per step that just reaches a target coupling g_t is t (g_lim / g_t)^4, and the scan rate is
//! step_hz / (that time + dead time per step).

use super::{g_gamma_limit, z_quantile};
use crate::dsp::spread::filtered_noise_spread;
use crate::physics::constants::{BOLTZMANN_J_PER_K, G_GAMMA_DFSZ, G_GAMMA_KSVZ};
use crate::physics::lineshape::HaloModel;
use crate::physics::signal::{CavityState, Haloscope, signal_power_w};
use crate::physics::units::{g_agg_from_g_gamma_per_gev, mass_uev_from_freq_hz};
use serde::Deserialize;

/// Points at which the reach is evaluated across the planned range.
const FORECAST_POINTS: usize = 400;

/// A planned run (TOML).
#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RunPlan {
    /// Magnet field, tesla.
    pub magnet_field_t: f64,
    /// Cavity volume, m^3.
    pub cavity_volume_m3: f64,
    /// Form factor C.
    pub form_factor: f64,
    /// Loaded quality factor.
    pub loaded_q: f64,
    /// Antenna coupling beta.
    pub coupling_beta: f64,
    /// System noise temperature, K.
    pub noise_temp_k: f64,
    /// Integration time per tuning step, s.
    pub integration_per_step_s: f64,
    /// Dead time per step (tuning, settling), s.
    #[serde(default)]
    pub dead_time_per_step_s: f64,
    /// Cavity frequency step, Hz.
    pub step_hz: f64,
    /// First and last cavity frequency, Hz.
    pub start_hz: f64,
    pub stop_hz: f64,
    /// Spectrum bin width, Hz.
    #[serde(default = "default_bin_width")]
    pub bin_width_hz: f64,
    /// Bins per spectrum.
    #[serde(default = "default_bins")]
    pub n_bins: usize,
    /// Target coupling of the scan rate: "ksvz", "dfsz" or a g_gamma value.
    #[serde(default = "default_target")]
    pub target: crate::stage::rescale::Reference,
    /// Correlation of the noise power of bins 1, 2, ... apart, as the run files'
    /// `bin_correlation` (`axsift average` with the Hann window: [0.4444, 0.02778]); empty,
    /// the default: independent bins.
    #[serde(default)]
    pub bin_correlation: Vec<f64>,
}

fn default_bin_width() -> f64 {
    100.0
}
fn default_bins() -> usize {
    4096
}
fn default_target() -> crate::stage::rescale::Reference {
    crate::stage::rescale::Reference::Model("ksvz".into())
}

impl RunPlan {
    /// Every out-of-range value, as messages naming the key.
    pub fn problems(&self) -> Vec<String> {
        let positive = [
            ("magnet_field_t", self.magnet_field_t),
            ("cavity_volume_m3", self.cavity_volume_m3),
            ("form_factor", self.form_factor),
            ("loaded_q", self.loaded_q),
            ("coupling_beta", self.coupling_beta),
            ("noise_temp_k", self.noise_temp_k),
            ("integration_per_step_s", self.integration_per_step_s),
            ("step_hz", self.step_hz),
            ("start_hz", self.start_hz),
            ("bin_width_hz", self.bin_width_hz),
        ];
        let mut p: Vec<String> = positive.iter().filter(|(_, v)| !(v.is_finite() && *v > 0.0)).map(|(k, v)| format!("`{k}` = {v} must be > 0")).collect();
        if !(self.stop_hz > self.start_hz) {
            p.push(format!("`stop_hz` = {} must exceed `start_hz` = {}", self.stop_hz, self.start_hz));
        }
        if !(self.dead_time_per_step_s >= 0.0) {
            p.push("`dead_time_per_step_s` must be >= 0".into());
        }
        if self.n_bins < 16 {
            p.push(format!("`n_bins` = {} must be >= 16", self.n_bins));
        }
        if let Some(rho) = self.bin_correlation.iter().find(|r| !(r.abs() <= 1.0)) {
            p.push(format!("`bin_correlation` holds {rho}, a correlation coefficient must be in [-1, 1]"));
        }
        if (self.stop_hz - self.start_hz) / self.step_hz > 1e7 {
            p.push("more than 1e7 steps: check `step_hz`".into());
        }
        p
    }

    fn target_g_gamma(&self) -> Option<f64> {
        use crate::stage::rescale::Reference;
        match &self.target {
            Reference::Model(m) if m == "ksvz" => Some(G_GAMMA_KSVZ.abs()),
            Reference::Model(m) if m == "dfsz" => Some(G_GAMMA_DFSZ.abs()),
            Reference::Value(v) if *v != 0.0 && v.is_finite() => Some(v.abs()),
            _ => None,
        }
    }
}

/// What the pipeline and calibration contribute to a forecast.
#[derive(Debug, Clone)]
pub struct ChainModel {
    /// Halo model of the filter.
    pub halo: HaloModel,
    /// Interior Savitzky-Golay kernel of the baseline stage.
    pub baseline_kernel: Vec<f64>,
    /// Threshold Theta.
    pub threshold: f64,
    /// Confidence of the limit.
    pub confidence: f64,
    /// Measured signal attenuation.
    pub eta: f64,
    /// Dark-matter density, GeV/cm^3.
    pub dm_density_gev_per_cm3: f64,
    /// Fraction of the line left outside the filter kernel.
    pub tail_fraction: f64,
}

impl ChainModel {
    /// The chain of a loaded plan, with the eta of its calibration.
    pub fn from_plan(plan: &crate::config::Plan, cal: &crate::calib::Calibration, confidence: f64) -> Result<Self, String> {
        let info = crate::calib::PlanInfo::from_plan(plan)?;
        let baseline_kernel = plan.stages.iter().find_map(|s| s.config.baseline_kernel()).ok_or("the plan has no baseline stage")?;
        Ok(Self {
            halo: info.halo,
            baseline_kernel,
            threshold: cal.threshold,
            confidence,
            eta: cal.attenuation.eta,
            dm_density_gev_per_cm3: info.dm_density_gev_per_cm3,
            tail_fraction: info.tail_fraction,
        })
    }
}

/// One point of the reach.
#[derive(Debug, Clone, Copy, serde::Serialize)]
pub struct ReachPoint {
    /// RF frequency, Hz.
    pub freq_hz: f64,
    /// Axion mass, micro-eV.
    pub mass_uev: f64,
    /// Forecast |g_gamma| limit.
    pub g_gamma: f64,
    /// Forecast |g_agg| limit, GeV^-1.
    pub g_agg_per_gev: f64,
    /// Limit relative to KSVZ.
    pub rel_ksvz: f64,
    /// Steps whose band holds the line.
    pub n_steps: usize,
}

/// A forecast.
#[derive(Debug, Clone, serde::Serialize)]
pub struct Forecast {
    /// The reach across the planned range (interior points, all covered).
    pub reach: Vec<ReachPoint>,
    /// Median scan rate at the target coupling, MHz per day.
    pub rate_mhz_per_day: f64,
    /// Integration per step that reaches the target (median), s.
    pub integration_for_target_s: f64,
    /// Length of the planned run as given, days.
    pub planned_days: f64,
    /// Number of planned steps.
    pub n_steps: usize,
}

/// Forecasts the reach and scan rate of `plan` through `chain`.
pub fn forecast(plan: &RunPlan, chain: &ChainModel) -> Result<Forecast, String> {
    let problems = plan.problems();
    if !problems.is_empty() {
        return Err(problems.join("; "));
    }
    let target = plan.target_g_gamma().ok_or("`target` must be \"ksvz\", \"dfsz\" or a non-zero number")?;
    let scope = Haloscope { magnet_field_t: plan.magnet_field_t, cavity_volume_m3: plan.cavity_volume_m3, form_factor: plan.form_factor };
    let n_steps = ((plan.stop_hz - plan.start_hz) / plan.step_hz).floor() as usize + 1;
    let half_band_hz = (plan.n_bins / 2) as f64 * plan.bin_width_hz;
    let z_c = z_quantile(chain.confidence);
    let reference = G_GAMMA_KSVZ;
    let beta_sq = chain.halo.mean_beta_sq();
    let mut reach = Vec::with_capacity(FORECAST_POINTS);
    for p in 0..FORECAST_POINTS {
        let nu = plan.start_hz + (plan.stop_hz - plan.start_hz) * (p as f64 + 0.5) / FORECAST_POINTS as f64;
        let line = chain.halo.bin_fractions(nu, plan.bin_width_hz, chain.tail_fraction);
        let sum_l2: f64 = line.iter().map(|l| l * l).sum();
        let spread = filtered_noise_spread(&line, Some(&chain.baseline_kernel), &plan.bin_correlation);
        let line_end = nu + 3.0 * nu * beta_sq;
        // Steps i with f_c,i - half_band <= nu and line_end <= f_c,i + half_band - dnu_b.
        let lo = ((line_end - half_band_hz + plan.bin_width_hz - plan.start_hz) / plan.step_hz).ceil().max(0.0) as usize;
        let hi = (((nu + half_band_hz - plan.start_hz) / plan.step_hz).floor().max(-1.0) + 1.0) as usize;
        let hi = hi.min(n_steps);
        let inv_var: f64 = (lo..hi)
            .map(|i| {
                let cavity =
                    CavityState { cavity_freq_hz: plan.start_hz + i as f64 * plan.step_hz, loaded_q: plan.loaded_q, coupling_beta: plan.coupling_beta };
                let ratio = signal_power_w(reference, chain.dm_density_gev_per_cm3, &scope, &cavity, nu) / (BOLTZMANN_J_PER_K * plan.noise_temp_k);
                ratio * ratio * plan.integration_per_step_s * sum_l2 / plan.bin_width_hz
            })
            .sum();
        if inv_var > 0.0 && hi > lo + 1 {
            let g = g_gamma_limit(reference, chain.threshold, z_c, spread / inv_var.sqrt(), chain.eta);
            let mass = mass_uev_from_freq_hz(nu);
            reach.push(ReachPoint {
                freq_hz: nu,
                mass_uev: mass,
                g_gamma: g,
                g_agg_per_gev: g_agg_from_g_gamma_per_gev(g, mass).abs(),
                rel_ksvz: g / G_GAMMA_KSVZ.abs(),
                n_steps: hi - lo,
            });
        }
    }
    if reach.is_empty() {
        return Err("the planned range is narrower than one spectrum: nothing is fully covered".into());
    }
    // Ignore the ends of the range, which fewer steps cover.
    let full = reach.iter().map(|r| r.n_steps).max().unwrap_or(0);
    let mut times: Vec<f64> = reach.iter().filter(|r| r.n_steps == full).map(|r| plan.integration_per_step_s * (r.g_gamma / target).powi(4)).collect();
    times.sort_by(f64::total_cmp);
    let t_target = times[times.len() / 2];
    Ok(Forecast {
        reach,
        rate_mhz_per_day: plan.step_hz / 1e6 / (t_target + plan.dead_time_per_step_s) * 86_400.0,
        integration_for_target_s: t_target,
        planned_days: n_steps as f64 * (plan.integration_per_step_s + plan.dead_time_per_step_s) / 86_400.0,
        n_steps,
    })
}

impl Forecast {
    /// Writes `forecast.csv` and the reach plot (`reach.png`, `reach.svg`) into `dir`, each
    /// under a temporary name first; returns the written paths.
    pub fn write(&self, dir: &std::path::Path) -> anyhow::Result<Vec<std::path::PathBuf>> {
        use anyhow::Context;
        std::fs::create_dir_all(dir).with_context(|| format!("cannot create {}", dir.display()))?;
        let names = ["forecast.csv", "reach.png", "reach.svg"];
        let tmp = |n: &str| dir.join(format!(".tmp.{n}"));
        let mut w = csv::Writer::from_path(tmp(names[0]))?;
        w.write_record(["freq_hz", "mass_uev", "g_gamma_limit", "g_agg_limit_per_gev", "limit_rel_ksvz", "n_steps"])?;
        for r in &self.reach {
            w.write_record([
                format!("{:.1}", r.freq_hz),
                format!("{:.9}", r.mass_uev),
                format!("{:.5e}", r.g_gamma),
                format!("{:.5e}", r.g_agg_per_gev),
                format!("{:.5}", r.rel_ksvz),
                r.n_steps.to_string(),
            ])?;
        }
        w.flush()?;
        drop(w);
        let points: Vec<(f64, f64)> = self.reach.iter().map(|r| (r.mass_uev, r.g_agg_per_gev)).collect();
        super::exclusion_plot(
            &super::ExclusionColumns::of_points(&points),
            &format!("Forecast reach ({:.2} MHz/day at the target)", self.rate_mhz_per_day),
            &tmp(names[1]),
            &tmp(names[2]),
        )?;
        names
            .iter()
            .map(|n| {
                let to = dir.join(n);
                std::fs::rename(tmp(n), &to).with_context(|| format!("renaming into {}", to.display()))?;
                Ok(to)
            })
            .collect()
    }
}

//! The radiometer check: the chain's sensitivity against the Dicke equation from metadata.

use super::{PlanInfo, RadiometerCheck};
use crate::physics::constants::BOLTZMANN_J_PER_K;
use crate::physics::signal::{CavityState, Haloscope, signal_power_w};
use crate::pipeline::Reduction;

/// Compares, at the bins `bins` of a null reduction, 1/sigma_A of the chain with the Dicke SNR
/// (Dicke, Rev. Sci. Instrum. 17, 268 (1946)) of a reference axion whose line starts at the
/// bin's lower edge: SNR^2 = sum_i (P_sig,i / (k_B T_i))^2 t_i / dnu_a over the used steps whose
/// band holds the whole line (3 nu <beta^2> wide), t_i = N_i / dnu_b, dnu_a = nu <beta^2>.
/// Uses the facility parameters of the first input file. For the Maxwellian line the ideal
/// filter's equivalent width is (pi/3) nu <beta^2>, so the expected ratio is sqrt(3/pi) = 0.977.
pub fn check(null: &Reduction, info: &PlanInfo, bins: &[usize], eta: f64) -> RadiometerCheck {
    let sp = &null.spectrum;
    let h = &null.night.headers[0];
    let scope = Haloscope { magnet_field_t: h.magnet_field_t, cavity_volume_m3: h.cavity_volume_m3, form_factor: h.form_factor };
    let beta_sq = info.halo.mean_beta_sq();
    let mut dicke = Vec::new();
    let mut filter = Vec::new();
    let mut grand = Vec::new();
    for &j in bins {
        let nu_hz = sp.freq_hz(j) - sp.bin_width_hz / 2.0;
        let width_hz = nu_hz * beta_sq;
        let snr_sq: f64 = null
            .used_steps
            .iter()
            .filter(|(_, m)| m.start_freq_hz - sp.bin_width_hz / 2.0 <= nu_hz && nu_hz + 3.0 * width_hz <= m.start_freq_hz + sp.step_span_hz)
            .map(|(_, m)| {
                let cavity = CavityState { cavity_freq_hz: m.cavity_freq_hz, loaded_q: m.loaded_q, coupling_beta: m.coupling_beta };
                let p_w = signal_power_w(info.reference_g_gamma, info.dm_density_gev_per_cm3, &scope, &cavity, nu_hz);
                let t_s = m.n_averages as f64 / sp.bin_width_hz;
                (p_w / (BOLTZMANN_J_PER_K * m.noise_temp_k)).powi(2) * t_s / width_hz
            })
            .sum();
        if snr_sq > 0.0 && sp.sigma_a[j].is_finite() {
            dicke.push(snr_sq.sqrt());
            filter.push(1.0 / sp.sigma_a[j]);
            grand.push(eta / (sp.sigma_a[j] * sp.predicted_spread[j]));
        }
    }
    let (dicke_snr, filter_snr, grand_snr) = (median(dicke), median(filter), median(grand));
    RadiometerCheck { dicke_snr, filter_snr, ratio: filter_snr / dicke_snr, grand_snr }
}

fn median(mut v: Vec<f64>) -> f64 {
    if v.is_empty() {
        return f64::NAN;
    }
    v.sort_by(f64::total_cmp);
    v[v.len() / 2]
}

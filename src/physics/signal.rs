//! Expected axion conversion power in a resonant cavity and the radiometer
//! signal-to-noise ratio.
//!
//! The conversion power follows Sikivie, Phys. Rev. Lett. 51, 1415 (1983),
//! written in the SI form of Brubaker et al., Phys. Rev. D 96, 123008 (2017),
//! Eq. (2).

use std::f64::consts::PI;

use super::constants::{BOLTZMANN_J_PER_K, FINE_STRUCTURE, HBAR_J_S, JOULE_PER_EV, LAMBDA_QCD_EV, SPEED_OF_LIGHT_M_S, VACUUM_PERMEABILITY_H_PER_M};

/// Fixed properties of a haloscope: magnet and cavity geometry.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Haloscope {
    /// Central magnetic field in tesla.
    pub magnet_field_t: f64,
    /// Cavity volume in cubic metres.
    pub cavity_volume_m3: f64,
    /// Form factor of the cavity mode (dimensionless, between 0 and 1): the
    /// normalised overlap of the mode electric field with the applied field.
    pub form_factor: f64,
}

/// Tunable state of the cavity during one spectrum acquisition.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct CavityState {
    /// Resonant frequency of the cavity mode in Hz.
    pub cavity_freq_hz: f64,
    /// Loaded quality factor `Q_L` (dimensionless).
    pub loaded_q: f64,
    /// Coupling coefficient `β` of the readout antenna (dimensionless;
    /// 1 is critical coupling).
    pub coupling_beta: f64,
}

/// Lorentzian response of a cavity mode, normalised to 1 on resonance:
/// `1 / (1 + 4 Q² (ν/f_c − 1)²)`.
///
/// `freq_hz` and `cavity_freq_hz` are in Hz and `loaded_q` is the
/// dimensionless loaded quality factor. The full width at half maximum is
/// `f_c / Q`.
pub fn lorentzian(freq_hz: f64, cavity_freq_hz: f64, loaded_q: f64) -> f64 {
    let detuning = freq_hz / cavity_freq_hz - 1.0;
    1.0 / (1.0 + 4.0 * loaded_q * loaded_q * detuning * detuning)
}

/// Axion-to-photon conversion power in watts delivered to the receiver.
///
/// Computes
/// `P = (g_γ² α² ħ³ c³ ρ_a / (π² Λ⁴)) · (B² V C / μ0) · ω_c Q_L · β/(1+β) · L(ν_a)`
/// with `ω_c = 2π f_c` and `L` the cavity [`lorentzian`], assuming the whole
/// axion line is narrow compared with the cavity width (so it sees the
/// Lorentzian at `axion_freq_hz`).
///
/// * `g_gamma` – dimensionless model coupling (e.g. −0.97 for KSVZ).
/// * `dm_density_gev_per_cm3` – local axion density in GeV/cm³, converted to
///   J/m³ internally.
/// * `axion_freq_hz` – axion rest-mass frequency in Hz.
///
/// `Λ` is [`LAMBDA_QCD_EV`], converted to joules.
pub fn signal_power_w(g_gamma: f64, dm_density_gev_per_cm3: f64, haloscope: &Haloscope, cavity: &CavityState, axion_freq_hz: f64) -> f64 {
    let density_j_per_m3 = dm_density_gev_per_cm3 * 1e9 * JOULE_PER_EV * 1e6;
    let lambda_j = LAMBDA_QCD_EV * JOULE_PER_EV;
    let coupling =
        g_gamma * g_gamma * FINE_STRUCTURE * FINE_STRUCTURE * HBAR_J_S.powi(3) * SPEED_OF_LIGHT_M_S.powi(3) * density_j_per_m3 / (PI * PI * lambda_j.powi(4));
    let field_t = haloscope.magnet_field_t;
    let magnet = field_t * field_t * haloscope.cavity_volume_m3 * haloscope.form_factor / VACUUM_PERMEABILITY_H_PER_M;
    let omega_c_rad_s = 2.0 * PI * cavity.cavity_freq_hz;
    let beta = cavity.coupling_beta;
    let cavity_factor = omega_c_rad_s * cavity.loaded_q * beta / (1.0 + beta) * lorentzian(axion_freq_hz, cavity.cavity_freq_hz, cavity.loaded_q);
    coupling * magnet * cavity_factor
}

/// Dicke radiometer signal-to-noise ratio (dimensionless):
/// `SNR = (P / (k_B T)) · sqrt(t / Δν)`.
///
/// Dicke, Rev. Sci. Instrum. 17, 268 (1946). `signal_power_w` is the signal
/// power in watts, `noise_temp_k` the total system noise temperature in
/// kelvin, `integration_s` the integration time in seconds and
/// `signal_width_hz` the bandwidth in Hz over which the signal is spread.
/// Assumes the noise is white across that bandwidth and `t Δν ≫ 1`.
pub fn radiometer_snr(signal_power_w: f64, noise_temp_k: f64, integration_s: f64, signal_width_hz: f64) -> f64 {
    signal_power_w / (BOLTZMANN_J_PER_K * noise_temp_k) * (integration_s / signal_width_hz).sqrt()
}

//! Conversions between axion frequency, mass and coupling.
//!
//! The QCD-axion relations use Grilli di Cortona, Hardy, Pardo Vega and
//! Villadoro, JHEP 01 (2016) 034.

use std::f64::consts::PI;

use super::constants::{FINE_STRUCTURE, JOULE_PER_EV, LAMBDA_QCD_EV, PLANCK_J_S};

/// Product `m_a · f_a` in µeV·GeV for the QCD axion: `m_a = 5.691 µeV ·
/// (10¹² GeV / f_a)` (Grilli di Cortona et al. 2016).
pub const MASS_TIMES_DECAY_CONSTANT_UEV_GEV: f64 = 5.691e12;

/// Model-independent contribution to `E/N` in the axion–photon coupling,
/// `g_aγγ = α/(2π f_a) (E/N − 1.92)` (Grilli di Cortona et al. 2016).
pub const CHIRAL_E_OVER_N: f64 = 1.92;

/// Anomaly ratio `E/N` of the KSVZ model (heavy quark with no electric charge).
pub const E_OVER_N_KSVZ: f64 = 0.0;

/// Anomaly ratio `E/N` of the DFSZ model (grand-unified charge assignment).
pub const E_OVER_N_DFSZ: f64 = 8.0 / 3.0;

/// Axion mass in µeV whose rest energy equals one photon of frequency
/// `freq_hz` (Hz): `m = h ν / e`, scaled from eV to µeV.
pub fn mass_uev_from_freq_hz(freq_hz: f64) -> f64 {
    PLANCK_J_S * freq_hz / JOULE_PER_EV * 1e6
}

/// Photon frequency in Hz matching an axion rest mass of `mass_uev` µeV;
/// the inverse of [`mass_uev_from_freq_hz`].
pub fn freq_hz_from_mass_uev(mass_uev: f64) -> f64 {
    mass_uev * 1e-6 * JOULE_PER_EV / PLANCK_J_S
}

/// QCD-axion decay constant `f_a` in GeV for an axion mass of `mass_uev`
/// µeV, from `m_a f_a = 5.691 µeV × 10¹² GeV`.
pub fn decay_constant_gev(mass_uev: f64) -> f64 {
    MASS_TIMES_DECAY_CONSTANT_UEV_GEV / mass_uev
}

/// Axion–photon coupling `g_aγγ` in GeV⁻¹ for a QCD axion of mass
/// `mass_uev` µeV with anomaly ratio `e_over_n`:
/// `g_aγγ = α / (2π f_a) · (E/N − 1.92)`, with `f_a` from
/// [`decay_constant_gev`]. The sign is kept (negative for KSVZ).
pub fn g_agg_per_gev(mass_uev: f64, e_over_n: f64) -> f64 {
    FINE_STRUCTURE / (2.0 * PI * decay_constant_gev(mass_uev)) * (e_over_n - CHIRAL_E_OVER_N)
}

/// Axion–photon coupling `g_aγγ` in GeV⁻¹ from the dimensionless model
/// coupling `g_gamma` and the mass `mass_uev` in µeV, using
/// `g_aγγ = α g_γ m_a / (π Λ²)` with `Λ` = [`LAMBDA_QCD_EV`] (the
/// parametrisation used by the haloscope power formula). Masses enter in eV;
/// the eV⁻¹ result is scaled to GeV⁻¹.
pub fn g_agg_from_g_gamma_per_gev(g_gamma: f64, mass_uev: f64) -> f64 {
    let mass_ev = mass_uev * 1e-6;
    let per_ev = FINE_STRUCTURE * g_gamma * mass_ev / (PI * LAMBDA_QCD_EV * LAMBDA_QCD_EV);
    per_ev * 1e9
}

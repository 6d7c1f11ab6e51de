//! Checks of the physics modules against published or independently
//! computed values. Each reference value names its source beside the check.
//! "(computed with scipy.constants ...)" values were evaluated with
//! scipy 1.17 (`scipy.constants`, which ships CODATA 2022; the differences
//! from CODATA 2018 are below 1e-9 relative, far inside the tolerances).

use std::f64::consts::PI;

use approx::{assert_abs_diff_eq, assert_relative_eq};
use axsift::physics::constants::{DEFAULT_DM_DENSITY_GEV_PER_CM3, G_GAMMA_DFSZ, G_GAMMA_KSVZ, HBAR_J_S, PLANCK_J_S};
use axsift::physics::lineshape::{DEFAULT_V_EARTH_M_S, DEFAULT_V_RMS_M_S, DEFAULT_V0_M_S, HaloModel};
use axsift::physics::signal::{CavityState, Haloscope, lorentzian, radiometer_snr, signal_power_w};
use axsift::physics::units::{
    E_OVER_N_DFSZ, E_OVER_N_KSVZ, decay_constant_gev, freq_hz_from_mass_uev, g_agg_from_g_gamma_per_gev, g_agg_per_gev, mass_uev_from_freq_hz,
};
use statrs::distribution::{Continuous, Gamma};

// ---------------------------------------------------------------- constants

#[test]
fn hbar_matches_codata() {
    // CODATA 2018: ħ = 1.054571817e-34 J s (memory).
    assert_relative_eq!(HBAR_J_S, 1.054_571_817e-34, max_relative = 1e-9);
    assert_relative_eq!(HBAR_J_S * 2.0 * PI, PLANCK_J_S, max_relative = 1e-15);
}

// ------------------------------------------------------------------- signal

fn small_cavity() -> (Haloscope, CavityState) {
    (Haloscope { magnet_field_t: 9.0, cavity_volume_m3: 1.5e-3, form_factor: 0.5 }, CavityState { cavity_freq_hz: 5.7e9, loaded_q: 1e4, coupling_beta: 2.0 })
}

#[test]
fn signal_power_small_cavity() {
    let (scope, cavity) = small_cavity();
    let p_w = signal_power_w(0.97, 0.45, &scope, &cavity, cavity.cavity_freq_hz);
    // 5.587e-24 W (computed with scipy.constants h, hbar, c, e, alpha, mu_0).
    assert_relative_eq!(p_w, 5.587e-24, max_relative = 1e-3);
}

#[test]
fn signal_power_large_cavity() {
    let scope = Haloscope { magnet_field_t: 7.6, cavity_volume_m3: 0.220, form_factor: 0.4 };
    let cavity = CavityState { cavity_freq_hz: 740e6, loaded_q: 7e4, coupling_beta: 1.0 };
    let p_w = signal_power_w(0.97, DEFAULT_DM_DENSITY_GEV_PER_CM3, &scope, &cavity, cavity.cavity_freq_hz);
    // 3.186e-22 W (computed with scipy.constants hbar, c, e, alpha, mu_0).
    assert_relative_eq!(p_w, 3.186e-22, max_relative = 1e-3);
}

#[test]
fn signal_power_scalings() {
    let (scope, cavity) = small_cavity();
    let f = cavity.cavity_freq_hz;
    let base = signal_power_w(G_GAMMA_KSVZ, 0.45, &scope, &cavity, f);
    let doubled_field = Haloscope { magnet_field_t: 2.0 * scope.magnet_field_t, ..scope };
    let tripled_volume = Haloscope { cavity_volume_m3: 3.0 * scope.cavity_volume_m3, ..scope };
    // P ∝ B² and P ∝ V (Sikivie 1983; Brubaker et al. 2017 Eq. 2).
    assert_relative_eq!(signal_power_w(G_GAMMA_KSVZ, 0.45, &doubled_field, &cavity, f), 4.0 * base, max_relative = 1e-12);
    assert_relative_eq!(signal_power_w(G_GAMMA_KSVZ, 0.45, &tripled_volume, &cavity, f), 3.0 * base, max_relative = 1e-12);
    // P ∝ g_γ²: DFSZ/KSVZ power ratio is (0.36/0.97)² (Brubaker et al. 2017).
    assert_relative_eq!(signal_power_w(G_GAMMA_DFSZ, 0.45, &scope, &cavity, f) / base, (0.36_f64 / 0.97).powi(2), max_relative = 1e-12);
    // Detuned by half a linewidth the power halves.
    let half_width_hz = f / (2.0 * cavity.loaded_q);
    assert_relative_eq!(signal_power_w(G_GAMMA_KSVZ, 0.45, &scope, &cavity, f + half_width_hz), 0.5 * base, max_relative = 1e-12);
}

#[test]
fn lorentzian_half_power_points() {
    // A resonator of quality Q has FWHM f_c/Q (standard resonator definition, memory).
    let f_c = 5.7e9;
    let q = 1e4;
    assert_relative_eq!(lorentzian(f_c, f_c, q), 1.0, max_relative = 1e-15);
    assert_relative_eq!(lorentzian(f_c * (1.0 + 0.5 / q), f_c, q), 0.5, max_relative = 1e-9);
    assert_relative_eq!(lorentzian(f_c * (1.0 - 0.5 / q), f_c, q), 0.5, max_relative = 1e-9);
}

#[test]
fn radiometer_snr_small_cavity() {
    let (scope, cavity) = small_cavity();
    let p_w = signal_power_w(0.97, 0.45, &scope, &cavity, cavity.cavity_freq_hz);
    let snr = radiometer_snr(p_w, 0.6, 1800.0, 4.62e3);
    // 0.421 (computed with scipy.constants k from the 5.587e-24 W power above).
    assert_relative_eq!(snr, 0.421, max_relative = 1e-3);
}

// ---------------------------------------------------------------- lineshape

const AXION_FREQ_HZ: f64 = 5.7e9;

/// Composite Simpson integral of `g(Δ)` for Δ from 0 to `upper_hz`, using
/// Δ = u² so the √Δ behaviour at the line edge becomes smooth.
fn simpson_in_sqrt(g: impl Fn(f64) -> f64, upper_hz: f64, intervals: usize) -> f64 {
    let u_max = upper_hz.sqrt();
    let h = u_max / intervals as f64;
    let integrand = |u: f64| g(u * u) * 2.0 * u;
    let mut sum = integrand(0.0) + integrand(u_max);
    for i in 1..intervals {
        let weight = if i % 2 == 1 { 4.0 } else { 2.0 };
        sum += weight * integrand(i as f64 * h);
    }
    sum * h / 3.0
}

fn models() -> [HaloModel; 2] {
    [HaloModel::default(), HaloModel::default_lab_frame()]
}

#[test]
fn maxwellian_pdf_matches_gamma_density() {
    let model = HaloModel::default();
    let width_hz = AXION_FREQ_HZ * model.mean_beta_sq();
    // Turner 1990: the Maxwellian line is a Gamma(3/2, rate 3/(ν_a<β²>)) density in Δ.
    let gamma = Gamma::new(1.5, 3.0 / width_hz).unwrap();
    for offset_hz in [0.5 * width_hz, 0.01 * width_hz, 0.3 * width_hz, 2.0 * width_hz, 7.0 * width_hz] {
        assert_relative_eq!(model.pdf_per_hz(AXION_FREQ_HZ, offset_hz), gamma.pdf(offset_hz), max_relative = 1e-12);
    }
    assert_eq!(model.pdf_per_hz(AXION_FREQ_HZ, 0.0), 0.0);
    assert_eq!(model.pdf_per_hz(AXION_FREQ_HZ, -10.0), 0.0);
}

#[test]
fn pdf_normalised_and_mean_offset() {
    for model in models() {
        let width_hz = AXION_FREQ_HZ * model.mean_beta_sq();
        let upper_hz = 40.0 * width_hz;
        let norm = simpson_in_sqrt(|d| model.pdf_per_hz(AXION_FREQ_HZ, d), upper_hz, 20_000);
        // Probability densities integrate to one (definition).
        assert_abs_diff_eq!(norm, 1.0, epsilon = 1e-6);
        let mean_hz = simpson_in_sqrt(|d| d * model.pdf_per_hz(AXION_FREQ_HZ, d), upper_hz, 20_000);
        // <Δ> = ν_a <v²>/(2c²) since Δ = ν_a v²/(2c²) (Turner 1990).
        assert_relative_eq!(mean_hz, 0.5 * width_hz, max_relative = 1e-4);
    }
}

#[test]
fn cdf_limits_and_consistency_with_pdf() {
    for model in models() {
        let width_hz = AXION_FREQ_HZ * model.mean_beta_sq();
        assert_eq!(model.cdf(AXION_FREQ_HZ, 0.0), 0.0);
        // Distribution functions tend to one (definition).
        assert_abs_diff_eq!(model.cdf(AXION_FREQ_HZ, 50.0 * width_hz), 1.0, epsilon = 1e-12);
        let upper_hz = 0.8 * width_hz;
        let integral = simpson_in_sqrt(|d| model.pdf_per_hz(AXION_FREQ_HZ, d), upper_hz, 4_000);
        assert_abs_diff_eq!(model.cdf(AXION_FREQ_HZ, upper_hz), integral, epsilon = 1e-9);
    }
}

#[test]
fn lab_frame_mean_square_speed() {
    let model = HaloModel::LabFrame { v0_m_s: DEFAULT_V0_M_S, v_earth_m_s: DEFAULT_V_EARTH_M_S };
    let c = 299_792_458.0;
    // <v²> = 3σ² + v_E² = 1.26424e11 m²/s² for v0 = 220 km/s, v_E = 232 km/s
    // (computed with scipy: 3*(220e3/sqrt(2))**2 + 232e3**2).
    assert_relative_eq!(model.mean_beta_sq() * c * c, 1.26424e11, max_relative = 1e-6);
    // Maxwellian default: <v²> = (270 km/s)² (trade value, memory).
    assert_relative_eq!(HaloModel::default().mean_beta_sq() * c * c, DEFAULT_V_RMS_M_S * DEFAULT_V_RMS_M_S, max_relative = 1e-12);
}

#[test]
fn lab_frame_reduces_to_maxwellian_without_boost() {
    let sigma_m_s = DEFAULT_V0_M_S / 2.0_f64.sqrt();
    let boosted = HaloModel::LabFrame { v0_m_s: DEFAULT_V0_M_S, v_earth_m_s: 10.0 };
    // With v_E → 0 the boosted halo is a Maxwellian with v_rms = √3 σ_v (memory).
    let isotropic = HaloModel::Maxwellian { v_rms_m_s: 3.0_f64.sqrt() * sigma_m_s };
    let bin_hz = 500.0;
    let a = boosted.bin_fractions(AXION_FREQ_HZ, bin_hz, 1e-6);
    let b = isotropic.bin_fractions(AXION_FREQ_HZ, bin_hz, 1e-6);
    assert_eq!(a.len(), b.len());
    for (x, y) in a.iter().zip(&b) {
        assert_abs_diff_eq!(x, y, epsilon = 1e-6);
    }
}

#[test]
fn bin_fractions_cover_line() {
    for model in models() {
        for (bin_hz, tail) in [(100.0, 1e-3), (650.0, 1e-6), (20_000.0, 0.05)] {
            let fractions = model.bin_fractions(AXION_FREQ_HZ, bin_hz, tail);
            assert!(!fractions.is_empty());
            assert!(fractions.iter().all(|&l| l >= 0.0));
            let total: f64 = fractions.iter().sum();
            assert!(total >= 1.0 - tail - 1e-12, "total {total} for tail {tail}");
            assert!(total <= 1.0 + 1e-12);
        }
    }
}

// -------------------------------------------------------------------- units

#[test]
fn mass_frequency_conversion() {
    // h/e = 4.135667696e-15 eV s, i.e. 4.135667696 µeV per GHz (CODATA 2018).
    assert_relative_eq!(mass_uev_from_freq_hz(1e9), 4.135_667_696, max_relative = 1e-9);
    assert_relative_eq!(freq_hz_from_mass_uev(mass_uev_from_freq_hz(5.7e9)), 5.7e9, max_relative = 1e-14);
}

#[test]
fn qcd_couplings_at_one_micro_ev() {
    // |g_aγγ| at 1 µeV: 3.918e-16 GeV⁻¹ (KSVZ) and 1.524e-16 GeV⁻¹ (DFSZ)
    // (computed with scipy.constants.alpha from Grilli di Cortona et al. 2016).
    assert_relative_eq!(g_agg_per_gev(1.0, E_OVER_N_KSVZ).abs(), 3.918e-16, max_relative = 1e-3);
    assert_relative_eq!(g_agg_per_gev(1.0, E_OVER_N_DFSZ).abs(), 1.524e-16, max_relative = 1e-3);
    // Λ form, KSVZ: 3.742e-16 GeV⁻¹ (computed with scipy.constants.alpha, Λ = 77.6 MeV).
    assert_relative_eq!(g_agg_from_g_gamma_per_gev(G_GAMMA_KSVZ, 1.0).abs(), 3.742e-16, max_relative = 1e-3);
}

#[test]
fn decay_constant_scale() {
    // f_a = 1e16 GeV corresponds to m_a ≈ 0.569 neV (Grilli di Cortona et al. 2016, memory;
    // order-a-neV trade fact). Inverting: f_a(0.569e-3 µeV) ≈ 1e16 GeV.
    let mass_uev = 5.691e-4;
    assert_relative_eq!(decay_constant_gev(mass_uev), 1e16, max_relative = 1e-9);
    // 1 µeV ↔ f_a = 5.691e12 GeV (Grilli di Cortona et al. 2016).
    assert_relative_eq!(decay_constant_gev(1.0), 5.691e12, max_relative = 1e-12);
}

#[test]
fn couplings_scale_with_mass() {
    // g_aγγ ∝ m_a for fixed model (Grilli di Cortona et al. 2016).
    for e_over_n in [E_OVER_N_KSVZ, E_OVER_N_DFSZ] {
        assert_relative_eq!(g_agg_per_gev(7.0, e_over_n), 7.0 * g_agg_per_gev(1.0, e_over_n), max_relative = 1e-12);
    }
    assert_relative_eq!(g_agg_from_g_gamma_per_gev(G_GAMMA_DFSZ, 20.0), 20.0 * g_agg_from_g_gamma_per_gev(G_GAMMA_DFSZ, 1.0), max_relative = 1e-12);
}

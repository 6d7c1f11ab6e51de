//! Spectral shape of the axion signal set by the dark-matter velocity
//! distribution.
//!
//! An axion of rest frequency `ν_a` moving with speed `v` converts to a photon
//! at `ν = ν_a (1 + v²/(2c²))`, so the line starts at `ν_a` and extends
//! upward by the kinetic-energy offset `Δ = ν - ν_a = ν_a v² / (2c²)`.
//! Every density here is normalised to unit total power.

use std::f64::consts::PI;

use statrs::distribution::{ContinuousCDF, Gamma};
use statrs::function::erf::erf;

use super::constants::SPEED_OF_LIGHT_M_S;

/// Conventional rms speed of the isothermal halo in m/s (270 km/s).
pub const DEFAULT_V_RMS_M_S: f64 = 270e3;

/// Conventional local circular speed `v0` in m/s (220 km/s).
pub const DEFAULT_V0_M_S: f64 = 220e3;

/// Conventional speed of the Earth through the halo in m/s (232 km/s).
pub const DEFAULT_V_EARTH_M_S: f64 = 232e3;

/// Velocity distribution of halo axions as seen by the detector.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum HaloModel {
    /// Isotropic Maxwell–Boltzmann distribution in the detector frame with
    /// rms speed `v_rms_m_s` (m/s); the line shape of Turner,
    /// Phys. Rev. D 42, 3572 (1990).
    Maxwellian {
        /// Root-mean-square speed in m/s.
        v_rms_m_s: f64,
    },
    /// Isotropic Maxwellian in the galactic rest frame with one-dimensional
    /// dispersion `σ_v = v0/√2`, boosted by the Earth's speed through the
    /// halo. Annual and daily modulation are ignored.
    LabFrame {
        /// Local circular speed `v0` in m/s.
        v0_m_s: f64,
        /// Speed of the laboratory relative to the halo rest frame in m/s.
        v_earth_m_s: f64,
    },
}

impl Default for HaloModel {
    /// The Maxwellian model with rms speed [`DEFAULT_V_RMS_M_S`].
    fn default() -> Self {
        HaloModel::Maxwellian { v_rms_m_s: DEFAULT_V_RMS_M_S }
    }
}

impl HaloModel {
    /// The boosted model with the conventional [`DEFAULT_V0_M_S`] and
    /// [`DEFAULT_V_EARTH_M_S`].
    pub fn default_lab_frame() -> Self {
        HaloModel::LabFrame { v0_m_s: DEFAULT_V0_M_S, v_earth_m_s: DEFAULT_V_EARTH_M_S }
    }

    /// Mean squared speed in units of `c²` (dimensionless `<v²>/c²`).
    ///
    /// For the Maxwellian this is `v_rms²/c²`; for the boosted model it is
    /// `(3σ_v² + v_E²)/c²` with `σ_v = v0/√2`.
    pub fn mean_beta_sq(&self) -> f64 {
        let c2 = SPEED_OF_LIGHT_M_S * SPEED_OF_LIGHT_M_S;
        match *self {
            HaloModel::Maxwellian { v_rms_m_s } => v_rms_m_s * v_rms_m_s / c2,
            HaloModel::LabFrame { v0_m_s, v_earth_m_s } => {
                let sigma_m_s = dispersion_m_s(v0_m_s);
                (3.0 * sigma_m_s * sigma_m_s + v_earth_m_s * v_earth_m_s) / c2
            }
        }
    }

    /// Fraction of the signal power per Hz (units 1/Hz) at frequency
    /// `ν_a + offset_hz`, for an axion of rest frequency `axion_freq_hz`.
    ///
    /// Zero for `offset_hz ≤ 0`. The Maxwellian form is
    /// `(2/√π) √Δ (3/(ν_a<β²>))^{3/2} exp(−3Δ/(ν_a<β²>))` (Turner 1990).
    /// The boosted form follows from the speed density
    /// `f(v) = v/(√(2π) σ v_E) [exp(−(v−v_E)²/2σ²) − exp(−(v+v_E)²/2σ²)]`
    /// and `dv/dΔ = c²/(ν_a v)`.
    pub fn pdf_per_hz(&self, axion_freq_hz: f64, offset_hz: f64) -> f64 {
        if offset_hz <= 0.0 {
            return 0.0;
        }
        match *self {
            HaloModel::Maxwellian { .. } => {
                let rate_per_hz = 3.0 / (axion_freq_hz * self.mean_beta_sq());
                2.0 / PI.sqrt() * offset_hz.sqrt() * rate_per_hz.powf(1.5) * (-rate_per_hz * offset_hz).exp()
            }
            HaloModel::LabFrame { v0_m_s, v_earth_m_s } => {
                let sigma_m_s = dispersion_m_s(v0_m_s);
                let v_m_s = speed_from_offset_m_s(axion_freq_hz, offset_hz);
                // The factor v of f(v) cancels against dv/dΔ = c²/(ν_a v).
                SPEED_OF_LIGHT_M_S * SPEED_OF_LIGHT_M_S / (axion_freq_hz * (2.0 * PI).sqrt() * sigma_m_s * v_earth_m_s)
                    * gaussian_difference(v_m_s, v_earth_m_s, sigma_m_s)
            }
        }
    }

    /// Fraction of the signal power (dimensionless, 0 to 1) between the
    /// rest frequency `axion_freq_hz` and `axion_freq_hz + offset_hz`.
    ///
    /// The Maxwellian uses the Gamma(shape 3/2, rate `3/(ν_a<β²>)`)
    /// distribution function; the boosted model uses the closed form
    /// `F(v) = ½[erf((v−v_E)/(√2σ)) + erf((v+v_E)/(√2σ))]
    /// − σ/(v_E √(2π)) [exp(−(v−v_E)²/2σ²) − exp(−(v+v_E)²/2σ²)]`.
    pub fn cdf(&self, axion_freq_hz: f64, offset_hz: f64) -> f64 {
        if offset_hz <= 0.0 {
            return 0.0;
        }
        match *self {
            HaloModel::Maxwellian { .. } => {
                let rate_per_hz = 3.0 / (axion_freq_hz * self.mean_beta_sq());
                Gamma::new(1.5, rate_per_hz).expect("Gamma parameters must be positive and finite").cdf(offset_hz)
            }
            HaloModel::LabFrame { v0_m_s, v_earth_m_s } => {
                let sigma_m_s = dispersion_m_s(v0_m_s);
                let v_m_s = speed_from_offset_m_s(axion_freq_hz, offset_hz);
                let scale_m_s = 2.0_f64.sqrt() * sigma_m_s;
                0.5 * (erf((v_m_s - v_earth_m_s) / scale_m_s) + erf((v_m_s + v_earth_m_s) / scale_m_s))
                    - sigma_m_s / (v_earth_m_s * (2.0 * PI).sqrt()) * gaussian_difference(v_m_s, v_earth_m_s, sigma_m_s)
            }
        }
    }

    /// Fractions of the signal power (dimensionless) falling in consecutive
    /// bins of width `bin_width_hz` (Hz), the line starting at the lower edge
    /// of bin 0: `L_k = F((k+1)Δ) − F(kΔ)`.
    ///
    /// Bins are added until the cumulative fraction reaches
    /// `1 − tail_fraction`, so the returned fractions sum to at least that.
    ///
    /// # Panics
    ///
    /// If `bin_width_hz` is not positive and finite or `tail_fraction` is not
    /// strictly between 0 and 1.
    pub fn bin_fractions(&self, axion_freq_hz: f64, bin_width_hz: f64, tail_fraction: f64) -> Vec<f64> {
        assert!(bin_width_hz.is_finite() && bin_width_hz > 0.0, "bin width must be positive and finite, got {bin_width_hz}");
        assert!(tail_fraction > 0.0 && tail_fraction < 1.0, "tail fraction must lie strictly between 0 and 1, got {tail_fraction}");
        let target = 1.0 - tail_fraction;
        let mut fractions = Vec::new();
        let mut lower = 0.0;
        let mut bin = 0_u32;
        while lower < target {
            bin += 1;
            let upper = self.cdf(axion_freq_hz, f64::from(bin) * bin_width_hz);
            fractions.push(upper - lower);
            lower = upper;
        }
        fractions
    }
}

/// One-dimensional velocity dispersion `σ_v = v0/√2` in m/s.
fn dispersion_m_s(v0_m_s: f64) -> f64 {
    v0_m_s / 2.0_f64.sqrt()
}

/// Speed in m/s whose kinetic offset is `offset_hz`: `v = c √(2Δ/ν_a)`.
fn speed_from_offset_m_s(axion_freq_hz: f64, offset_hz: f64) -> f64 {
    SPEED_OF_LIGHT_M_S * (2.0 * offset_hz / axion_freq_hz).sqrt()
}

/// `exp(−(v−u)²/2σ²) − exp(−(v+u)²/2σ²)` written as
/// `exp(−(v−u)²/2σ²) · (1 − exp(−2vu/σ²))` so it stays accurate when
/// `u ≪ σ` and never forms an overflowing product.
fn gaussian_difference(v_m_s: f64, u_m_s: f64, sigma_m_s: f64) -> f64 {
    let sigma_sq = sigma_m_s * sigma_m_s;
    let lead = (-(v_m_s - u_m_s).powi(2) / (2.0 * sigma_sq)).exp();
    lead * -(-2.0 * v_m_s * u_m_s / sigma_sq).exp_m1()
}

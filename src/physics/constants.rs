//! Physical constants and model couplings used by the signal model.
//!
//! The SI constants are the CODATA 2018 recommended values
//! (E. Tiesinga et al., Rev. Mod. Phys. 93, 025010 (2021)). Constants fixed
//! exactly by the 2019 SI redefinition are written exactly; the others carry
//! the CODATA 2018 central value.

use std::f64::consts::PI;

/// Planck constant `h` in J·s (exact, CODATA 2018).
pub const PLANCK_J_S: f64 = 6.626_070_15e-34;

/// Reduced Planck constant `ħ = h / (2π)` in J·s (CODATA 2018).
pub const HBAR_J_S: f64 = PLANCK_J_S / (2.0 * PI);

/// Speed of light in vacuum `c` in m/s (exact, CODATA 2018).
pub const SPEED_OF_LIGHT_M_S: f64 = 299_792_458.0;

/// Boltzmann constant `k_B` in J/K (exact, CODATA 2018).
pub const BOLTZMANN_J_PER_K: f64 = 1.380_649e-23;

/// Elementary charge `e` in coulombs (exact, CODATA 2018).
pub const ELEMENTARY_CHARGE_C: f64 = 1.602_176_634e-19;

/// Fine-structure constant `α` (dimensionless, CODATA 2018).
pub const FINE_STRUCTURE: f64 = 7.297_352_569_3e-3;

/// Vacuum magnetic permeability `μ0` in H/m (CODATA 2018 measured value,
/// no longer exactly `4π × 10⁻⁷`).
pub const VACUUM_PERMEABILITY_H_PER_M: f64 = 1.256_637_062_12e-6;

/// Energy of one electronvolt in joules; numerically equal to the elementary
/// charge in coulombs.
pub const JOULE_PER_EV: f64 = ELEMENTARY_CHARGE_C;

/// The QCD scale `Λ` in eV that appears in the haloscope power formula,
/// defined through `m_a f_a = Λ²` (77.6 MeV, the value used by
/// Brubaker et al., Phys. Rev. D 96, 123008 (2017)).
pub const LAMBDA_QCD_EV: f64 = 77.6e6;

/// Dimensionless axion–photon model coupling `g_γ` of the KSVZ model
/// (hadronic axion, E/N = 0).
pub const G_GAMMA_KSVZ: f64 = -0.97;

/// Dimensionless axion–photon model coupling `g_γ` of the DFSZ model
/// (grand-unified assignment, E/N = 8/3).
pub const G_GAMMA_DFSZ: f64 = 0.36;

/// Local dark-matter mass density in GeV/cm³ conventionally assumed by
/// haloscope searches, taken to be made entirely of axions.
pub const DEFAULT_DM_DENSITY_GEV_PER_CM3: f64 = 0.45;

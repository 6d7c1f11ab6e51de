//! Simulated IQ captures of the invented haloscope: the scenario's night as the digitised,
//! down-converted samples from which `axsift average` forms the spectra.
//!
//! Step i lasts `n_averages` segments of `n_bins` samples at f_s = n_bins * bin_width_hz, so
//! averaging with `--fft-bins n_bins` gives the spectra file's bins and averages. The LO sits
//! at the step's cavity frequency, the centre of the spectrum. The samples are a circular
//! complex Gaussian process made in the frequency domain on the step's own fine grid
//! (L = n_averages * n_bins bins of f_s / L): each fine bin gets an independent complex normal
//! amplitude of variance P_m = G b_i (k_B T f_s / L + S_m + I_m), the same model as the spectra
//! simulator's (gain ripple G and per-step baseline b_i at the bin's position, noise at T_sys,
//! axion power S from [`crate::inject`], lines I spread evenly over their spectral bin), and
//! one inverse transform of length L gives the L samples, in sqrt(W) at the cavity output.
//! They are stored as int16 with `iq_scale` set so that the noise is about 1000 counts RMS
//! per component (the rounding adds 1/6 count^2 of white power, 8e-8 of the noise).

use super::{Frame, SIGNAL_V_RMS_M_S, Scenario};
use crate::inject::{SignalModel, SyntheticAxion};
use crate::iq::{IqHeader, IqStepMeta, IqWriter, SampleKind, Samples};
use crate::physics::constants::{BOLTZMANN_J_PER_K, DEFAULT_DM_DENSITY_GEV_PER_CM3, G_GAMMA_KSVZ};
use crate::physics::lineshape::HaloModel;
use crate::physics::signal::{CavityState, Haloscope};
use crate::runfile::RunFileError;
use rand::SeedableRng;
use rand::rngs::StdRng;
use rand_distr::{Distribution, StandardNormal, Uniform};
use rayon::prelude::*;
use rustfft::FftPlanner;
use rustfft::num_complex::Complex;
use std::path::Path;

/// Largest number of samples per simulated step (each is synthesised in memory, 16 bytes per
/// sample).
pub const MAX_SIMULATED_SAMPLES: usize = 1 << 23;
/// Noise RMS per component (I or Q) of the stored samples, counts.
const NOISE_RMS_COUNTS: f64 = 1000.0;

/// Writes the scenario's night as an int16 IQ capture to `out` (temporary file renamed into
/// place).
pub fn simulate_capture(sc: &Scenario, out: &Path) -> Result<(), RunFileError> {
    let s = &sc.scan;
    let n_samples = (s.n_averages as usize).saturating_mul(s.n_bins);
    if n_samples > MAX_SIMULATED_SAMPLES || !s.n_bins.is_multiple_of(2) {
        return Err(RunFileError::Invalid {
            path: out.to_path_buf(),
            field: "scan.n_averages".into(),
            step: None,
            message: format!(
                "a simulated capture holds n_averages x n_bins = {n_samples} samples per step, at most {MAX_SIMULATED_SAMPLES}, with n_bins even ({}): lower n_averages",
                s.n_bins
            ),
        });
    }
    let sample_rate_hz = s.n_bins as f64 * s.bin_width_hz;
    let iq_scale_v = (BOLTZMANN_J_PER_K * s.noise_temp_k * sample_rate_hz / 2.0).sqrt() / NOISE_RMS_COUNTS;
    let header = IqHeader {
        sample_rate_hz,
        magnet_field_t: sc.facility.magnet_field_t,
        cavity_volume_m3: sc.facility.cavity_volume_m3,
        form_factor: sc.facility.form_factor,
        run_label: sc.run_label.clone(),
    };
    let mut writer = IqWriter::create(out, &header, SampleKind::I16 { iq_scale_v }, s.n_steps, n_samples)?;
    let inverse = FftPlanner::new().plan_fft_inverse(n_samples);
    let chunk = rayon::current_num_threads();
    for first in (0..s.n_steps).step_by(chunk) {
        let steps: Vec<(IqStepMeta, Samples)> =
            (first..(first + chunk).min(s.n_steps)).into_par_iter().map(|i| capture_step(sc, i, n_samples, iq_scale_v, inverse.as_ref())).collect();
        for (meta, samples) in &steps {
            writer.push_step(*meta, samples)?;
        }
    }
    writer.finish()
}

fn capture_step(sc: &Scenario, i: usize, n_samples: usize, iq_scale_v: f64, inverse: &dyn rustfft::Fft<f64>) -> (IqStepMeta, Samples) {
    let s = &sc.scan;
    let mut rng = StdRng::seed_from_u64(sc.seed.wrapping_mul(0x9E37_79B9_7F4A_7C15) ^ (i as u64).wrapping_add(1));
    let start_hz = sc.start_freq_hz(i);
    let lo_freq_hz = start_hz + (s.n_bins / 2) as f64 * s.bin_width_hz;
    let meta = IqStepMeta {
        lo_freq_hz,
        cavity_freq_hz: lo_freq_hz,
        loaded_q: s.loaded_q,
        coupling_beta: s.coupling_beta,
        noise_temp_k: s.noise_temp_k,
        timestamp_s: 1.0e9 + i as f64 * s.n_averages as f64 / s.bin_width_hz,
    };
    // Fine bins per spectral bin, and the fine grid: bin m is centred at start_hz + m * fine_hz,
    // which is spectral bin m / per_bin.
    let per_bin = s.n_averages as f64;
    let fine_hz = s.bin_width_hz / per_bin;
    let mut excess_w = vec![0.0; n_samples];
    let scope = Haloscope { magnet_field_t: sc.facility.magnet_field_t, cavity_volume_m3: sc.facility.cavity_volume_m3, form_factor: sc.facility.form_factor };
    let cavity = CavityState { cavity_freq_hz: meta.cavity_freq_hz, loaded_q: s.loaded_q, coupling_beta: s.coupling_beta };
    let signals = SignalModel { halo: HaloModel::Maxwellian { v_rms_m_s: SIGNAL_V_RMS_M_S }, dm_density_gev_per_cm3: DEFAULT_DM_DENSITY_GEV_PER_CM3 };
    let axions: Vec<SyntheticAxion> = sc.axion.iter().map(|a| SyntheticAxion { freq_hz: a.freq_hz, g_gamma: G_GAMMA_KSVZ * a.coupling_rel_ksvz }).collect();
    signals.add_power_w(&axions, &scope, &cavity, start_hz, fine_hz, &mut excess_w);
    let line_w = BOLTZMANN_J_PER_K * s.noise_temp_k * s.bin_width_hz;
    let lines: Vec<(f64, f64)> = sc
        .interference
        .iter()
        .map(|l| match l.frame {
            Frame::If => (l.position, l.power_rel),
            Frame::Rf => ((l.position - start_hz) / s.bin_width_hz, l.power_rel),
        })
        .chain(sc.if_burst.iter().filter(|b| (b.first_step..=b.last_step).contains(&i)).map(|b| (b.if_bin as f64, b.power_rel)))
        .collect();
    let noise_w = BOLTZMANN_J_PER_K * s.noise_temp_k * fine_hz;
    let unit = Uniform::new(-1.0, 1.0).expect("valid range");
    let (c1, c2): (f64, f64) = (unit.sample(&mut rng), unit.sample(&mut rng));
    let half = n_samples / 2;
    let mut spectrum = vec![Complex::default(); n_samples];
    for (m, excess) in excess_w.iter().enumerate() {
        let k = m as f64 / per_bin;
        let x = 2.0 * k / (s.n_bins - 1) as f64 - 1.0;
        let gain = 1.0 + s.gain_ripple * (std::f64::consts::TAU * k / s.gain_ripple_period_bins).sin();
        let drift = 1.0 + s.baseline_drift * (c1 * x + c2 * x * x);
        let line: f64 = lines.iter().filter(|(bin, _)| (k - bin).abs() < 0.5).map(|(_, power_rel)| power_rel * line_w / per_bin).sum();
        let amplitude = (gain * drift * (noise_w + excess + line) / 2.0).sqrt();
        let (re, im): (f64, f64) = (StandardNormal.sample(&mut rng), StandardNormal.sample(&mut rng));
        // Fine bin m has offset (m - L/2) fine bins from the LO: index (m + L/2) mod L of the transform.
        spectrum[(m + half) % n_samples] = Complex::new(amplitude * re, amplitude * im);
    }
    inverse.process(&mut spectrum);
    let counts = |v: f64| (v / iq_scale_v).round().clamp(f64::from(i16::MIN), f64::from(i16::MAX)) as i16;
    let samples = spectrum.iter().flat_map(|x| [counts(x.re), counts(x.im)]).collect();
    (meta, Samples::I16(samples))
}

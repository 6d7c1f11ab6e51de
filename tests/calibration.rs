//! Calibration by injection: null statistics, attenuation, efficiency, radiometer check.
//! Seeded; each tolerance is stated beside its test.

mod common;

use axsift::calib::{self, CampaignSpec, NoiseSource, kolmogorov_q, ks_unit_normal};
use axsift::config;
use axsift::physics::constants::{BOLTZMANN_J_PER_K, G_GAMMA_KSVZ};
use axsift::physics::lineshape::HaloModel;
use axsift::physics::signal::{CavityState, Haloscope, signal_power_w};
use axsift::pipeline;
use axsift::sim;
use common::{PIPELINE, null_scenario};
use rand::SeedableRng;
use rand::rngs::StdRng;
use rand_distr::{Distribution, Normal as NormalDist, StandardNormal};

fn small_spec(seed: u64) -> CampaignSpec {
    CampaignSpec {
        seed,
        null_realisations: 1,
        eta_realisations: 1,
        eta_snr: 20.0,
        snr_grid: Vec::new(),
        realisations_per_snr: 0,
        max_injections_per_realisation: 40,
    }
}

fn with_window(window: usize) -> String {
    PIPELINE.replace("window_bins = 401", &format!("window_bins = {window}"))
}

/// The asymptotic Kolmogorov distribution reproduces the published large-n critical values
/// of the one-sample test: 1.36/sqrt(n) at 5% and 1.63/sqrt(n) at 1% (Smirnov, Ann. Math.
/// Stat. 19, 279 (1948), table of the limiting distribution; also Massey, JASA 46, 68 (1951)).
#[test]
fn kolmogorov_distribution_matches_published_critical_values() {
    assert!((kolmogorov_q(1.3581) - 0.05).abs() < 2e-4, "{}", kolmogorov_q(1.3581));
    assert!((kolmogorov_q(1.6276) - 0.01).abs() < 1e-4, "{}", kolmogorov_q(1.6276));
    let mut rng = StdRng::seed_from_u64(3);
    let good: Vec<f64> = (0..100_000).map(|_| StandardNormal.sample(&mut rng)).collect();
    assert!(ks_unit_normal(&good).p_value > 0.01);
    let shifted = NormalDist::new(0.03, 1.0).unwrap();
    let bad: Vec<f64> = (0..100_000).map(|_| shifted.sample(&mut rng)).collect();
    assert!(ks_unit_normal(&bad).p_value < 1e-4, "a 0.03 sigma shift over 1e5 samples must be seen");
}

/// Acceptance: the null grand spectrum passes a one-sample KS test against N(0, 1)
/// (statrs normal CDF) at p > 0.01 over 1e5 bins. The grand spectrum is band-limited by the
/// baseline fit and the line filter, so neighbours are correlated up to ~300 bins (measured
/// autocorrelation below 0.03 beyond 450): the bins are thinned to one in 500, taken from
/// 20 null nights whose steps overlap by half (2.56e6 RF bins each).
#[test]
fn null_grand_spectrum_passes_ks_against_unit_normal() {
    let plan = config::load(PIPELINE, "pipeline.toml").unwrap();
    let dir = tempfile::tempdir().unwrap();
    let mut samples = Vec::new();
    for night in 0..20 {
        let mut sc = null_scenario(1000 + night);
        sc.scan.n_steps = 1250;
        sc.scan.step_bins = 2048;
        let path = dir.path().join("null.h5");
        sim::simulate(&sc, &path).unwrap();
        let r = pipeline::reduce(&plan, &[path], &|_, _| {}).unwrap();
        samples.extend(r.spectrum.grand.iter().copied().filter(|g| g.is_finite()).step_by(500));
    }
    assert!(samples.len() >= 100_000, "{} samples", samples.len());
    let ks = ks_unit_normal(&samples);
    assert!(ks.p_value > 0.01, "KS D = {}, p = {} over {} bins", ks.statistic, ks.p_value, ks.n);
}

/// Acceptance: after applying eta, the efficiency at injected SNR 5 with Theta = 3.355 is
/// Phi(5 - 3.355) = 95% within 3 binomial standard errors (400 injections: +-3.3%). The same
/// campaign's radiometer check: 1/sigma_A of the chain agrees with the Dicke SNR of a
/// reference axion within 10%, and with the ideal filter's sqrt(3/pi) = 0.977 within 2%.
#[test]
fn efficiency_at_snr_5_is_95_percent_and_radiometer_agrees() {
    let plan = config::load(PIPELINE, "pipeline.toml").unwrap();
    let dir = tempfile::tempdir().unwrap();
    let sc = null_scenario(77);
    let spec = CampaignSpec { eta_realisations: 2, snr_grid: vec![5.0], realisations_per_snr: 10, ..small_spec(5) };
    let cal = calib::calibrate(&plan, &NoiseSource::Simulated { scenario: &sc, scratch: dir.path() }, &spec, &|_, _| {}).unwrap();
    let p = &cal.efficiency[0];
    assert_eq!(p.n, 400);
    let se = (0.95f64 * 0.05 / 400.0).sqrt();
    assert!((cal.threshold - 3.355).abs() < 1e-3);
    assert!((p.efficiency - 0.95).abs() < 3.0 * se, "efficiency {} ({} of {})", p.efficiency, p.detected, p.n);
    let r = &cal.radiometer;
    assert!((r.ratio - 1.0).abs() < 0.10, "chain {} vs Dicke {}", r.filter_snr, r.dicke_snr);
    assert!((r.ratio - (3.0 / std::f64::consts::PI).sqrt()).abs() < 0.02, "ratio {}", r.ratio);
}

/// The Dicke SNR computed here from the scenario alone (not through the campaign code)
/// against 1/sigma_A of a null reduction, at the centre of the scan: within 10%.
#[test]
fn sigma_a_agrees_with_the_radiometer_equation() {
    let plan = config::load(PIPELINE, "pipeline.toml").unwrap();
    let dir = tempfile::tempdir().unwrap();
    let sc = null_scenario(78);
    let path = dir.path().join("null.h5");
    sim::simulate(&sc, &path).unwrap();
    let r = pipeline::reduce(&plan, &[path], &|_, _| {}).unwrap();
    let sp = &r.spectrum;
    let j = sp.grand.len() / 2;
    let nu = sp.freq_hz(j) - sp.bin_width_hz / 2.0;
    let s = &sc.scan;
    let scope = Haloscope { magnet_field_t: sc.facility.magnet_field_t, cavity_volume_m3: sc.facility.cavity_volume_m3, form_factor: sc.facility.form_factor };
    let width_hz = nu * HaloModel::default().mean_beta_sq();
    let t_s = s.n_averages as f64 / s.bin_width_hz;
    let snr_sq: f64 = (0..s.n_steps)
        .map(|i| sc.start_freq_hz(i))
        .filter(|&start| start <= nu && nu + 3.0 * width_hz <= start + (s.n_bins - 1) as f64 * s.bin_width_hz)
        .map(|start| {
            let cavity = CavityState { cavity_freq_hz: start + (s.n_bins / 2) as f64 * s.bin_width_hz, loaded_q: s.loaded_q, coupling_beta: s.coupling_beta };
            let p = signal_power_w(G_GAMMA_KSVZ, 0.45, &scope, &cavity, nu);
            (p / (BOLTZMANN_J_PER_K * s.noise_temp_k)).powi(2) * t_s / width_hz
        })
        .sum();
    let ratio = (1.0 / sp.sigma_a[j]) / snr_sq.sqrt();
    assert!((ratio - 1.0).abs() < 0.10, "1/sigma_A = {}, Dicke {}", 1.0 / sp.sigma_a[j], snr_sq.sqrt());
}

/// Physical sanity: the baseline fit eats more of the signal as its window narrows toward
/// the line width (~42 bins here): eta(201) < eta(401) < eta(801), each step by more than
/// 5 standard errors; and eta lies in (0, 1).
#[test]
fn eta_falls_as_the_window_narrows() {
    let dir = tempfile::tempdir().unwrap();
    let sc = null_scenario(88);
    let mut last: Option<(usize, f64, f64)> = None;
    for window in [801, 401, 201] {
        let plan = config::load(&with_window(window), "pipeline.toml").unwrap();
        let cal = calib::calibrate(&plan, &NoiseSource::Simulated { scenario: &sc, scratch: dir.path() }, &small_spec(9), &|_, _| {}).unwrap();
        let a = &cal.attenuation;
        assert!(a.eta > 0.0 && a.eta < 1.0, "W={window}: eta {}", a.eta);
        if let Some((w, eta, se)) = last {
            assert!(eta - a.eta > 5.0 * (se * se + a.standard_error * a.standard_error).sqrt(), "eta({w}) = {eta}, eta({window}) = {}", a.eta);
        }
        last = Some((window, a.eta, a.standard_error));
    }
}

/// Injections into a recorded night measure the same eta as simulated nights, within 4
/// combined standard errors; and only the calibration file lists the injected frequencies.
#[test]
fn recorded_night_gives_the_same_eta() {
    let plan = config::load(PIPELINE, "pipeline.toml").unwrap();
    let dir = tempfile::tempdir().unwrap();
    let sc = null_scenario(99);
    let recorded = dir.path().join("recorded.h5");
    sim::simulate(&sc, &recorded).unwrap();
    let spec = CampaignSpec { eta_realisations: 2, ..small_spec(10) };
    let from_file = calib::calibrate(&plan, &NoiseSource::Recorded(std::slice::from_ref(&recorded)), &spec, &|_, _| {}).unwrap();
    let simulated = calib::calibrate(&plan, &NoiseSource::Simulated { scenario: &sc, scratch: dir.path() }, &spec, &|_, _| {}).unwrap();
    let (a, b) = (&from_file.attenuation, &simulated.attenuation);
    assert_eq!(from_file.noise, "recorded");
    assert!((a.eta - b.eta).abs() < 4.0 * (a.standard_error.powi(2) + b.standard_error.powi(2)).sqrt(), "{} vs {}", a.eta, b.eta);

    let out = dir.path().join("cal");
    from_file.write(&out).unwrap();
    let f = from_file.injections[0].freq_hz;
    let csv = std::fs::read_to_string(out.join("efficiency.csv")).unwrap();
    assert!(!csv.contains(&format!("{}", f.round() as i64)));
    let json = std::fs::read_to_string(out.join("calibration.json")).unwrap();
    assert!(json.contains(&format!("{f}")));
}

/// `reduce` refuses a calibration made with other baseline options, and takes a matching one.
#[test]
fn a_calibration_from_another_pipeline_is_refused() {
    let plan = config::load(PIPELINE, "pipeline.toml").unwrap();
    let dir = tempfile::tempdir().unwrap();
    let sc = null_scenario(111);
    let cal = calib::calibrate(&plan, &NoiseSource::Simulated { scenario: &sc, scratch: dir.path() }, &small_spec(1), &|_, _| {}).unwrap();
    cal.write(dir.path()).unwrap();
    let path = dir.path().join("calibration.json");
    assert!(calib::Calibration::load_for(&path, &plan).is_ok());
    let other = config::load(&with_window(301), "pipeline.toml").unwrap();
    let err = calib::Calibration::load_for(&path, &other).unwrap_err();
    assert!(err.contains("different pipeline") && err.contains("calibration.json"), "{err}");
    // Comments and the rescale stage do not change what the calibration measured.
    let reworded = config::load(&format!("# note\n{PIPELINE}").replace("reference = \"ksvz\"", "reference = \"dfsz\""), "p.toml").unwrap();
    assert!(calib::Calibration::load_for(&path, &reworded).is_ok());
}

//! Fast paths against slow oracles on seeded data: overlap-save FFT correlation and smoothing
//! against direct sums, and the baseline, rescale and filter stages against straightforward
//! re-implementations of their formulas. Tolerances are stated per test.

use axsift::config::{BuildContext, Built, StageConfig};
use axsift::dsp::correlate::{CorrelationScratch, Correlator};
use axsift::dsp::savgol::{SavitzkyGolay, SmoothingScratch};
use axsift::dsp::spread::filtered_noise_spread;
use axsift::physics::constants::BOLTZMANN_J_PER_K;
use axsift::physics::signal::{CavityState, Haloscope, signal_power_w};
use axsift::runfile::{RunHeader, StepMeta};
use axsift::stage::baseline::BaselineConfig;
use axsift::stage::filter::{FilterConfig, Halo};
use axsift::stage::rescale::{Reference, RescaleConfig};
use axsift::stage::{NightInfo, Spectrum, Standardised, Step, StepStage, Verdict};
use rand::rngs::StdRng;
use rand::{RngExt, SeedableRng};
use rand_distr::{Distribution, StandardNormal};

fn night(n_bins: usize, rf_span_hz: (f64, f64)) -> NightInfo {
    let header = RunHeader {
        bin_width_hz: 100.0,
        magnet_field_t: 8.0,
        cavity_volume_m3: 0.02,
        form_factor: 0.45,
        run_label: "test".into(),
        bin_correlation: Vec::new(),
    };
    NightInfo { bin_width_hz: 100.0, n_bins, rf_span_hz, headers: vec![header], bin_correlation: Vec::new() }
}

fn meta(start_freq_hz: f64, n_bins: usize) -> StepMeta {
    StepMeta {
        start_freq_hz,
        cavity_freq_hz: start_freq_hz + (n_bins / 2) as f64 * 100.0,
        loaded_q: 5e4,
        coupling_beta: 2.0,
        noise_temp_k: 0.6,
        n_averages: 20_000,
        timestamp_s: 1e9,
    }
}

fn step_stage(built: Built) -> Box<dyn StepStage> {
    match built {
        Built::Step(s) => s,
        _ => panic!("not a per-step stage"),
    }
}

/// FFT correlation equals the direct sum within 1e-12 of the largest |input| times the
/// kernel's absolute sum, for kernels of 1 to 900 values, outputs shorter and longer than
/// the input (zero padding past its end), and a scratch reused across kernels.
#[test]
fn fft_correlation_equals_direct_sum() {
    let mut rng = StdRng::seed_from_u64(1);
    let mut scratch: CorrelationScratch = CorrelationScratch::default();
    for (k, n, m) in [(1, 50, 50), (7, 3000, 2994), (112, 5000, 5000), (401, 9000, 8600), (900, 20_000, 21_000), (33, 10, 40)] {
        let kernel: Vec<f64> = (0..k).map(|_| rng.random_range(-1.0..1.0)).collect();
        let input: Vec<f64> = (0..n).map(|_| rng.random_range(-5.0..5.0)).collect();
        let c = Correlator::new(&kernel);
        let mut out = vec![f64::NAN; m];
        c.correlate_with(&input, &mut out, &mut scratch);
        let bound = 1e-12 * 5.0 * kernel.iter().map(|v| v.abs()).sum::<f64>();
        for (j, o) in out.iter().enumerate() {
            let direct: f64 = kernel.iter().enumerate().filter(|(i, _)| j + i < n).map(|(i, c)| c * input[j + i]).sum();
            assert!((o - direct).abs() <= bound, "K={k} n={n} j={j}: fft {o} vs direct {direct}");
        }
    }
}

/// The planned smoother with a reused scratch gives the same bits as a fresh one, and its
/// interior equals the direct convolution with the interior weights within 1e-12 relative.
#[test]
fn planned_smoothing_with_reused_scratch_matches_direct_convolution() {
    let mut rng = StdRng::seed_from_u64(2);
    let mut scratch: SmoothingScratch = SmoothingScratch::default();
    for (window, order, n) in [(401, 4, 32_768), (31, 2, 1000), (801, 4, 5000), (401, 4, 401)] {
        let sg = SavitzkyGolay::new(window, order).unwrap();
        let plan = sg.plan(n).unwrap();
        let input: Vec<f64> = (0..n).map(|_| 1.0 + 0.01 * rng.random_range(-1.0..1.0)).collect();
        let (mut reused, mut fresh) = (vec![0.0; n], vec![0.0; n]);
        plan.smooth_with(&input, &mut reused, &mut scratch).unwrap();
        plan.smooth(&input, &mut fresh).unwrap();
        assert_eq!(reused, fresh);
        let h = sg.coefficients();
        let half = window / 2;
        for p in half..n - half {
            let direct: f64 = h.iter().enumerate().map(|(j, hj)| hj * input[p - half + j]).sum();
            assert!((reused[p] - direct).abs() <= 1e-12 * direct.abs(), "W={window} bin {p}: {} vs {direct}", reused[p]);
        }
    }
}

/// The smoother with single-precision transforms (as the baseline stage uses) against the
/// direct f64 convolution, on spectra like a step's: power near 1 with a 5 % ripple, radiometer
/// noise of 20000 averages, and one with a narrow line five times the level. Each interior
/// value is within 5e-7 of the largest departure from the mean, |x - mean|, of the input
/// (f32 rounds to 6e-8 relative; the error grows through the FFT's twelve stages and the
/// product with the kernel spectrum; 2.4e-7 seen). The edges are f64 and agree within 1e-12.
#[test]
fn single_precision_smoothing_matches_direct_convolution() {
    let mut rng = StdRng::seed_from_u64(5);
    let mut scratch: SmoothingScratch<f32> = SmoothingScratch::default();
    let mut worst: f64 = 0.0;
    for (window, order, n, spike) in [(401, 4, 32_768, false), (401, 4, 32_768, true), (201, 4, 4096, false), (31, 2, 1000, true)] {
        let sg = SavitzkyGolay::new(window, order).unwrap();
        let plan = sg.plan_in::<f32>(n).unwrap();
        let mut input: Vec<f64> = (0..n)
            .map(|k| (1.0 + 0.05 * (k as f64 / 1500.0).sin()) * (1.0 + 0.007 * <StandardNormal as Distribution<f64>>::sample(&StandardNormal, &mut rng)))
            .collect();
        if spike {
            input[n / 3] = 5.0;
        }
        let mean = input.iter().sum::<f64>() / n as f64;
        let largest_departure = input.iter().map(|x| (x - mean).abs()).fold(0.0, f64::max);
        let mut out = vec![0.0; n];
        plan.smooth_with(&input, &mut out, &mut scratch).unwrap();
        let exact = sg.smooth(&input).unwrap();
        let h = sg.coefficients();
        let half = window / 2;
        for p in 0..n {
            if p < half || p >= n - half {
                assert!((out[p] - exact[p]).abs() <= 1e-12, "W={window} edge bin {p}");
                continue;
            }
            let direct: f64 = h.iter().enumerate().map(|(j, hj)| hj * input[p - half + j]).sum();
            let error = (out[p] - direct).abs() / largest_departure;
            worst = worst.max(error);
            assert!(error <= 5e-7, "W={window} spike={spike} bin {p}: {} vs {direct} ({error:.2e} of the largest departure)", out[p]);
        }
    }
    println!("largest interior error: {worst:.2e} of the largest departure");
}

/// The baseline stage (planned fit with single-precision transforms, in-place gap bridging)
/// equals the formula delta = P / (G * SG(bridged P / G)) - 1 computed in f64 with the one-shot
/// smoother, within 1e-8 (the residual's spread here is 7e-3, so 1.4e-6 of it; 6.4e-10 seen),
/// with missing bins (NaN) at the edges and in runs inside, which stay NaN.
#[test]
fn baseline_stage_matches_its_formula_with_gaps() {
    let n = 4096;
    let night = night(n, (5.2e9, 5.3e9));
    let config = BaselineConfig { window_bins: 201, order: 4, max_spread_deviation: 10.0 };
    let mut stage = step_stage(config.build(&night, &BuildContext { baseline_kernel: None }).unwrap());
    let mut rng = StdRng::seed_from_u64(3);
    let raw = |rng: &mut StdRng| -> Vec<f64> {
        let mut v: Vec<f64> = (0..n)
            .map(|k| (1.0 + 0.05 * (k as f64 / 300.0).sin()) * (1.0 + 0.007 * <StandardNormal as Distribution<f64>>::sample(&StandardNormal, rng)))
            .collect();
        for k in (0..5).chain(1000..1040).chain(2500..2501).chain(n - 3..n) {
            v[k] = f64::NAN;
        }
        v
    };
    let steps: Vec<Step> = (0..4)
        .map(|i| Step {
            index: i,
            file: 0,
            index_in_file: i,
            meta: meta(5.2e9, n),
            values: raw(&mut rng),
            standard: Default::default(),
            no_data: Default::default(),
        })
        .collect();
    for s in &steps {
        stage.survey(s);
    }
    stage.finish_survey().unwrap();
    // The gain shape, as documented: mean of the finite values per bin, normalised to mean 1.
    let mean: Vec<f64> = (0..n)
        .map(|k| {
            let v: Vec<f64> = steps.iter().map(|s| s.values[k]).filter(|v| v.is_finite()).collect();
            if v.is_empty() { f64::NAN } else { v.iter().sum::<f64>() / v.len() as f64 }
        })
        .collect();
    let finite: Vec<f64> = mean.iter().copied().filter(|v| v.is_finite()).collect();
    let norm = finite.iter().sum::<f64>() / finite.len() as f64;
    let gain: Vec<f64> = mean.iter().map(|m| m / norm).collect();
    let sg = SavitzkyGolay::new(201, 4).unwrap();
    let mut worst: f64 = 0.0;
    for mut s in steps {
        let flat: Vec<f64> = s.values.iter().zip(&gain).map(|(p, g)| p / g).collect();
        let good: Vec<usize> = (0..n).filter(|&k| flat[k].is_finite()).collect();
        let bridged: Vec<f64> = (0..n)
            .map(|k| match good.binary_search(&k) {
                Ok(_) => flat[k],
                Err(0) => flat[good[0]],
                Err(i) if i == good.len() => flat[good[i - 1]],
                Err(i) => {
                    let (a, b) = (good[i - 1], good[i]);
                    flat[a] + (k - a) as f64 / (b - a) as f64 * (flat[b] - flat[a])
                }
            })
            .collect();
        let fit = sg.smooth(&bridged).unwrap();
        let expected: Vec<f64> = flat.iter().zip(&fit).map(|(x, f)| x / f - 1.0).collect();
        assert_eq!(stage.apply(&mut s, &night), Verdict::Keep);
        for (k, (got, want)) in s.values.iter().zip(&expected).enumerate() {
            assert_eq!(got.is_nan(), want.is_nan(), "bin {k}");
            if want.is_finite() {
                worst = worst.max((got - want).abs());
            }
        }
    }
    println!("largest departure from the f64 formula: {worst:.2e}");
    assert!(worst <= 1e-8, "{worst:.2e}");
}

/// The rescale stage (on-resonance power once, Lorentzian per bin) equals the documented
/// R = delta k_B T dnu_b / P_sig(f_k), sigma = k_B T dnu_b / (P_sig(f_k) sqrt(N)) evaluated
/// per bin with `signal_power_w`, as the standardised pair z = R / sigma and 1 / sigma, within
/// 1e-7 relative (both are stored in f32, whose rounding is at most 2^-24 = 6e-8 relative);
/// a missing bin gets z = 0 and 1 / sigma = 0 (no sample). (The oracle's f / f_c - 1 cancels
/// to about 1e-16 / |f / f_c - 1|, a few 1e-12 relative in the band.)
#[test]
fn rescale_stage_matches_signal_power_per_bin() {
    let n = 32_768;
    let night = night(n, (5.2e9, 5.3e9));
    let config = RescaleConfig { reference: Reference::Model("ksvz".into()), dm_density_gev_per_cm3: 0.45 };
    let stage = step_stage(config.build(&night, &BuildContext { baseline_kernel: None }).unwrap());
    let m = meta(5.2e9, n);
    let mut rng = StdRng::seed_from_u64(4);
    let delta: Vec<f64> =
        (0..n).map(|k| if k == 77 { f64::NAN } else { 0.007 * <StandardNormal as Distribution<f64>>::sample(&StandardNormal, &mut rng) }).collect();
    let mut step = Step { index: 0, file: 0, index_in_file: 0, meta: m, values: delta.clone(), standard: Default::default(), no_data: Default::default() };
    assert_eq!(stage.apply(&mut step, &night), Verdict::Keep);
    let h = &night.headers[0];
    let scope = Haloscope { magnet_field_t: h.magnet_field_t, cavity_volume_m3: h.cavity_volume_m3, form_factor: h.form_factor };
    let cavity = CavityState { cavity_freq_hz: m.cavity_freq_hz, loaded_q: m.loaded_q, coupling_beta: m.coupling_beta };
    let noise_w = BOLTZMANN_J_PER_K * m.noise_temp_k * 100.0;
    for k in 0..n {
        let scale = noise_w / signal_power_w(-0.97, 0.45, &scope, &cavity, m.start_freq_hz + k as f64 * 100.0);
        let (z, inv) = (step.standard.z[k], step.standard.inverse_sigma[k]);
        if k == 77 {
            assert!(z == 0.0 && inv == 0.0, "bin {k}: {z} {inv}");
            continue;
        }
        let (r, sigma) = (delta[k] * scale, scale / 20_000f64.sqrt());
        assert!((f64::from(z) / (r / sigma) - 1.0).abs() < 1e-7, "bin {k}");
        assert!((f64::from(inv) * sigma - 1.0).abs() < 1e-7, "bin {k}");
    }
}

/// The FFT optimal filter equals the direct sums A_j = sum L R w / sum L^2 w and
/// sigma_A = (sum L^2 w)^-1/2 within 1e-9 relative on a combined spectrum whose weights vary
/// by 1e4 and which has empty stretches; bins whose kernel sees no data are NaN / infinite
/// exactly where the direct sums are zero.
#[test]
fn fft_filter_matches_direct_sums() {
    let n = 120_000;
    let (lo, bw) = (5.2e9, 100.0);
    let night = night(4096, (lo, lo + (n - 1) as f64 * bw));
    let config = FilterConfig { halo: Halo::Maxwellian, v_rms_km_s: 270.0, v0_km_s: 220.0, v_earth_km_s: 232.0, tail_fraction: 1e-3, segment_fraction: 1e-4 };
    let kernel_h = SavitzkyGolay::new(401, 4).unwrap().coefficients().to_vec();
    let Built::Spectrum(stage) = config.build(&night, &BuildContext { baseline_kernel: Some(kernel_h.clone()) }).unwrap() else {
        panic!("not a spectrum stage")
    };
    let mut rng = StdRng::seed_from_u64(5);
    let mut sp = Spectrum { rf_start_hz: lo, bin_width_hz: bw, ..Spectrum::default() };
    for j in 0..n {
        let empty = (30_000..30_500).contains(&j) || j >= n - 50;
        let sigma = 1e-2 * (1.0 + 99.0 * (j as f64 / n as f64));
        sp.combined.push(if empty { f64::NAN } else { sigma * <StandardNormal as Distribution<f64>>::sample(&StandardNormal, &mut rng) });
        sp.combined_sigma.push(if empty { f64::INFINITY } else { sigma });
        sp.coverage.push(u32::from(!empty));
    }
    stage.apply(&mut sp, &[]).unwrap();
    let seg_bins = (1e-4 * lo / bw).floor() as usize;
    let model = config.model();
    for j in (0..n).step_by(7).chain(29_880..30_010).chain(n - 200..n) {
        let seg = j / seg_bins;
        let centre = lo + ((seg * seg_bins) as f64 + seg_bins as f64 / 2.0) * bw;
        let line = model.bin_fractions(centre, bw, 1e-3);
        let (mut num, mut den) = (0.0, 0.0);
        for (k, l) in line.iter().enumerate().filter(|(k, _)| j + k < n) {
            let s = sp.combined_sigma[j + k];
            if s.is_finite() {
                num += l * sp.combined[j + k] / (s * s);
                den += l * l / (s * s);
            }
        }
        if den == 0.0 {
            assert!(sp.amplitude[j].is_nan() && sp.sigma_a[j] == f64::INFINITY, "bin {j}");
            continue;
        }
        let (a, s) = (num / den, den.sqrt().recip());
        assert!((sp.sigma_a[j] / s - 1.0).abs() < 1e-9, "bin {j}: sigma_A {} vs {s}", sp.sigma_a[j]);
        assert!((sp.amplitude[j] - a).abs() < 1e-9 * s, "bin {j}: A {} vs {a}", sp.amplitude[j]);
        let spread = filtered_noise_spread(&line, Some(&kernel_h), &[]);
        assert_eq!(sp.predicted_spread[j], spread);
        assert!((sp.grand[j] - a / (s * spread)).abs() < 1e-8, "bin {j}");
    }
}

/// The combining stage's batched `add_all` (RF pieces in parallel) gives the same spectrum,
/// bit for bit, as adding the steps one by one, and both equal the maximum-likelihood mean and
/// sigma computed from the steps' values and sigma within 1e-6 of sigma (the standardised
/// pairs are f32; 3.7e-7 seen), for the mean and relative for sigma: overlapping steps of different lengths, NaN
/// values, infinite and zero sigma, batches that start mid-grid and a step off the grid.
#[test]
fn combine_add_all_equals_steps_added_one_by_one() {
    use axsift::stage::combine::CombineConfig;
    let n_bins = 20_000;
    let shift = 1_700;
    let n_steps = 24;
    let start = 5.2e9;
    let rf_span = (start, start + ((n_steps - 1) * shift + n_bins - 1) as f64 * 100.0);
    let night = night(n_bins, rf_span);
    let config = CombineConfig { max_misalignment_bins: 1e-3 };
    let combiner = || match config.build(&night, &BuildContext { baseline_kernel: None }).unwrap() {
        Built::Combine(c) => c,
        _ => panic!("not a combining stage"),
    };
    let mut rng = StdRng::seed_from_u64(29);
    let (steps, sigmas): (Vec<Step>, Vec<Vec<f64>>) = (0..n_steps)
        .map(|i| {
            // Later steps are shorter, so batches end at different RF bins.
            let n = n_bins - 37 * i;
            let mut values: Vec<f64> = (0..n).map(|_| StandardNormal.sample(&mut rng)).collect();
            let mut sigma: Vec<f64> = (0..n).map(|_| rng.random_range(0.5..2.0)).collect();
            for k in (i..n).step_by(997) {
                values[k] = f64::NAN;
            }
            for k in (2 * i..n).step_by(1201) {
                sigma[k] = f64::INFINITY;
            }
            for k in (3 * i..n).step_by(1499) {
                sigma[k] = 0.0;
            }
            let mut meta = meta(start + (i * shift) as f64 * 100.0, n);
            meta.timestamp_s += i as f64;
            // The standardised form as defined on `Standardised`: z = r / sigma and
            // 1 / sigma, both 0 where the bin holds no sample.
            let (z, inverse_sigma) = values
                .iter()
                .zip(&sigma)
                .map(|(&r, &s)| if r.is_finite() && s.is_finite() && s > 0.0 { ((r / s) as f32, (1.0 / s) as f32) } else { (0.0, 0.0) })
                .unzip();
            (Step { index: i, file: 0, index_in_file: i, meta, values, standard: Standardised { z, inverse_sigma }, no_data: Default::default() }, sigma)
        })
        .collect();
    let mut one_by_one = combiner();
    for step in &steps {
        one_by_one.add(step).unwrap();
    }
    let mut batched = combiner();
    for batch in steps.chunks(7) {
        batched.add_all(&batch.iter().collect::<Vec<_>>()).unwrap();
    }
    let (a, b) = (one_by_one.finish(), batched.finish());
    let bits = |v: &[f64]| v.iter().map(|x| x.to_bits()).collect::<Vec<_>>();
    assert_eq!(bits(&a.combined), bits(&b.combined));
    assert_eq!(bits(&a.combined_sigma), bits(&b.combined_sigma));
    assert_eq!(a.coverage, b.coverage);
    assert!(a.coverage.iter().any(|&c| c > 1));
    // Against the maximum-likelihood formula on values and sigma, valid bins only (value and
    // sigma finite, sigma > 0): mean sum(r / s^2) / sum(1 / s^2), sigma sum(1 / s^2)^(-1/2).
    let n_rf = a.combined.len();
    let (mut num, mut den, mut count) = (vec![0.0; n_rf], vec![0.0; n_rf], vec![0u32; n_rf]);
    for (step, sigma) in steps.iter().zip(&sigmas) {
        let first = ((step.meta.start_freq_hz - start) / 100.0).round() as usize;
        for (k, (&r, &s)) in step.values.iter().zip(sigma).enumerate() {
            if r.is_finite() && s.is_finite() && s > 0.0 {
                num[first + k] += r / (s * s);
                den[first + k] += 1.0 / (s * s);
                count[first + k] += 1;
            }
        }
    }
    assert_eq!(a.coverage, count);
    let mut worst = 0.0f64;
    for j in 0..n_rf {
        if count[j] == 0 {
            assert!(a.combined[j].is_nan() && a.combined_sigma[j] == f64::INFINITY, "RF bin {j}");
            continue;
        }
        let (mean, sigma) = (num[j] / den[j], den[j].sqrt().recip());
        worst = worst.max((a.combined[j] - mean).abs() / sigma).max((a.combined_sigma[j] / sigma - 1.0).abs());
        assert!((a.combined[j] - mean).abs() <= 1e-6 * sigma, "RF bin {j}: {} vs {mean}", a.combined[j]);
        assert!((a.combined_sigma[j] / sigma - 1.0).abs() <= 1e-6, "RF bin {j}");
    }
    println!("largest departure from the f64 formula: {worst:.2e} (of sigma)");

    let mut off_grid = steps[3].clone();
    off_grid.meta.start_freq_hz += 40.0;
    let err = combiner().add_all(&[&steps[0], &off_grid]).unwrap_err();
    assert!(err.contains("step 3") && err.contains("off the RF grid"), "{err}");
}

/// The baseline's batched survey (`survey_all`, IF pieces in parallel) forms the same gain
/// shape, bit for bit, as surveying the steps one by one: the stage then gives bit-identical
/// output for a step, with missing bins in the surveyed steps.
#[test]
fn baseline_survey_all_equals_steps_surveyed_one_by_one() {
    let n = 10_000;
    let night = night(n, (5.2e9, 5.3e9));
    let config = BaselineConfig { window_bins: 201, order: 4, max_spread_deviation: 10.0 };
    let build = || step_stage(config.build(&night, &BuildContext { baseline_kernel: None }).unwrap());
    let mut rng = StdRng::seed_from_u64(31);
    let steps: Vec<Step> = (0..9)
        .map(|i| {
            let mut values: Vec<f64> = (0..n).map(|k| (1.0 + 0.05 * (k as f64 / 300.0).sin()) * rng.random_range(0.9..1.1)).collect();
            for k in (i..n).step_by(331) {
                values[k] = f64::NAN;
            }
            Step { index: i, file: 0, index_in_file: i, meta: meta(5.2e9, n), values, standard: Default::default(), no_data: Default::default() }
        })
        .collect();
    let (mut one_by_one, mut batched) = (build(), build());
    for s in &steps {
        one_by_one.survey(s);
    }
    for batch in steps.chunks(4) {
        batched.survey_all(&batch.iter().collect::<Vec<_>>());
    }
    one_by_one.finish_survey().unwrap();
    batched.finish_survey().unwrap();
    let (mut a, mut b) = (steps[2].clone(), steps[2].clone());
    assert_eq!(one_by_one.apply(&mut a, &night), Verdict::Keep);
    assert_eq!(batched.apply(&mut b, &night), Verdict::Keep);
    assert_eq!(a.values.iter().map(|v| v.to_bits()).collect::<Vec<_>>(), b.values.iter().map(|v| v.to_bits()).collect::<Vec<_>>());
}

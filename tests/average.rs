//! `axsift average`: IQ captures -> run files. The radiometer spread after the baseline
//! stage (Dicke 1946) with and without overlap (Welch 1967), a tone in the bin the formula
//! says, a simulated axion found by `reduce` at its expected significance, bit-identical
//! output with 1 and 2 threads, and bad captures refused with exit status 2 and a message
//! naming file, step and field. The comparison with scipy.signal.welch is
//! scripts/check_average.py (run by scripts/test.sh).

use axsift::config::{BuildContext, Built, StageConfig};
use axsift::dsp::savgol::SavitzkyGolay;
use axsift::iq::{IqHeader, IqStepMeta, IqWriter, SampleKind, Samples};
use axsift::runfile::RunReader;
use axsift::stage::baseline::BaselineConfig;
use axsift::stage::{NightInfo, Step, Verdict};
use rand::SeedableRng;
use rand::rngs::StdRng;
use rand_distr::{Distribution, StandardNormal};
use std::path::{Path, PathBuf};
use std::process::Command;
use std::sync::Mutex;

/// HDF5 opens files without close-on-exec: a child started by one test would inherit files
/// another test is writing. The tests of this file take turns.
static FILES: Mutex<()> = Mutex::new(());

fn turn() -> std::sync::MutexGuard<'static, ()> {
    FILES.lock().unwrap_or_else(|e| e.into_inner())
}

fn axsift(args: &[&str]) -> std::process::Output {
    Command::new(env!("CARGO_BIN_EXE_axsift")).args(args).env("HDF5_USE_FILE_LOCKING", "FALSE").output().expect("axsift starts")
}

fn ok(args: &[&str]) {
    let out = axsift(args);
    assert!(out.status.success(), "axsift {args:?} failed: {}", String::from_utf8_lossy(&out.stderr));
}

fn s(p: &Path) -> &str {
    p.to_str().unwrap()
}

/// A scenario of the invented facility: `n_steps` of 2048 bins of 100 Hz, `n_averages`
/// segments per step, no gain ripple or drift, and the given extra TOML (axions).
fn scenario(dir: &Path, n_steps: usize, n_averages: usize, extra: &str) -> PathBuf {
    let text = format!(
        "seed = 11\nrun_label = \"average test (simulated)\"\n[facility]\nmagnet_field_t = 8.0\ncavity_volume_m3 = 0.02\nform_factor = 0.45\n\
         [scan]\nfirst_cavity_freq_hz = 5.2e9\nn_steps = {n_steps}\nstep_bins = 200\nn_bins = 2048\nbin_width_hz = 100.0\nloaded_q = 50000.0\n\
         coupling_beta = 2.0\nnoise_temp_k = 0.6\nn_averages = {n_averages}\n{extra}"
    );
    let path = dir.join("scenario.toml");
    std::fs::write(&path, text).unwrap();
    path
}

fn simulate_capture(dir: &Path, n_steps: usize, n_averages: usize, extra: &str) -> PathBuf {
    let capture = dir.join("capture.h5");
    ok(&["-q", "simulate", "--capture", "--scenario", s(&scenario(dir, n_steps, n_averages, extra)), "--out", s(&capture)]);
    capture
}

// ---------------------------------------------------------------------------------------
// Radiometer

/// Correlation of the periodogram values `lag` bins apart for white Gaussian noise and
/// window w: |sum_n w_n^2 exp(-2 pi i lag n / N)|^2 / (sum_n w_n^2)^2 (the covariance of two
/// bins of one windowed transform; Hann: 4/9 at lag 1, 1/36 at lag 2, 0 beyond).
fn bin_correlation(window: &[f64], lag: usize) -> f64 {
    let n = window.len() as f64;
    let (mut re, mut im, mut power) = (0.0, 0.0, 0.0);
    for (i, w) in window.iter().enumerate() {
        let phase = std::f64::consts::TAU * (lag * i) as f64 / n;
        re += w * w * phase.cos();
        im -= w * w * phase.sin();
        power += w * w;
    }
    (re * re + im * im) / (power * power)
}

fn hann(n: usize) -> Vec<f64> {
    (0..n).map(|i| 0.5 - 0.5 * (std::f64::consts::TAU * i as f64 / n as f64).cos()).collect()
}

/// Residuals delta = P / (G SG) - 1 of every step after the default pipeline's baseline stage
/// (window 401, order 4), interior bins only (half a window from either end, where the fit is
/// the plain kernel), with the steps' n_averages.
fn baseline_residuals(run: &Path) -> (Vec<Vec<f64>>, Vec<u64>) {
    let reader = RunReader::open(run).unwrap();
    let n_bins = reader.n_bins();
    let rows = reader.read_rows(0..reader.steps().len()).unwrap();
    let night = NightInfo {
        bin_width_hz: reader.header().bin_width_hz,
        n_bins,
        rf_span_hz: (5.1e9, 5.3e9),
        headers: vec![reader.header().clone()],
        bin_correlation: reader.header().bin_correlation.clone(),
    };
    let config = BaselineConfig { window_bins: 401, order: 4, max_spread_deviation: 0.2 };
    let Built::Step(mut stage) = config.build(&night, &BuildContext { baseline_kernel: None }).unwrap() else { panic!("a per-step stage") };
    let mut steps: Vec<Step> = reader
        .steps()
        .iter()
        .enumerate()
        .map(|(i, &meta)| Step {
            index: i,
            file: 0,
            index_in_file: i,
            meta,
            values: rows.row(i).to_vec(),
            standard: Default::default(),
            no_data: Default::default(),
        })
        .collect();
    stage.survey_all(&steps.iter().collect::<Vec<_>>());
    stage.finish_survey().unwrap();
    let mut residuals = Vec::new();
    for step in &mut steps {
        assert_eq!(stage.apply(step, &night), Verdict::Keep);
        residuals.push(step.values[200..n_bins - 200].to_vec());
    }
    (residuals, reader.steps().iter().map(|m| m.n_averages).collect())
}

/// The pooled RMS of the residuals over the prediction sqrt((1 - 1/M) F / N): with M steps the
/// common gain shape (their mean) takes 1/M of each step's variance, and the Savitzky-Golay
/// fit h takes F = 1 - 2 sum_k h_k rho_k + sum_jk h_j h_k rho_(j-k) of what is left, rho the
/// bins' correlation for `window` (F = 1 - h_0 for independent bins). Returns (ratio, N).
fn spread_over_prediction(run: &Path, window: &[f64]) -> (f64, u64) {
    let (residuals, n_averages) = baseline_residuals(run);
    let n = n_averages[0];
    assert!(n_averages.iter().all(|&k| k == n));
    let m = residuals.len() as f64;
    let sum_sq: f64 = residuals.iter().flatten().map(|d| d * d).sum();
    let measured = (sum_sq / residuals.iter().map(Vec::len).sum::<usize>() as f64).sqrt();
    let sg = SavitzkyGolay::new(401, 4).unwrap();
    let h = sg.coefficients();
    let rho: Vec<f64> = (0..h.len()).map(|lag| bin_correlation(window, lag)).collect();
    let mut f = 1.0;
    for (j, hj) in h.iter().enumerate() {
        f -= 2.0 * hj * rho[j.abs_diff(h.len() / 2)];
        for (k, hk) in h.iter().enumerate() {
            f += hj * hk * rho[j.abs_diff(k)];
        }
    }
    let predicted = ((1.0 - 1.0 / m) * f / n as f64).sqrt();
    (measured / predicted, n)
}

/// Dicke (1946): a bin averaged over N independent spectra scatters by 1/sqrt(N) of its
/// mean. 64 pure-noise steps of 64 segments of 2048 samples, averaged without overlap: the
/// residual spread after the baseline stage equals 1/sqrt(n_averages) (with the known share
/// the gain shape and the fit take, above) within 3 %, for both windows. Statistical error
/// of the pooled RMS: 64 x 1648 values, 1/sqrt(2 n) = 0.22 % (0.26 % with Hann's correlated
/// bins), so 3 % is far outside the noise; n_averages = 64 = the segments.
#[test]
fn radiometer_spread_without_overlap() {
    let _turn = turn();
    let dir = tempfile::tempdir().unwrap();
    let capture = simulate_capture(dir.path(), 64, 64, "");
    for (window, values) in [("hann", hann(2048)), ("rectangular", vec![1.0; 2048])] {
        let run = dir.path().join(format!("{window}.h5"));
        ok(&["-q", "average", "--fft-bins", "2048", "--window", window, "--out", s(&run), s(&capture)]);
        let declared = RunReader::open(&run).unwrap().header().bin_correlation.clone();
        let direct: Vec<f64> = (1..=8).map(|lag| bin_correlation(&values, lag)).filter(|r| *r > 1e-9).collect();
        assert_eq!(declared.len(), direct.len(), "{window}: bin_correlation {declared:?}, direct {direct:?}");
        assert!(declared.iter().zip(&direct).all(|(a, b)| (a - b).abs() < 1e-12), "{window}: bin_correlation {declared:?}, direct {direct:?}");
        let (ratio, n) = spread_over_prediction(&run, &values);
        assert_eq!(n, 64);
        eprintln!("{window}, no overlap: residual spread / radiometer prediction {ratio:.4}");
        assert!((ratio - 1.0).abs() < 0.03, "{window}: residual spread / radiometer prediction = {ratio:.4}");
    }
}

/// With 50 % overlap the 127 segments of each step are not independent: n_averages holds
/// Welch's (1967) effective number, 127 / (1 + 2 (1 - 1/127) rho_1) with rho_1 = 1/36
/// (Hann) and 1/4 (rectangular): 120 and 85. The measured spread matches 1/sqrt of it within
/// 1.2 % (4 x the 0.26 % statistical error, plus up to 0.2 % for using the single-segment bin
/// correlation in the fit's share F), while the raw count 127 would be 2.7 % (Hann) and 22 %
/// (rectangular) off.
#[test]
fn radiometer_spread_with_half_overlap_follows_the_effective_count() {
    let _turn = turn();
    let dir = tempfile::tempdir().unwrap();
    let capture = simulate_capture(dir.path(), 64, 64, "");
    for (window, values, expected_n) in [("hann", hann(2048), 120), ("rectangular", vec![1.0; 2048], 85)] {
        let run = dir.path().join(format!("{window}.h5"));
        ok(&["-q", "average", "--fft-bins", "2048", "--window", window, "--overlap", "0.5", "--out", s(&run), s(&capture)]);
        let (ratio, n) = spread_over_prediction(&run, &values);
        assert_eq!(n, expected_n, "{window}");
        eprintln!("{window}, overlap 0.5: residual spread / radiometer prediction {ratio:.4} with n_averages {n}");
        assert!((ratio - 1.0).abs() < 0.012, "{window}: residual spread / radiometer prediction with n_averages {n} = {ratio:.4}");
        let raw = ratio * (127.0 / n as f64).sqrt();
        assert!((raw - 1.0).abs() > 0.02, "{window}: the raw segment count would also fit ({raw:.4}): the check cannot tell");
    }
}

/// The grand spectrum of pure noise has unit spread whatever the window: the filter's
/// predicted spread takes the run file's `bin_correlation` (Hann: 4/9 and 1/36), without
/// which the Hann spread would be about 1.36. 160 steps of 16 segments, 200 bins apart (about
/// 34 k RF bins). Tolerance: 4 standard errors of the sample spread of correlated Gaussian
/// values, Var(s^2) = (2 s^4 / n) sum_tau rho(tau)^2 over lags (Bartlett 1946, J. R. Stat.
/// Soc. Suppl. 8, 27), with rho the grand spectrum's own autocorrelation out to 400 bins
/// (beyond the lineshape kernel's reach at 5.2 GHz).
#[test]
fn grand_spectrum_of_noise_has_unit_spread_with_either_window() {
    let _turn = turn();
    let dir = tempfile::tempdir().unwrap();
    let capture = simulate_capture(dir.path(), 160, 16, "");
    let pipeline = concat!(env!("CARGO_MANIFEST_DIR"), "/pipeline.toml");
    for window in ["hann", "rectangular"] {
        let run = dir.path().join(format!("{window}.h5"));
        let out = dir.path().join(format!("out-{window}"));
        ok(&["-q", "average", "--fft-bins", "2048", "--window", window, "--out", s(&run), s(&capture)]);
        ok(&["-q", "reduce", "--config", pipeline, "--out", s(&out), s(&run)]);
        let grand: Vec<f64> = hdf5::File::open(out.join("results.h5")).unwrap().dataset("grand").unwrap().read_raw().unwrap();
        let grand: Vec<f64> = grand.into_iter().filter(|g| g.is_finite()).collect();
        let n = grand.len() as f64;
        let mean = grand.iter().sum::<f64>() / n;
        let variance = grand.iter().map(|g| (g - mean).powi(2)).sum::<f64>() / n;
        let rho = |tau: usize| grand.iter().zip(&grand[tau..]).map(|(a, b)| (a - mean) * (b - mean)).sum::<f64>() / n / variance;
        let sum_rho_sq = 1.0 + 2.0 * (1..=400).map(|tau| rho(tau).powi(2)).sum::<f64>();
        let spread = variance.sqrt();
        // s = sqrt(s^2): its standard error is half the relative error of s^2.
        let standard_error = 0.5 * (2.0 * sum_rho_sq / n).sqrt();
        eprintln!("{window}: grand spectrum spread {spread:.4} over {n} bins, standard error {standard_error:.4}");
        assert!((spread - 1.0).abs() < 4.0 * standard_error, "{window}: grand spectrum spread {spread:.4}, expected 1 +- {:.4}", 4.0 * standard_error);
        assert!(4.0 * standard_error < 0.1, "{window}: the check could not tell a spread of 1.1 from 1 (standard error {standard_error:.4})");
    }
}

// ---------------------------------------------------------------------------------------
// Frequencies

fn header(sample_rate_hz: f64) -> IqHeader {
    IqHeader { sample_rate_hz, magnet_field_t: 8.0, cavity_volume_m3: 0.02, form_factor: 0.45, run_label: "average test (invented)".into() }
}

fn step_meta(i: usize, lo_freq_hz: f64) -> IqStepMeta {
    IqStepMeta { lo_freq_hz, cavity_freq_hz: lo_freq_hz, loaded_q: 5e4, coupling_beta: 2.0, noise_temp_k: 0.6, timestamp_s: 1e9 + 10.0 * i as f64 }
}

/// Writes a float32 capture whose step i holds `samples(i)` (complex, volts) at `lo(i)`.
fn write_capture(path: &Path, rate_hz: f64, n_steps: usize, n_samples: usize, lo: impl Fn(usize) -> f64, samples: impl Fn(usize) -> Vec<(f64, f64)>) {
    let mut w = IqWriter::create(path, &header(rate_hz), SampleKind::F32, n_steps, n_samples).unwrap();
    for i in 0..n_steps {
        let iq: Vec<f32> = samples(i).iter().flat_map(|&(re, im)| [re as f32, im as f32]).collect();
        assert_eq!(iq.len(), 2 * n_samples);
        w.push_step(step_meta(i, lo(i)), &Samples::F32(iq)).unwrap();
    }
    w.finish().unwrap();
}

/// A tone at RF frequency f lands in bin round((f - start_freq_hz) / bin_width_hz), with
/// start_freq_hz = lo - rate/2 + (dropped bins) * bin_width_hz (README "Averaging IQ
/// captures"; the sign convention: e^{+2 pi i f t} is the frequency lo + f). Tones above and
/// below the LO, 0.3 bin off a bin centre, in noise, with both windows and a kept fraction.
#[test]
fn tone_lands_in_the_bin_the_formula_says() {
    let _turn = turn();
    let dir = tempfile::tempdir().unwrap();
    let (rate_hz, n_fft, n_samples) = (409_600.0, 1024usize, 32 * 1024usize);
    let bin_hz = rate_hz / n_fft as f64;
    let lo = |i: usize| 5.2e9 + 7e3 * i as f64;
    // Offsets from the LO, in bins, one per step.
    let offsets = [-300.3, -17.3, 0.3, 41.7, 250.3];
    let capture = dir.path().join("tones.h5");
    write_capture(&capture, rate_hz, offsets.len(), n_samples, lo, |i| {
        let mut rng = StdRng::seed_from_u64(i as u64);
        let f = offsets[i] * bin_hz;
        (0..n_samples)
            .map(|n| {
                let phase = std::f64::consts::TAU * f * n as f64 / rate_hz;
                let (a, b): (f64, f64) = (StandardNormal.sample(&mut rng), StandardNormal.sample(&mut rng));
                (phase.cos() + 0.1 * a, phase.sin() + 0.1 * b)
            })
            .collect()
    });
    for (window, keep) in [("hann", "1"), ("rectangular", "0.75")] {
        let run = dir.path().join(format!("{window}.h5"));
        ok(&["-q", "average", "--fft-bins", &n_fft.to_string(), "--window", window, "--keep-fraction", keep, "--out", s(&run), s(&capture)]);
        let reader = RunReader::open(&run).unwrap();
        let rows = reader.read_rows(0..offsets.len()).unwrap();
        let dropped = (n_fft - reader.n_bins()) / 2;
        assert_eq!(reader.n_bins(), if keep == "1" { 1024 } else { 768 });
        assert_eq!(reader.header().bin_width_hz, bin_hz);
        for (i, offset) in offsets.iter().enumerate() {
            let start = reader.steps()[i].start_freq_hz;
            assert_eq!(start, lo(i) - rate_hz / 2.0 + dropped as f64 * bin_hz, "{window} step {i}");
            let tone_hz = lo(i) + offset * bin_hz;
            let expected = ((tone_hz - start) / bin_hz).round() as usize;
            let row = rows.row(i);
            let peak = (0..row.len()).max_by(|&a, &b| row[a].total_cmp(&row[b])).unwrap();
            assert_eq!(peak, expected, "{window} step {i}: tone at {offset} bins from the LO");
        }
    }
}

// ---------------------------------------------------------------------------------------
// A simulated axion through the whole chain

/// An axion of 4 x KSVZ at 5200.4 MHz in a 40-step capture (200 segments of 2048 bins of
/// 100 Hz per step), averaged and reduced with the default pipeline.toml. Expected grand
/// value at the bin where the line starts: eta c^2 / (sigma_A s), c = 4 (the power scales with
/// the coupling squared), sigma_A and the predicted spread s from results.h5, and eta =
/// 0.6286 +- 0.0040 the measured attenuation of this baseline and filter for 100 Hz bins at
/// 5.2 GHz (README, calibration table). Tolerance: 4 standard deviations of the grand
/// spectrum's null scatter at one bin (1 with either window: the predicted spread s takes
/// Hann's correlated bins) plus 3 % of the expected value (4 x eta's 0.6 % standard error,
/// and the spectral leakage of the window over the line, below 0.5 %).
#[test]
fn simulated_axion_is_found_at_the_expected_significance() {
    let _turn = turn();
    let dir = tempfile::tempdir().unwrap();
    let axion_hz = 5.2004e9;
    let capture = simulate_capture(dir.path(), 40, 200, &format!("[[axion]]\nfreq_hz = {axion_hz}\ncoupling_rel_ksvz = 4.0\n"));
    let pipeline = concat!(env!("CARGO_MANIFEST_DIR"), "/pipeline.toml");
    for window in ["rectangular", "hann"] {
        let run = dir.path().join(format!("{window}.h5"));
        let out = dir.path().join(format!("out-{window}"));
        ok(&["-q", "average", "--fft-bins", "2048", "--window", window, "--out", s(&run), s(&capture)]);
        ok(&["-q", "reduce", "--config", pipeline, "--out", s(&out), s(&run)]);
        let results = hdf5::File::open(out.join("results.h5")).unwrap();
        let read = |name: &str| results.dataset(name).unwrap().read_raw::<f32>().unwrap();
        let axis = |name: &str| results.attr(name).unwrap().read_scalar::<f64>().unwrap();
        let (grand, sigma_a) = (read("grand"), read("sigma_a"));
        let (rf_start_hz, bin_width_hz) = (axis("rf_start_hz"), axis("bin_width_hz"));
        let j = (0..grand.len()).position(|j| (rf_start_hz + j as f64 * bin_width_hz - axion_hz).abs() < 50.0).expect("the axion's bin is on the grid");
        // The predicted spread is stored as runs: the last run starting at or before bin j.
        let first_bins: Vec<i64> = results.dataset("predicted_spread/first_bin").unwrap().read_raw().unwrap();
        let run = first_bins.iter().rposition(|&f| f <= j as i64).expect("a run covers bin j");
        let (grand, sigma_a, spread) = (f64::from(grand[j]), f64::from(sigma_a[j]), f64::from(read("predicted_spread/value")[run]));
        let expected = 0.6286 * 16.0 / (sigma_a * spread);
        let tolerance = 4.0 + 0.03 * expected;
        eprintln!("{window}: grand {grand:.2} at the axion, expected {expected:.2} +- {tolerance:.2}");
        assert!((grand - expected).abs() < tolerance, "{window}: grand {grand:.2} at the axion, expected {expected:.2} +- {tolerance:.2}");
        let candidates: Vec<f64> = results.dataset("candidates/frequency_hz").unwrap().read_raw().unwrap();
        assert!(candidates.iter().any(|f| (f - axion_hz).abs() <= 200.0), "{window}: no candidate at the axion: {candidates:?}");
    }
}

// ---------------------------------------------------------------------------------------
// Determinism

/// The same capture averaged with 1 and with 2 threads gives byte-identical spectra (each
/// piece is summed in segment order and a step's pieces in piece order).
#[test]
fn output_is_identical_with_one_and_two_threads() {
    let _turn = turn();
    let dir = tempfile::tempdir().unwrap();
    let capture = simulate_capture(dir.path(), 6, 400, "");
    let spectra = |threads: &str| {
        let run = dir.path().join(format!("t{threads}.h5"));
        let out = Command::new(env!("CARGO_BIN_EXE_axsift"))
            .args(["-q", "average", "--fft-bins", "2048", "--overlap", "0.5", "--out", s(&run), s(&capture)])
            .env("HDF5_USE_FILE_LOCKING", "FALSE")
            .env("RAYON_NUM_THREADS", threads)
            .output()
            .unwrap();
        assert!(out.status.success(), "{}", String::from_utf8_lossy(&out.stderr));
        let values: Vec<f32> = hdf5::File::open(&run).unwrap().dataset("spectra").unwrap().read_raw().unwrap();
        values.iter().map(|v| v.to_bits()).collect::<Vec<u32>>()
    };
    assert_eq!(spectra("1"), spectra("2"));
}

// ---------------------------------------------------------------------------------------
// Bad input

/// A small valid capture: 3 steps of 4096 float32 samples.
fn good_capture(dir: &Path, name: &str) -> PathBuf {
    let path = dir.join(name);
    write_capture(&path, 1e6, 3, 4096, |i| 5.2e9 + 1e5 * i as f64, |i| (0..4096).map(|n| (((n * (i + 1)) % 7) as f64, 1.0)).collect());
    path
}

fn patch(path: &Path, f: impl FnOnce(&hdf5::File) -> hdf5::Result<()>) {
    let file = hdf5::File::open_rw(path).unwrap();
    f(&file).unwrap();
    file.close().unwrap();
}

/// A valid capture `name` whose `iq` is replaced by what `create` makes.
fn capture_with_iq(dir: &Path, name: &str, create: impl FnOnce(&hdf5::File) -> hdf5::Result<hdf5::Dataset>) -> PathBuf {
    let path = good_capture(dir, name);
    patch(&path, |f| {
        f.unlink("iq")?;
        create(f).map(|_| ())
    });
    path
}

/// A valid capture `name` whose column `steps/<column>` is replaced by `values`.
fn capture_with_column(dir: &Path, name: &str, column: &str, values: &[f64]) -> PathBuf {
    let path = good_capture(dir, name);
    patch(&path, |f| {
        let g = f.group("steps")?;
        g.unlink(column)?;
        g.new_dataset_builder().with_data(values).create(column).map(|_| ())
    });
    path
}

/// Runs `average` on the captures (--fft-bins 1024 unless `extra` sets it), expects exit status 2, no run file, and every `needle` in
/// the message.
fn refused(dir: &Path, captures: &[&Path], extra: &[&str], needles: &[&str]) {
    let out_path = dir.join("night.h5");
    let mut args = vec!["-q", "average", "--out", s(&out_path)];
    if !extra.contains(&"--fft-bins") {
        args.extend(["--fft-bins", "1024"]);
    }
    args.extend_from_slice(extra);
    args.extend(captures.iter().map(|p| s(p)));
    let out = axsift(&args);
    let message = String::from_utf8_lossy(&out.stderr);
    assert_eq!(out.status.code(), Some(2), "{args:?}: {message}");
    for needle in needles {
        assert!(message.contains(needle), "{args:?}: {needle:?} not in {message}");
    }
    assert!(!message.contains("panicked"), "{message}");
    assert!(!out_path.exists() && !dir.join("night.h5.tmp").exists(), "a refused input left a file behind");
}

#[test]
fn wrong_format_attribute() {
    let _turn = turn();
    let dir = tempfile::tempdir().unwrap();
    let path = good_capture(dir.path(), "fmt.h5");
    patch(&path, |f| {
        f.delete_attr("format")?;
        let v: hdf5::types::VarLenUnicode = "axsift-run".parse().unwrap();
        f.new_attr::<hdf5::types::VarLenUnicode>().create("format")?.write_scalar(&v)
    });
    refused(dir.path(), &[&path], &[], &["fmt.h5", "field `format`", "\"axsift-run\"", "expected \"axsift-iq\""]);
}

#[test]
fn missing_iq_dataset_and_steps_group() {
    let _turn = turn();
    let dir = tempfile::tempdir().unwrap();
    let path = good_capture(dir.path(), "noiq.h5");
    patch(&path, |f| f.unlink("iq"));
    refused(dir.path(), &[&path], &[], &["noiq.h5", "field `iq`", "dataset is missing"]);
    let path = good_capture(dir.path(), "nosteps.h5");
    patch(&path, |f| f.unlink("steps"));
    refused(dir.path(), &[&path], &[], &["nosteps.h5", "field `steps`", "group is missing"]);
}

#[test]
fn wrong_shapes() {
    let _turn = turn();
    let dir = tempfile::tempdir().unwrap();
    let two_d = capture_with_iq(dir.path(), "flat.h5", |f| f.new_dataset::<f32>().shape((3, 8192)).create("iq"));
    refused(dir.path(), &[&two_d], &[], &["flat.h5", "field `iq`", "[3, 8192]", "[n_steps, n_samples, 2]"]);
    let three = capture_with_iq(dir.path(), "three.h5", |f| f.new_dataset_builder().with_data(&ndarray::Array3::<f32>::zeros((3, 4096, 3))).create("iq"));
    refused(dir.path(), &[&three], &[], &["three.h5", "field `iq`", "[3, 4096, 3]"]);
    let column = capture_with_column(dir.path(), "column.h5", "loaded_q", &[5e4, 5e4]);
    refused(dir.path(), &[&column], &[], &["column.h5", "field `steps/loaded_q`", "[2]", "expected [3]", "`iq`"]);
    let short = good_capture(dir.path(), "short.h5");
    refused(dir.path(), &[&short], &["--fft-bins", "8192"], &["short.h5", "field `iq`", "4096 samples per step", "--fft-bins 8192"]);
}

#[test]
fn nan_in_metadata_and_in_samples() {
    let _turn = turn();
    let dir = tempfile::tempdir().unwrap();
    let path = capture_with_column(dir.path(), "nan.h5", "noise_temp_k", &[0.6, 0.6, f64::NAN]);
    refused(dir.path(), &[&path], &[], &["nan.h5", "field `steps/noise_temp_k`", "step 2", "not a finite number"]);
    let rate = good_capture(dir.path(), "rate.h5");
    patch(&rate, |f| {
        f.delete_attr("sample_rate_hz")?;
        f.new_attr::<f64>().create("sample_rate_hz")?.write_scalar(&f64::NAN)
    });
    refused(dir.path(), &[&rate], &[], &["rate.h5", "field `sample_rate_hz`", "NaN"]);
    let samples = good_capture(dir.path(), "nansample.h5");
    patch(&samples, |f| f.dataset("iq")?.write_slice(&ndarray::arr3(&[[[f32::NAN, 0.0]]]), (1..2, 100..101, ..)));
    refused(dir.path(), &[&samples], &[], &["nansample.h5", "field `iq`", "step 1", "non-finite samples"]);
}

#[test]
fn int16_without_iq_scale_and_other_types() {
    let _turn = turn();
    let dir = tempfile::tempdir().unwrap();
    let path = capture_with_iq(dir.path(), "counts.h5", |f| f.new_dataset_builder().with_data(&ndarray::Array3::<i16>::ones((3, 4096, 2))).create("iq"));
    refused(dir.path(), &[&path], &[], &["counts.h5", "field `iq_scale`", "attribute is missing", "int16"]);
    patch(&path, |f| f.new_attr::<f64>().create("iq_scale")?.write_scalar(&-1e-3));
    refused(dir.path(), &[&path], &[], &["counts.h5", "field `iq_scale`", "must be finite and > 0"]);
    let doubles = capture_with_iq(dir.path(), "f64.h5", |f| f.new_dataset_builder().with_data(&ndarray::Array3::<f64>::ones((3, 4096, 2))).create("iq"));
    refused(dir.path(), &[&doubles], &[], &["f64.h5", "field `iq`", "64-bit float", "expected 32-bit floats or 16-bit signed integers"]);
}

/// Sizes beyond the accepted maximum are refused from the dataset's declared shape, before
/// anything is allocated or read (the datasets below hold no data: 16 TiB and 20 M steps).
#[test]
fn absurd_sizes() {
    let _turn = turn();
    let dir = tempfile::tempdir().unwrap();
    let long = capture_with_iq(dir.path(), "long.h5", |f| f.new_dataset::<i16>().shape((1usize, 1usize << 42, 2usize)).create("iq"));
    refused(dir.path(), &[&long], &[], &["long.h5", "field `iq`", "4398046511104", "samples per step"]);
    let many = capture_with_iq(dir.path(), "many.h5", |f| f.new_dataset::<f32>().shape((20_000_000usize, 16usize, 2usize)).create("iq"));
    refused(dir.path(), &[&many], &[], &["many.h5", "field `iq`", "20000000", "steps"]);
    let truncated = capture_with_iq(dir.path(), "unwritten.h5", |f| f.new_dataset::<f32>().shape((3usize, 4096usize, 2usize)).create("iq"));
    refused(dir.path(), &[&truncated], &[], &["unwritten.h5", "field `iq`", "only 0 bytes are stored"]);
}

#[test]
fn captures_out_of_order_or_of_another_rate() {
    let _turn = turn();
    let dir = tempfile::tempdir().unwrap();
    let a = good_capture(dir.path(), "a.h5");
    let b = good_capture(dir.path(), "b.h5");
    refused(dir.path(), &[&a, &b], &[], &["b.h5", "field `steps/timestamp_s`", "step 0", "acquisition order"]);
    let c = capture_with_column(dir.path(), "c.h5", "timestamp_s", &[2e9, 2e9 + 10.0, 2e9 + 20.0]);
    patch(&c, |f| {
        f.delete_attr("sample_rate_hz")?;
        f.new_attr::<f64>().create("sample_rate_hz")?.write_scalar(&2e6)
    });
    refused(dir.path(), &[&a, &c], &[], &["c.h5", "field `sample_rate_hz`", "is 2000000", "a.h5"]);
    let not_hdf5 = dir.path().join("notes.h5");
    std::fs::write(&not_hdf5, vec![b'x'; 4000]).unwrap();
    refused(dir.path(), &[&not_hdf5], &[], &["notes.h5", "not an HDF5 file", "IQ captures are HDF5"]);
}

#[test]
fn options_out_of_range() {
    let _turn = turn();
    let dir = tempfile::tempdir().unwrap();
    let path = good_capture(dir.path(), "ok.h5");
    refused(dir.path(), &[&path], &["--fft-bins", "1023"], &["--fft-bins 1023", "even"]);
    refused(dir.path(), &[&path], &["--overlap", "1"], &["--overlap 1", "[0, 1)"]);
    refused(dir.path(), &[&path], &["--keep-fraction", "0"], &["--keep-fraction 0", "(0, 1]"]);
    refused(dir.path(), &[&path], &["--keep-fraction", "0.01"], &["keeps 10 bins"]);
}

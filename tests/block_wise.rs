//! The block-wise night reduction (`pipeline::reduce_streamed`, what `axsift reduce` runs
//! without --state) against the in-memory one (`pipeline::reduce`, which
//! `tests/reduction.rs` checks against the unit normal and a direct Monte Carlo), the
//! single-precision rounding of `results.h5`, and with a calibration the block-wise limit
//! outputs against the in-memory limits.
//!
//! The night: the demo facility, 300 steps of 4096 bins moved 1024 bins apart (308 224 RF
//! bins, five blocks of 65 536) with three synthetic axions, two of them placed just below
//! block edges so that runs of bins above threshold cross them.

mod common;

use axsift::config;
use axsift::pipeline::{self, Reduction};
use axsift::sim::{self, Axion, Scenario};
use axsift::stage::{BLOCK_BINS, Block, Candidate, Spectrum};
use common::{PIPELINE, null_scenario};
use std::path::{Path, PathBuf};
use std::process::Command;

/// Unit roundoff of IEEE 754 binary32 (24-bit significand, round to nearest): a normal
/// number x rounds to a single-precision value within 2^-24 |x| of it (IEEE 754-2019,
/// clause 4.3; the standard bound of rounding error analysis, e.g. Higham, "Accuracy and
/// Stability of Numerical Algorithms", 2nd ed., section 2.1).
const F32_UNIT_ROUNDOFF: f64 = 1.0 / (1u64 << 24) as f64;
/// Smallest positive normal binary32 number, 2^-126 (IEEE 754-2019, table 3.5); below it
/// the rounding error is bounded absolutely, by half the subnormal spacing 2^-150.
const F32_MIN_NORMAL: f64 = f32::MIN_POSITIVE as f64;

/// Grid bins per step: the steps' spacing and length.
const STEP_BINS: usize = 1024;
const N_BINS: usize = 4096;
const N_STEPS: usize = 300;

fn scenario() -> Scenario {
    let mut sc = null_scenario(4242);
    sc.scan.n_steps = N_STEPS;
    sc.scan.step_bins = STEP_BINS;
    sc.scan.n_bins = N_BINS;
    // Bin j of the grid has its centre at the first step's start frequency + j bin widths;
    // an axion's line starts at its frequency and extends upwards, so one a few bins below
    // an edge gives a run above threshold across it.
    let origin_hz = sc.start_freq_hz(0);
    let bw = sc.scan.bin_width_hz;
    let below_edge = |k: usize, bins: f64| origin_hz + (k * BLOCK_BINS) as f64 * bw - bins * bw;
    sc.axion = vec![
        Axion { freq_hz: below_edge(1, 6.0), coupling_rel_ksvz: 3.0 },
        Axion { freq_hz: below_edge(3, 2.0), coupling_rel_ksvz: 2.5 },
        Axion { freq_hz: origin_hz + 150_000.0 * bw, coupling_rel_ksvz: 2.0 },
    ];
    sc
}

fn simulate(dir: &Path) -> PathBuf {
    let path = dir.join("night.h5");
    sim::simulate(&scenario(), &path).expect("simulation writes");
    path
}

/// The owned bins of every block, concatenated in grid order (in a spectrum's per-bin arrays).
#[derive(Default)]
struct Gathered {
    sp: Spectrum,
    blocks: usize,
}

impl Gathered {
    fn take(&mut self, b: &Block) -> Result<Option<()>, String> {
        let sp = &mut self.sp;
        assert_eq!(b.first_bin, sp.grand.len(), "blocks come in grid order, without gaps");
        let n = b.len;
        sp.combined.extend_from_slice(&b.combined[..n]);
        sp.combined_sigma.extend_from_slice(&b.combined_sigma[..n]);
        sp.amplitude.extend_from_slice(&b.amplitude[..n]);
        sp.sigma_a.extend_from_slice(&b.sigma_a[..n]);
        sp.predicted_spread.extend_from_slice(&b.predicted_spread[..n]);
        sp.grand.extend_from_slice(&b.grand[..n]);
        self.blocks += 1;
        Ok(None)
    }

    fn columns(&self) -> [(&'static str, &[f64]); 6] {
        spectrum_columns(&self.sp)
    }
}

/// The per-bin arrays of a spectrum, named as the datasets of results.h5.
fn spectrum_columns(sp: &Spectrum) -> [(&'static str, &[f64]); 6] {
    [
        ("combined", &sp.combined),
        ("combined_sigma", &sp.combined_sigma),
        ("amplitude", &sp.amplitude),
        ("sigma_a", &sp.sigma_a),
        ("predicted_spread", &sp.predicted_spread),
        ("grand", &sp.grand),
    ]
}

/// A per-bin dataset of results.h5 as stored, and `predicted_spread` expanded from its runs
/// (README "Outputs": bins `first_bin[i]` up to the next run's first bin hold `value[i]`).
fn stored_per_bin(file: &hdf5::File, name: &str) -> Vec<f32> {
    if name != "predicted_spread" {
        return file.dataset(name).unwrap().read_raw().unwrap();
    }
    let n = file.attr("n_rf_bins").unwrap().read_scalar::<u64>().unwrap() as i64;
    let first: Vec<i64> = file.dataset("predicted_spread/first_bin").unwrap().read_raw().unwrap();
    let value: Vec<f32> = file.dataset("predicted_spread/value").unwrap().read_raw().unwrap();
    assert_eq!(first.len(), value.len(), "one value per run");
    let ends = first.iter().skip(1).copied().chain([n]);
    first.iter().zip(ends).zip(&value).flat_map(|((&a, b), &v)| std::iter::repeat_n(v, (b - a) as usize)).collect()
}

fn bits(v: &[f64]) -> Vec<u64> {
    v.iter().map(|x| x.to_bits()).collect()
}

fn reduce_both(night: &Path) -> (Reduction, Reduction, Gathered) {
    let plan = config::load(PIPELINE, "pipeline.toml").expect("pipeline loads");
    let runs = [night.to_path_buf()];
    let in_memory = pipeline::reduce(&plan, &runs, &|_, _| {}).expect("in-memory reduction");
    let mut gathered = Gathered::default();
    let streamed = pipeline::reduce_streamed::<()>(&plan, &runs, &|_, _| {}, &mut |b| gathered.take(b), &mut |()| Ok(())).expect("block-wise reduction");
    (in_memory, streamed, gathered)
}

/// Runs of bins above `threshold` in `grand`: (first, last, peak) grid bins, the first of
/// equal maxima as the peak (the flag stage's rule, `src/stage/flag.rs`).
fn runs_above(grand: &[f64], threshold: f64) -> Vec<(usize, usize, usize)> {
    let mut runs = Vec::new();
    let mut open: Option<(usize, usize)> = None;
    for (j, &g) in grand.iter().enumerate() {
        match (g > threshold, open) {
            (true, None) => open = Some((j, j)),
            (true, Some((first, peak))) if g > grand[peak] => open = Some((first, j)),
            (true, Some(_)) => {}
            (false, Some((first, peak))) => {
                runs.push((first, j - 1, peak));
                open = None;
            }
            (false, None) => {}
        }
    }
    if let Some((first, peak)) = open {
        runs.push((first, grand.len() - 1, peak));
    }
    runs
}

fn crosses_a_block_edge(c: &Candidate) -> bool {
    c.first_bin / BLOCK_BINS != c.last_bin / BLOCK_BINS
}

/// Reference: the in-memory reduction of the same night. The block-wise one finishes the
/// grid in blocks and runs the filter on pieces counted from the grid's bin 0 (so each
/// output comes from the same correlation of the same inputs), and the flag stage carries a
/// run open at a block's end into the next block: so every per-bin value must be equal bit
/// for bit, and the candidates identical (frequencies, bins, significance, covering steps),
/// as must the steps used, the cuts and the no-data counts.
#[test]
fn block_wise_night_equals_the_in_memory_night() {
    let dir = tempfile::tempdir().unwrap();
    let night = simulate(dir.path());
    let (mem, streamed, got) = reduce_both(&night);
    let sp = &mem.spectrum;
    let grid = (N_STEPS - 1) * STEP_BINS + N_BINS;
    assert_eq!(sp.grand.len(), grid, "the grid spans the scan");
    assert_eq!(got.blocks, grid.div_ceil(BLOCK_BINS));
    assert!(got.blocks >= 4, "the night spans several blocks ({})", got.blocks);
    for ((name, a), (_, b)) in spectrum_columns(sp).into_iter().zip(got.columns()) {
        assert_eq!(a.len(), b.len(), "{name}: bins");
        if let Some(j) = bits(a).iter().zip(bits(b)).position(|(x, y)| *x != y) {
            panic!("{name} differs first at grid bin {j} (block {}): in memory {}, block-wise {}", j / BLOCK_BINS, a[j], b[j]);
        }
    }
    let candidates = &streamed.spectrum.candidates;
    assert_eq!(candidates.len(), sp.candidates.len(), "candidate count");
    assert_eq!(candidates, &sp.candidates, "candidates (frequencies, bins, significances, covering steps)");
    let crossing = sp.candidates.iter().filter(|c| crosses_a_block_edge(c)).count();
    assert!(crossing >= 2, "the axions below block edges give runs across them ({crossing} do)");
    eprintln!("{} blocks, {} candidates, {crossing} across block edges; per-bin values bit-identical", got.blocks, candidates.len());
    assert_eq!((streamed.spectrum.rf_start_hz, streamed.spectrum.bin_width_hz), (sp.rf_start_hz, sp.bin_width_hz));
    assert_eq!((streamed.spectrum.threshold, streamed.spectrum.mean_beta_sq.to_bits()), (sp.threshold, sp.mean_beta_sq.to_bits()));
    assert_eq!(streamed.n_steps_in, mem.n_steps_in);
    assert_eq!(streamed.used_steps.iter().map(|s| s.0).collect::<Vec<_>>(), mem.used_steps.iter().map(|s| s.0).collect::<Vec<_>>(), "steps used");
    let cut = |r: &Reduction| r.cuts.iter().map(|c| (c.step, c.stage.clone(), c.reason.clone())).collect::<Vec<_>>();
    assert_eq!(cut(&streamed), cut(&mem), "steps cut");
    assert_eq!(streamed.no_data, mem.no_data, "no-data counts");
}

/// `results.h5` as `axsift reduce` writes it (block-wise, single precision) against the
/// in-memory reduction's double-precision values. Checked, per dataset and bin:
/// - each stored value is the double-precision value rounded to nearest (IEEE 754
///   roundTiesToEven, which `as f32` performs), bit for bit, NaN where it is NaN;
/// - so it lies within 2^-24 |x| of it (IEEE 754 binary32 unit roundoff; absolutely within
///   2^-150 below the smallest normal number). For the grand spectrum, whose null spread is
///   1, that is at most 6e-8 per unit of |grand|: 3e-7 for the noise bins (|grand| < 5)
///   and below 1e-5 for the strongest axion here;
/// - no candidate changes at the default threshold: the runs of bins above it in the stored
///   values are those of the double-precision candidates, bin for bin (a value can cross the
///   threshold t only if it lies within 2^-24 |t| = 2e-7 of it; the closest one is printed),
///   and the candidates group holds their frequencies in double precision, all of them.
#[test]
fn results_file_rounds_each_value_once_to_single_precision() {
    let dir = tempfile::tempdir().unwrap();
    let night = simulate(dir.path());
    let plan = config::load(PIPELINE, "pipeline.toml").expect("pipeline loads");
    let mem = pipeline::reduce(&plan, std::slice::from_ref(&night), &|_, _| {}).expect("in-memory reduction");
    let sp = &mem.spectrum;
    let out = dir.path().join("out");
    let pipeline_path = concat!(env!("CARGO_MANIFEST_DIR"), "/pipeline.toml");
    let run = Command::new(env!("CARGO_BIN_EXE_axsift")).args(["-q", "reduce", "--config", pipeline_path, "--out"]).arg(&out).arg(&night).output().unwrap();
    assert!(run.status.success(), "{}", String::from_utf8_lossy(&run.stderr));

    let file = hdf5::File::open(out.join("results.h5")).unwrap();
    let axis = |name: &str| file.attr(name).unwrap().read_scalar::<f64>().unwrap();
    assert_eq!((axis("rf_start_hz"), axis("bin_width_hz")), (sp.rf_start_hz, sp.bin_width_hz), "frequency axis");
    assert_eq!(file.attr("n_rf_bins").unwrap().read_scalar::<u64>().unwrap(), sp.grand.len() as u64);
    for (name, exact) in spectrum_columns(sp) {
        let ds = file.dataset(if name == "predicted_spread" { "predicted_spread/value" } else { name }).unwrap();
        assert_eq!(ds.dtype().unwrap().size(), 4, "{name} is stored in single precision");
        let stored = stored_per_bin(&file, name);
        assert_eq!(stored.len(), exact.len(), "{name}: bins");
        let mut worst_rel: f64 = 0.0;
        for (j, (&s, &x)) in stored.iter().zip(exact.iter()).enumerate() {
            let rounded = x as f32;
            assert!(s.to_bits() == rounded.to_bits() || (s.is_nan() && x.is_nan()), "{name} bin {j}: stored {s}, {x} rounds to {rounded}");
            if x.is_finite() {
                let error = (f64::from(s) - x).abs();
                let bound = if x.abs() >= F32_MIN_NORMAL { F32_UNIT_ROUNDOFF * x.abs() } else { F32_MIN_NORMAL * F32_UNIT_ROUNDOFF };
                assert!(error <= bound, "{name} bin {j}: rounding moved {x} by {error:e}, more than the bound {bound:e}");
                if x != 0.0 {
                    worst_rel = worst_rel.max(error / x.abs());
                }
            }
        }
        eprintln!("{name}: largest relative rounding {worst_rel:.3e} (bound 2^-24 = {F32_UNIT_ROUNDOFF:.3e})");
    }

    let grand: Vec<f64> = file.dataset("grand").unwrap().read_raw::<f32>().unwrap().into_iter().map(f64::from).collect();
    let threshold = sp.threshold.expect("the default pipeline flags");
    let expected: Vec<(usize, usize, usize)> = sp.candidates.iter().map(|c| (c.first_bin, c.last_bin, c.peak_bin)).collect();
    assert!(expected.len() >= 3, "the three axions are flagged ({} candidates)", expected.len());
    assert_eq!(runs_above(&grand, threshold), expected, "runs above the threshold {threshold} in the stored grand spectrum");
    let closest = sp.grand.iter().filter(|g| g.is_finite()).map(|g| (g - threshold).abs()).fold(f64::INFINITY, f64::min);
    eprintln!("closest grand value to the threshold: {closest:.3e} away (rounding moves it by at most {:.3e})", F32_UNIT_ROUNDOFF * threshold);
    let freq: Vec<f64> = file.dataset("candidates/frequency_hz").unwrap().read_raw().unwrap();
    assert_eq!(bits(&freq), bits(&sp.candidates.iter().map(|c| c.frequency_hz).collect::<Vec<_>>()), "candidate frequencies in results.h5");
    let summary: serde_json::Value = serde_json::from_str(&std::fs::read_to_string(out.join("summary.json")).unwrap()).unwrap();
    assert_eq!(summary["n_candidates"].as_u64(), Some(sp.candidates.len() as u64));
}

/// The block-wise reduction gives the same bits with 1 and with 2 threads (chunks of 2 and
/// of 4 steps, so the blocks are finished at other moments of the stream), as the house rule
/// on determinism asks: every per-bin value and every candidate.
#[test]
fn block_wise_night_is_bit_identical_across_thread_counts() {
    let dir = tempfile::tempdir().unwrap();
    let night = simulate(dir.path());
    let in_pool = |threads: usize| {
        let pool = rayon::ThreadPoolBuilder::new().num_threads(threads).build().unwrap();
        pool.install(|| {
            let (_, streamed, got) = reduce_both(&night);
            (streamed.spectrum.candidates, got)
        })
    };
    let ((one_candidates, one), (two_candidates, two)) = (in_pool(1), in_pool(2));
    assert_eq!(one.blocks, two.blocks);
    for ((name, a), (_, b)) in one.columns().into_iter().zip(two.columns()) {
        assert!(bits(a) == bits(b), "{name} differs between 1 and 2 threads");
    }
    assert!(!one_candidates.is_empty());
    assert_eq!(one_candidates, two_candidates);
}

/// A calibration for the default pipeline from a small campaign (one null and three
/// injection realisations of a 60-step demo night: enough for an eta), written to
/// `dir/calib/calibration.json`.
fn small_calibration(dir: &Path) -> (axsift::calib::Calibration, PathBuf) {
    use axsift::calib::{self, NoiseSource};
    let plan = config::load(PIPELINE, "pipeline.toml").expect("pipeline loads");
    let mut small = null_scenario(61);
    small.scan.n_steps = 60;
    let spec = common::eta_campaign(9);
    let cal = calib::calibrate(&plan, &NoiseSource::Simulated { scenario: &small, scratch: dir }, &spec, &|_, _| {}).expect("campaign runs");
    let cal_dir = dir.join("calib");
    cal.write(&cal_dir).expect("calibration writes");
    (cal, cal_dir.join("calibration.json"))
}

/// `axsift reduce --calibration` (block-wise) into `out`, with `threads` worker threads.
fn reduce_calibrated(night: &Path, calibration: &Path, out: &Path, threads: usize) {
    let pipeline_path = concat!(env!("CARGO_MANIFEST_DIR"), "/pipeline.toml");
    let run = Command::new(env!("CARGO_BIN_EXE_axsift"))
        .env("RAYON_NUM_THREADS", threads.to_string())
        .args(["-q", "reduce", "--config", pipeline_path, "--calibration"])
        .arg(calibration)
        .arg("--out")
        .arg(out)
        .arg(night)
        .output()
        .unwrap();
    assert!(run.status.success(), "{}", String::from_utf8_lossy(&run.stderr));
}

fn csv_rows(path: &Path) -> Vec<Vec<String>> {
    let mut reader = csv::Reader::from_path(path).unwrap();
    reader.records().map(|r| r.unwrap().iter().map(str::to_string).collect()).collect()
}

/// Reference: the in-memory limits, `limits::for_reduction` over the whole in-memory
/// spectrum (every candidate blocked; its formula is checked against the written-out method
/// in `tests/limits.rs`). The block-wise `reduce --calibration` must give, with the night's
/// runs above threshold crossing block edges:
/// - in results.h5, per bin: `limit_g_gamma` the double-precision limit rounded once to
///   nearest single precision (bit for bit, NaN exactly where the bin is not excluded), so
///   within 2^-24 of it (IEEE 754 binary32 unit roundoff, as for the other datasets above);
///   the mass, |g_agg| and the limits relative to KSVZ and DFSZ derived from it with the
///   dataset's attributes equal the in-memory ones to that rounding; no other per-bin limit
///   dataset (20 bytes a bin in all);
/// - limits.csv: every bin's row as formatted from the in-memory limits;
/// - limit_blocks.csv: per 1 MHz block counted from the first bin's line start (10 000 bins
///   of 100 Hz, so blocks cross the 65 536-bin edges), the excluded fraction, the upper
///   median v[n / 2] and the smallest of the sorted excluded values, computed here;
/// - summary.json's range: the excluded fraction, smallest and largest excluded value and
///   the lower median (0-based rank floor((n - 1) / 2) of the sorted values), bit for bit;
/// - candidates.csv as the in-memory reduction writes it (`Reduction::write`).
#[test]
fn calibrated_block_wise_outputs_equal_the_in_memory_limits() {
    let dir = tempfile::tempdir().unwrap();
    let night = simulate(dir.path());
    let (cal, cal_path) = small_calibration(dir.path());
    let plan = config::load(PIPELINE, "pipeline.toml").expect("pipeline loads");
    let mem = pipeline::reduce(&plan, std::slice::from_ref(&night), &|_, _| {}).expect("in-memory reduction");
    let limits = axsift::limits::for_reduction(&plan, &mem.spectrum, &cal, axsift::limits::DEFAULT_CONFIDENCE).expect("limits");
    let n = mem.spectrum.grand.len();
    assert!(mem.spectrum.candidates.iter().filter(|c| crosses_a_block_edge(c)).count() >= 2, "blocked runs cross block edges");
    let out = dir.path().join("out");
    reduce_calibrated(&night, &cal_path, &out, 2);

    let file = hdf5::File::open(out.join("results.h5")).unwrap();
    let ds = file.dataset("limit_g_gamma").unwrap();
    assert_eq!(ds.dtype().unwrap().size(), 4, "limit_g_gamma is stored in single precision");
    let stored: Vec<f32> = ds.read_raw().unwrap();
    assert_eq!(stored.len(), n, "limit_g_gamma: bins");
    let attr = |name: &str| ds.attr(name).unwrap().read_scalar::<f64>().unwrap();
    let (per_hz, g_agg_per_uev, ksvz, dfsz) = (attr("mass_uev_per_hz"), attr("g_agg_per_gev_per_uev"), attr("g_gamma_ksvz"), attr("g_gamma_dfsz"));
    let axis = |name: &str| file.attr(name).unwrap().read_scalar::<f64>().unwrap();
    let (rf_start_hz, bin_width_hz) = (axis("rf_start_hz"), axis("bin_width_hz"));
    for (j, (&s, b)) in stored.iter().zip(&limits.bins).enumerate() {
        let x = b.g_gamma;
        assert_eq!(s.is_nan(), !b.excluded, "bin {j}: NaN exactly where not excluded");
        assert!(s.to_bits() == (x as f32).to_bits() || (s.is_nan() && x.is_nan()), "bin {j}: stored {s}, {x} rounds to {}", x as f32);
        // The quantities the attributes derive, from the stored limit: the mass to double
        // precision (a product and a sum), the rest to the limit's single-precision rounding.
        let mass = per_hz * (rf_start_hz + (j as f64 - 0.5) * bin_width_hz);
        assert!((mass - b.mass_uev).abs() <= 1e-14 * b.mass_uev, "bin {j}: mass {mass} vs {}", b.mass_uev);
        if x.is_finite() {
            let g = f64::from(s);
            assert!((g - x).abs() <= F32_UNIT_ROUNDOFF * x.abs(), "bin {j}: {s} vs {x}");
            for (derived, want) in [(g_agg_per_uev * g * mass, b.g_agg_per_gev.abs()), (g / ksvz, b.rel_ksvz), (g / dfsz, b.rel_dfsz)] {
                assert!((derived - want).abs() <= 2.0 * F32_UNIT_ROUNDOFF * want.abs(), "bin {j}: derived {derived} vs {want}");
            }
        }
    }
    // The per-bin datasets: five of the reduction and the limit, 4 bytes a bin each (the
    // predicted spread is stored as runs, a few values).
    let per_bin: Vec<String> = file.member_names().unwrap().into_iter().filter(|m| file.dataset(m).is_ok_and(|d| d.size() == n)).collect();
    assert_eq!(per_bin.len(), 6, "{per_bin:?}");
    assert!(file.dataset("predicted_spread/value").unwrap().size() < n / 1000, "the predicted spread is stored as runs");
    assert!(per_bin.iter().all(|m| file.dataset(m).unwrap().dtype().unwrap().size() == 4), "{per_bin:?}");
    let excluded: Vec<f64> = limits.bins.iter().filter(|b| b.excluded).map(|b| b.rel_ksvz).collect();
    let blocked = limits.bins.iter().filter(|b| !b.excluded && b.mass_uev.is_finite()).count();
    assert!(!excluded.is_empty() && blocked > 0, "some bins excluded ({}), some not ({blocked})", excluded.len());

    let rows = csv_rows(&out.join("limits.csv"));
    assert_eq!(rows.len(), n, "limits.csv: one row per bin");
    for (j, (row, b)) in rows.iter().zip(&limits.bins).enumerate() {
        assert_eq!(row.as_slice(), b.csv_row().as_slice(), "limits.csv row of bin {j}");
    }

    let block_hz = axsift::output::LIMIT_BLOCK_HZ;
    let first_hz = limits.bins[0].freq_hz;
    let mut expected_blocks: Vec<[String; 6]> = Vec::new();
    let (mut k, mut crossing) = (0, 0);
    while k < n {
        let block = ((limits.bins[k].freq_hz - first_hz) / block_hz).floor();
        let end = (k..n).find(|&i| ((limits.bins[i].freq_hz - first_hz) / block_hz).floor() != block).unwrap_or(n);
        let mut rel: Vec<f64> = limits.bins[k..end].iter().filter(|b| b.excluded).map(|b| b.rel_ksvz).collect();
        let mut gagg: Vec<f64> = limits.bins[k..end].iter().filter(|b| b.excluded).map(|b| b.g_agg_per_gev.abs()).collect();
        rel.sort_by(f64::total_cmp);
        gagg.sort_by(f64::total_cmp);
        let start = first_hz + block * block_hz;
        let row = axsift::limits::LimitBlock {
            start_hz: start,
            stop_hz: start + block_hz,
            excluded_fraction: rel.len() as f64 / (end - k) as f64,
            median_rel_ksvz: rel.get(rel.len() / 2).copied().unwrap_or(f64::NAN),
            best_rel_ksvz: rel.first().copied().unwrap_or(f64::NAN),
            median_g_agg_per_gev: gagg.get(gagg.len() / 2).copied().unwrap_or(f64::NAN),
        };
        crossing += usize::from(k / BLOCK_BINS != (end - 1) / BLOCK_BINS);
        expected_blocks.push(row.csv_row());
        k = end;
    }
    assert!(crossing >= 4, "coarse blocks cross the 65 536-bin block edges ({crossing} do)");
    let got_blocks = csv_rows(&out.join("limit_blocks.csv"));
    assert_eq!(got_blocks.len(), expected_blocks.len(), "limit_blocks.csv rows");
    for (i, (g, e)) in got_blocks.iter().zip(&expected_blocks).enumerate() {
        assert_eq!(g.as_slice(), e.as_slice(), "limit_blocks.csv row {i}");
    }

    let summary: serde_json::Value = serde_json::from_str(&std::fs::read_to_string(out.join("summary.json")).unwrap()).unwrap();
    let range = &summary["limits"];
    let mut sorted = excluded.clone();
    sorted.sort_by(f64::total_cmp);
    let f = |key: &str| range[key].as_f64().unwrap_or_else(|| panic!("summary limits.{key}: {range}"));
    assert_eq!(f("excluded_fraction").to_bits(), (excluded.len() as f64 / n as f64).to_bits(), "excluded fraction");
    assert_eq!(f("best_rel_ksvz").to_bits(), sorted[0].to_bits(), "best");
    assert_eq!(f("median_rel_ksvz").to_bits(), sorted[(sorted.len() - 1) / 2].to_bits(), "lower median");
    assert_eq!(f("worst_rel_ksvz").to_bits(), sorted[sorted.len() - 1].to_bits(), "worst");

    let mem_out = dir.path().join("mem-out");
    let provenance = axsift::output::Provenance::new(PIPELINE, std::slice::from_ref(&night)).unwrap();
    mem.write(&mem_out, PIPELINE, &provenance, Some((&cal, &limits))).expect("in-memory outputs");
    assert_eq!(std::fs::read(out.join("candidates.csv")).unwrap(), std::fs::read(mem_out.join("candidates.csv")).unwrap(), "candidates.csv");
    eprintln!("{n} bins, {} excluded, {blocked} blocked; {} coarse blocks; lower median {:.6}", excluded.len(), expected_blocks.len(), f("median_rel_ksvz"));
}

/// `reduce --calibration` gives the same bits with 1 and 2 threads (the house rule on
/// determinism): every dataset of results.h5 and every other output, byte for byte.
#[test]
fn calibrated_block_wise_outputs_are_bit_identical_across_thread_counts() {
    let dir = tempfile::tempdir().unwrap();
    let night = simulate(dir.path());
    let (_, cal_path) = small_calibration(dir.path());
    let (one, two) = (dir.path().join("one"), dir.path().join("two"));
    reduce_calibrated(&night, &cal_path, &one, 1);
    reduce_calibrated(&night, &cal_path, &two, 2);
    let names = ["limits.csv", "limit_blocks.csv", "summary.json", "candidates.csv", "exclusion.png", "exclusion.svg", "grand_spectrum.png"];
    for name in names {
        assert!(std::fs::read(one.join(name)).unwrap() == std::fs::read(two.join(name)).unwrap(), "{name} differs between 1 and 2 threads");
    }
    let (a, b) = (hdf5::File::open(one.join("results.h5")).unwrap(), hdf5::File::open(two.join("results.h5")).unwrap());
    let mut datasets = a.member_names().unwrap().into_iter().filter(|m| a.dataset(m).is_ok()).collect::<Vec<_>>();
    assert!(datasets.len() >= 6 && datasets.iter().any(|d| d == "limit_g_gamma"), "{datasets:?}");
    datasets.extend(["predicted_spread/first_bin".to_string(), "predicted_spread/value".to_string()]);
    for name in datasets {
        let (x, y): (Vec<f64>, Vec<f64>) = (a.dataset(&name).unwrap().read_raw().unwrap(), b.dataset(&name).unwrap().read_raw().unwrap());
        assert!(bits(&x) == bits(&y), "results.h5 {name} differs between 1 and 2 threads");
    }
}

/// A grid above the documented size of `limits.csv` (`output::LIMITS_CSV_MAX_BINS`, 2^20
/// bins; README "Outputs"): the night's steps spread 3600 bins apart give 1 080 496 bins.
/// `reduce --calibration` writes no `limits.csv` and removes one an earlier reduction left in
/// the folder (it would not describe this one), while `results.h5` holds every bin's limit
/// and `limit_blocks.csv` one row per MHz of the grid.
#[test]
fn a_large_grid_has_its_per_bin_limits_in_results_h5_only() {
    let dir = tempfile::tempdir().unwrap();
    let mut sc = scenario();
    sc.scan.step_bins = 3600;
    sc.axion.clear();
    let night = dir.path().join("wide.h5");
    sim::simulate(&sc, &night).expect("simulation writes");
    let n = (N_STEPS - 1) * 3600 + N_BINS;
    assert!(n > axsift::output::LIMITS_CSV_MAX_BINS, "{n} bins");
    let (_, cal_path) = small_calibration(dir.path());
    let out = dir.path().join("out");
    std::fs::create_dir_all(&out).unwrap();
    std::fs::write(out.join("limits.csv"), "left by an earlier reduction\n").unwrap();
    reduce_calibrated(&night, &cal_path, &out, 2);
    assert!(!out.join("limits.csv").exists(), "limits.csv of a grid above the size");
    let file = hdf5::File::open(out.join("results.h5")).unwrap();
    let limit: Vec<f32> = file.dataset("limit_g_gamma").unwrap().read_raw().unwrap();
    assert_eq!(limit.len(), n);
    assert!(limit.iter().filter(|v| v.is_finite()).count() > n / 2, "most bins excluded");
    let width_hz = sc.scan.bin_width_hz * n as f64;
    assert_eq!(csv_rows(&out.join("limit_blocks.csv")).len(), (width_hz / axsift::output::LIMIT_BLOCK_HZ).ceil() as usize, "one row per MHz");
    let leftovers: Vec<_> = std::fs::read_dir(&out).unwrap().map(|e| e.unwrap().file_name()).filter(|n| n.to_string_lossy().starts_with(".tmp")).collect();
    assert!(leftovers.is_empty(), "temporary files left: {leftovers:?}");
}

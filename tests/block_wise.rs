//! The block-wise night reduction (`pipeline::reduce_streamed`, what `axsift reduce` runs
//! without --state or --calibration) against the in-memory one (`pipeline::reduce`, which
//! `tests/reduction.rs` checks against the unit normal and a direct Monte Carlo), and the
//! single-precision rounding of `results.h5`.
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
    let mem = pipeline::reduce(&plan, &[night.clone()], &|_, _| {}).expect("in-memory reduction");
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
        let ds = file.dataset(name).unwrap();
        assert_eq!(ds.dtype().unwrap().size(), 4, "{name} is stored in single precision");
        let stored: Vec<f32> = ds.read_raw().unwrap();
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

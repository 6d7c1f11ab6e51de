//! Helpers shared by the shard and Slurm tests: small simulated nights, the nightly
//! single-machine reference, and the bit-for-bit comparison of two reductions.

use crate::common::{DEMO_SCENARIO, PIPELINE, null_scenario};
use axsift::calib::{self, CampaignSpec, NoiseSource};
use axsift::state::State;
use axsift::{config, sim};
use std::path::{Path, PathBuf};
use std::process::{Command, Output};

const BIN: &str = env!("CARGO_BIN_EXE_axsift");

pub fn axsift(args: &[&str]) -> Command {
    let mut c = Command::new(BIN);
    c.arg("--quiet").args(args).env("HDF5_USE_FILE_LOCKING", "FALSE");
    c
}

pub fn run_ok(args: &[&str]) -> Output {
    let out = axsift(args).output().expect("axsift starts");
    assert!(out.status.success(), "axsift {args:?} failed: {}", String::from_utf8_lossy(&out.stderr));
    out
}

pub fn s(p: &Path) -> &str {
    p.to_str().expect("utf-8 temporary path")
}

/// A small simulated night (null demo facility), its band starting at `first_cavity_hz`.
pub fn night(dir: &Path, seed: u64, first_cavity_hz: f64, n_steps: usize) -> PathBuf {
    let mut sc = null_scenario(seed);
    sc.scan.n_steps = n_steps;
    sc.scan.first_cavity_freq_hz = first_cavity_hz;
    let path = dir.join(format!("night-{seed}.h5"));
    sim::simulate(&sc, &path).expect("simulate");
    path
}

/// Three nights with overlapping, shifted bands (the third extends below the first).
pub fn three_nights(dir: &Path) -> Vec<PathBuf> {
    [(11, 5.2e9), (12, 5.2015e9), (13, 5.1995e9)].iter().map(|&(seed, f)| night(dir, seed, f, 200)).collect()
}

/// The single-machine reference: nightly `reduce --state` in order.
pub fn nightly(dir: &Path, nights: &[PathBuf]) -> (PathBuf, PathBuf) {
    let (state, out) = (dir.join("ref-state"), dir.join("ref-out"));
    for n in nights {
        run_ok(&["reduce", "--config", "pipeline.toml", "--state", s(&state), "--out", s(&out), s(n)]);
    }
    (state, out)
}

pub fn plan_reduction(work: &Path, nights: &[PathBuf], shards: usize) -> PathBuf {
    let mut args = vec!["shard-plan", "--config", "pipeline.toml", "--work", s(work)];
    let shards = shards.to_string();
    args.extend(["--shards", &shards]);
    for n in nights {
        args.extend(["--night", s(n)]);
    }
    run_ok(&args);
    work.join("plan.json")
}

/// Plans a calibration campaign (scenario and spec files) in `shards` shards; returns the plan.
pub fn plan_campaign(work: &Path, scenario: &Path, spec: &Path, shards: usize) -> PathBuf {
    let shards = shards.to_string();
    run_ok(&["shard-plan", "--config", "pipeline.toml", "--work", s(work), "--shards", &shards, "--campaign", "--scenario", s(scenario), "--spec", s(spec)]);
    work.join("plan.json")
}

fn bits(v: &[f64]) -> Vec<u64> {
    v.iter().map(|x| x.to_bits()).collect()
}

/// The bits of a per-bin dataset of `results.h5` (stored in single precision).
fn dataset(file: &Path, name: &str) -> Vec<u32> {
    let f = hdf5::File::open(file).expect("results.h5 opens");
    f.dataset(name).and_then(|d| d.read_raw::<f32>()).expect("dataset reads").iter().map(|x| x.to_bits()).collect()
}

/// state.json without the generation counter (the nightly reference saved once per night,
/// the merge once).
fn state_index(dir: &Path) -> String {
    let text = std::fs::read_to_string(dir.join("state.json")).expect("state.json");
    text.lines().filter(|l| !l.trim_start().starts_with("\"generation\"")).collect::<Vec<_>>().join("\n")
}

/// The merged reduction equals the reference bit for bit: state sums, candidates, index,
/// and the output folder's summary, candidate list and grand-spectrum datasets.
pub fn assert_same_reduction(reference: (&Path, &Path), merged: (&Path, &Path)) {
    let (a, b) = (State::load(reference.0).unwrap().expect("reference state"), State::load(merged.0).unwrap().expect("merged state"));
    let whole = |st: &State| st.sums(st.grid_bins.map_or(0..0, |(lo, hi)| lo..hi)).unwrap();
    let (sa, sb) = (whole(&a), whole(&b));
    assert!(sa.weight.iter().filter(|w| **w > 0.0).count() > 1000, "the reference covers the nights");
    assert_eq!(bits(&sa.weight), bits(&sb.weight));
    assert_eq!(bits(&sa.weighted_sum), bits(&sb.weighted_sum));
    assert_eq!(sa.coverage, sb.coverage);
    assert_eq!(a.candidates, b.candidates);
    assert_eq!(a.nights, b.nights);
    assert_eq!(state_index(reference.0), state_index(merged.0));
    for name in ["summary.json", "candidates.csv"] {
        assert_eq!(std::fs::read(reference.1.join(name)).unwrap(), std::fs::read(merged.1.join(name)).unwrap(), "{name} differs");
    }
    for name in ["combined", "combined_sigma", "amplitude", "sigma_a", "grand"] {
        assert_eq!(dataset(&reference.1.join("results.h5"), name), dataset(&merged.1.join("results.h5"), name), "results.h5 dataset {name} differs");
    }
}

/// A small campaign: the demo night at 200 steps, one null and one eta realisation, two SNRs
/// with two realisations each. Writes its scenario and spec files into `dir`, runs it on this
/// machine and writes the reference calibration to `dir/ref-cal`; returns the three paths.
pub fn campaign_reference(dir: &Path) -> (PathBuf, PathBuf, PathBuf) {
    let spec = CampaignSpec {
        seed: 3,
        null_realisations: 1,
        eta_realisations: 1,
        eta_snr: 20.0,
        snr_grid: vec![4.0, 6.0],
        realisations_per_snr: 2,
        max_injections_per_realisation: 20,
    };
    let scenario_text = DEMO_SCENARIO.replace("n_steps = 600", "n_steps = 200");
    assert!(scenario_text.contains("n_steps = 200"));
    let (scenario_file, spec_file) = (dir.join("scenario.toml"), dir.join("spec.toml"));
    std::fs::write(&scenario_file, &scenario_text).unwrap();
    std::fs::write(&spec_file, toml::to_string(&spec).unwrap()).unwrap();
    let plan = config::load(PIPELINE, "pipeline.toml").unwrap();
    let scenario = sim::Scenario::from_toml(&scenario_text).unwrap();
    let scratch = dir.join("scratch");
    std::fs::create_dir_all(&scratch).unwrap();
    let cal = calib::calibrate(&plan, &NoiseSource::Simulated { scenario: &scenario, scratch: &scratch }, &spec, &|_, _| {}).unwrap();
    assert!(cal.injections.iter().any(|r| r.snr > 0.0), "the campaign has efficiency injections");
    let reference = dir.join("ref-cal");
    cal.write(&reference).unwrap();
    (scenario_file, spec_file, reference)
}

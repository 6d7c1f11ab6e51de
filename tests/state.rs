//! The analysis state across nights: incremental == batch, rescans clear fluctuations and
//! keep signals, refusals, and crash safety under SIGKILL.

mod common;

use axsift::config;
use axsift::sim::{self, Axion};
use axsift::state::{self, Class, State};
use common::{PIPELINE, null_scenario};
use std::path::{Path, PathBuf};
use std::process::Command;

fn night(seed: u64, first_cavity_hz: f64, dir: &Path, axion: bool) -> PathBuf {
    let mut sc = null_scenario(seed);
    sc.scan.n_steps = 200;
    sc.scan.first_cavity_freq_hz = first_cavity_hz;
    if axion {
        sc.axion.push(Axion { freq_hz: 5.2021e9, coupling_rel_ksvz: 1.2 });
    }
    let path = dir.join(format!("night-{seed}.h5"));
    sim::simulate(&sc, &path).unwrap();
    path
}

fn bits(v: &[f64]) -> Vec<u64> {
    v.iter().map(|x| x.to_bits()).collect()
}

/// Acceptance: three nights (overlapping, shifted bands) added one morning at a time, with
/// the state saved and reloaded in between, give bit-identical sums, grand spectrum and
/// candidates to adding all three in one call.
#[test]
fn incremental_equals_batch_over_three_nights() {
    let plan = config::load(PIPELINE, "pipeline.toml").unwrap();
    let dir = tempfile::tempdir().unwrap();
    let nights: Vec<PathBuf> = [(1, 5.2e9), (2, 5.2015e9), (3, 5.1995e9)].iter().map(|&(s, f)| night(s, f, dir.path(), false)).collect();
    let state_dir = dir.path().join("state");
    let mut last = None;
    for n in &nights {
        let mut st = State::load(&state_dir).unwrap().unwrap_or_else(|| State::new(state::plan_hash(&plan)));
        last = Some(state::add_nights(&mut st, &plan, &[vec![n.clone()]]).unwrap().remove(0));
        st.save(&state_dir).unwrap();
    }
    let incremental = State::load(&state_dir).unwrap().unwrap();
    let mut batch = State::new(state::plan_hash(&plan));
    let updates = state::add_nights(&mut batch, &plan, &nights.iter().map(|n| vec![n.clone()]).collect::<Vec<_>>()).unwrap();
    assert_eq!(bits(&incremental.weight), bits(&batch.weight));
    assert_eq!(bits(&incremental.weighted_sum), bits(&batch.weighted_sum));
    assert_eq!(incremental.rf_origin_hz, batch.rf_origin_hz);
    let (a, b) = (&last.unwrap().reduction.spectrum, &updates[2].reduction.spectrum);
    assert_eq!(bits(&a.grand), bits(&b.grand));
    assert_eq!(incremental.candidates, batch.candidates);
    assert_eq!(incremental.nights.len(), 3);
    // The third night extends the grid below the first one's origin.
    assert!(incremental.rf_origin_hz < 5.2e9 - 2048.0 * 100.0);
}

/// Acceptance: a rescan of the same band clears the noise candidates of the first night and
/// keeps the injected axion (present in both nights), which persists.
#[test]
fn rescan_clears_fluctuations_and_keeps_the_signal() {
    let plan = config::load(PIPELINE, "pipeline.toml").unwrap();
    let dir = tempfile::tempdir().unwrap();
    let mut st = State::new(state::plan_hash(&plan));
    let first = night(11, 5.2e9, dir.path(), true);
    let rescan = night(12, 5.2e9, dir.path(), true);
    state::add_nights(&mut st, &plan, &[vec![first]]).unwrap();
    let noise_first: Vec<f64> = st.candidates.iter().filter(|c| (c.frequency_hz - 5.2021e9).abs() > 2e4).map(|c| c.frequency_hz).collect();
    assert!(!noise_first.is_empty(), "the first night should have noise candidates to clear");
    state::add_nights(&mut st, &plan, &[vec![rescan]]).unwrap();
    let axion = st.candidates.iter().find(|c| (c.frequency_hz - 5.2021e9).abs() < 4e3).expect("axion tracked");
    assert_eq!(axion.class, Class::Persists, "{}", axion.evidence);
    assert!(axion.rescan_integration_s.is_finite() && axion.rescan_integration_s > 0.0);
    let cleared = st.candidates.iter().filter(|c| noise_first.contains(&c.frequency_hz) && c.class == Class::Cleared).count();
    // A fluctuation above 3.355 stays above it after a second, independent night with
    // probability well under 10%.
    assert!(cleared as f64 >= 0.8 * noise_first.len() as f64, "{cleared} of {} cleared", noise_first.len());
}

/// Acceptance: re-adding a file, another pipeline, and another schema version are refused
/// with messages that say what and where.
#[test]
fn refusals_are_clear() {
    let plan = config::load(PIPELINE, "pipeline.toml").unwrap();
    let dir = tempfile::tempdir().unwrap();
    let n = night(21, 5.2e9, dir.path(), false);
    let mut st = State::new(state::plan_hash(&plan));
    state::add_nights(&mut st, &plan, &[vec![n.clone()]]).unwrap();
    let err = state::add_nights(&mut st, &plan, &[vec![n.clone()]]).unwrap_err().to_string();
    assert!(err.contains("already in the state") && err.contains("night-21.h5") && err.contains("night 0"), "{err}");

    let other = config::load(&PIPELINE.replace("order = 4", "order = 3"), "other.toml").unwrap();
    let err = state::add_nights(&mut st, &other, &[vec![night(22, 5.2e9, dir.path(), false)]]).unwrap_err().to_string();
    assert!(err.contains("another pipeline"), "{err}");

    let state_dir = dir.path().join("state");
    st.save(&state_dir).unwrap();
    let index = state_dir.join("state.json");
    let text = std::fs::read_to_string(&index).unwrap().replace("\"schema_version\": 1", "\"schema_version\": 7");
    std::fs::write(&index, text).unwrap();
    let err = State::load(&state_dir).unwrap_err().to_string();
    assert!(err.contains("state.json") && err.contains("schema_version") && err.contains('7'), "{err}");
}

/// Acceptance: `axsift reduce --state` killed with SIGKILL at several moments leaves a state
/// that loads (the previous one or the completed one), and a rerun ends with the same sums
/// as an uninterrupted run.
#[test]
fn a_killed_update_leaves_a_usable_state() {
    let dir = tempfile::tempdir().unwrap();
    let exe = env!("CARGO_BIN_EXE_axsift");
    let pipeline = concat!(env!("CARGO_MANIFEST_DIR"), "/pipeline.toml");
    let first = night(31, 5.2e9, dir.path(), false);
    let second = night(32, 5.2015e9, dir.path(), false);
    let run = |state: &Path, file: &Path| Command::new(exe).args(["-q", "reduce", "--config", pipeline, "--state"]).arg(state).arg("--out").arg(state.join("out")).arg(file).output().unwrap();
    let reference = dir.path().join("reference");
    assert!(run(&reference, &first).status.success());
    assert!(run(&reference, &second).status.success());
    let expected = State::load(&reference).unwrap().unwrap();

    for (i, delay_ms) in [0u64, 30, 80, 150, 250, 400].into_iter().enumerate() {
        let state_dir = dir.path().join(format!("killed-{i}"));
        assert!(run(&state_dir, &first).status.success());
        let mut child = Command::new(exe).args(["-q", "reduce", "--config", pipeline, "--state"]).arg(&state_dir).arg("--out").arg(state_dir.join("out")).arg(&second).spawn().unwrap();
        std::thread::sleep(std::time::Duration::from_millis(delay_ms));
        let _ = child.kill();
        let _ = child.wait();
        let after = State::load(&state_dir).unwrap().expect("a state survives");
        assert!(after.nights.len() == 1 || after.nights.len() == 2);
        if after.nights.len() == 1 {
            let out = run(&state_dir, &second);
            assert!(out.status.success(), "{}", String::from_utf8_lossy(&out.stderr));
        }
        let done = State::load(&state_dir).unwrap().unwrap();
        assert_eq!(bits(&done.weighted_sum), bits(&expected.weighted_sum), "kill after {delay_ms} ms");
        assert_eq!(done.candidates, expected.candidates);
    }
}

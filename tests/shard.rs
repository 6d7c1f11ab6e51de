//! Sharded reductions and campaigns: shards run as child processes of the built binary give
//! bit-identical results to the single-machine run; the merge refuses missing, duplicated and
//! foreign shards; a shard killed mid-run and rerun changes nothing.

mod common;
mod shard_common;

use shard_common::{assert_same_reduction, axsift, campaign_reference, night, nightly, plan_campaign, plan_reduction, run_ok, s, three_nights};
use std::path::Path;
use std::process::{Child, Output};

/// Runs the given shards as concurrent child processes and waits for all of them.
fn run_shards(plan: &Path, indices: &[usize]) {
    let children: Vec<(usize, Child)> =
        indices.iter().map(|&i| (i, axsift(&["shard-run", "--plan", s(plan), "--index", &i.to_string()]).spawn().expect("spawn shard"))).collect();
    for (i, c) in children {
        let out = c.wait_with_output().expect("shard finishes");
        assert!(out.status.success(), "shard {i} failed");
    }
}

fn merge(plan: &Path, out: &Path, state: Option<&Path>) -> Output {
    let mut args = vec!["shard-merge", "--plan", s(plan), "--out", s(out)];
    if let Some(st) = state {
        args.extend(["--state", s(st)]);
    }
    axsift(&args).output().expect("merge starts")
}

/// Acceptance: three nights in two shards (one holds two nights), run concurrently as child
/// processes, merge bit-identical to three nightly `reduce --state` runs.
#[test]
fn sharded_reduction_equals_nightly_reduction() {
    let dir = tempfile::tempdir().unwrap();
    let nights = three_nights(dir.path());
    let reference = nightly(dir.path(), &nights);
    let plan = plan_reduction(&dir.path().join("work"), &nights, 2);
    run_shards(&plan, &[0, 1]);
    let (state, out) = (dir.path().join("state"), dir.path().join("out"));
    let m = merge(&plan, &out, Some(&state));
    assert!(m.status.success(), "{}", String::from_utf8_lossy(&m.stderr));
    assert_same_reduction((&reference.0, &reference.1), (&state, &out));
    // The merge builds a new state: a second merge into the same folder is refused.
    let again = merge(&plan, &dir.path().join("out2"), Some(&state));
    assert_eq!(again.status.code(), Some(2));
    assert!(String::from_utf8_lossy(&again.stderr).contains("already holds a state"));
}

/// Acceptance: a small campaign (head + two efficiency shards) gives a calibration.json
/// byte-identical to the single-machine campaign with the same spec.
#[test]
fn sharded_campaign_equals_single_machine_campaign() {
    let dir = tempfile::tempdir().unwrap();
    let (scenario_file, spec_file, reference) = campaign_reference(dir.path());
    let plan = plan_campaign(&dir.path().join("work"), &scenario_file, &spec_file, 3);
    // Efficiency shards need the head's file.
    let early = axsift(&["shard-run", "--plan", s(&plan), "--index", "1"]).output().unwrap();
    assert_eq!(early.status.code(), Some(2));
    assert!(String::from_utf8_lossy(&early.stderr).contains("shard-0000.json: missing"), "{}", String::from_utf8_lossy(&early.stderr));
    run_shards(&plan, &[0]);
    run_shards(&plan, &[1, 2]);
    let out = dir.path().join("cal");
    let m = merge(&plan, &out, None);
    assert!(m.status.success(), "{}", String::from_utf8_lossy(&m.stderr));
    assert_eq!(std::fs::read(reference.join("calibration.json")).unwrap(), std::fs::read(out.join("calibration.json")).unwrap());
    assert_eq!(std::fs::read(reference.join("efficiency.csv")).unwrap(), std::fs::read(out.join("efficiency.csv")).unwrap());
}

fn refused(plan: &Path, out: &Path, state: &Path, expect: &[&str]) {
    let m = merge(plan, out, Some(state));
    let err = String::from_utf8_lossy(&m.stderr);
    assert_eq!(m.status.code(), Some(2), "merge should refuse: {err}");
    for e in expect {
        assert!(err.contains(e), "message lacks {e:?}: {err}");
    }
    assert!(!state.join("state.json").exists(), "a refused merge writes no state");
}

/// Missing, duplicated and foreign shard files are refused with a message naming the file.
#[test]
fn merge_refuses_missing_duplicated_and_foreign_shards() {
    let dir = tempfile::tempdir().unwrap();
    let nights = three_nights(dir.path());
    let plan = plan_reduction(&dir.path().join("work"), &nights, 3);
    let other = plan_reduction(&dir.path().join("other"), &nights[..2], 3);
    run_shards(&plan, &[0, 1, 2]);
    run_shards(&other, &[1]);
    let shards = dir.path().join("work/shards");
    let (f0, f1) = (shards.join("shard-0000.json"), shards.join("shard-0001.json"));
    let good = std::fs::read(&f1).unwrap();
    let (out, state) = (dir.path().join("out"), dir.path().join("state"));

    std::fs::remove_file(&f1).unwrap();
    refused(&plan, &out, &state, &["shard-0001.json: missing", "shard-run"]);
    std::fs::copy(&f0, &f1).unwrap();
    refused(&plan, &out, &state, &["shard-0001.json: duplicated shard", "shard-0000.json"]);
    std::fs::copy(dir.path().join("other/shards/shard-0001.json"), &f1).unwrap();
    refused(&plan, &out, &state, &["shard-0001.json: foreign shard", "plan_sha256"]);
    std::fs::write(&f1, &good).unwrap();
    std::fs::write(shards.join("shard-0007.json"), b"{}").unwrap();
    refused(&plan, &out, &state, &["shard-0007.json: foreign shard file", "0..3"]);
    std::fs::remove_file(shards.join("shard-0007.json")).unwrap();
    let m = merge(&plan, &out, Some(&state));
    assert!(m.status.success(), "{}", String::from_utf8_lossy(&m.stderr));
}

/// A shard killed with SIGKILL mid-run leaves no shard file (the merge refuses it as
/// missing); rerun, the merge equals the single-machine result.
#[test]
fn killed_shard_rerun_gives_the_same_result() {
    let dir = tempfile::tempdir().unwrap();
    let mut nights = three_nights(dir.path());
    nights[1] = night(dir.path(), 14, 5.2015e9, 3000);
    let reference = nightly(dir.path(), &nights);
    let plan = plan_reduction(&dir.path().join("work"), &nights, 3);
    run_shards(&plan, &[0, 2]);
    let mut child = axsift(&["shard-run", "--plan", s(&plan), "--index", "1"]).spawn().unwrap();
    std::thread::sleep(std::time::Duration::from_millis(150));
    assert!(child.try_wait().unwrap().is_none(), "the 3000-step shard should still be running");
    child.kill().unwrap(); // SIGKILL on Unix
    child.wait().unwrap();
    let (out, state) = (dir.path().join("out"), dir.path().join("state"));
    refused(&plan, &out, &state, &["shard-0001.json: missing"]);
    run_shards(&plan, &[1]);
    let m = merge(&plan, &out, Some(&state));
    assert!(m.status.success(), "{}", String::from_utf8_lossy(&m.stderr));
    assert_same_reduction((&reference.0, &reference.1), (&state, &out));
}

/// The shard index comes from SLURM_ARRAY_TASK_ID when --index is absent; a bad value, an
/// index past the plan, a run file in two nights and a hand-broken plan are refused.
#[test]
fn shard_index_from_the_slurm_environment() {
    let dir = tempfile::tempdir().unwrap();
    let nights = three_nights(dir.path());
    let plan = plan_reduction(&dir.path().join("work"), &nights, 3);
    let ok = axsift(&["shard-run", "--plan", s(&plan)]).env("SLURM_ARRAY_TASK_ID", "2").output().unwrap();
    assert!(ok.status.success(), "{}", String::from_utf8_lossy(&ok.stderr));
    assert!(dir.path().join("work/shards/shard-0002.json").exists());
    assert!(!dir.path().join("work/shards/shard-0000.json").exists());
    let bad = axsift(&["shard-run", "--plan", s(&plan)]).env("SLURM_ARRAY_TASK_ID", "x").output().unwrap();
    assert_eq!(bad.status.code(), Some(2));
    let twice = axsift(&[
        "shard-plan",
        "--config",
        "pipeline.toml",
        "--work",
        s(&dir.path().join("twice")),
        "--shards",
        "2",
        "--night",
        s(&nights[0]),
        "--night",
        &format!("{},{}", s(&nights[1]), s(&nights[0])),
    ])
    .output()
    .unwrap();
    assert_eq!(twice.status.code(), Some(2));
    assert!(String::from_utf8_lossy(&twice.stderr).contains("given in night 0 and in night 1"), "{}", String::from_utf8_lossy(&twice.stderr));
    let past = axsift(&["shard-run", "--plan", s(&plan), "--index", "3"]).output().unwrap();
    assert!(String::from_utf8_lossy(&past.stderr).contains("shard 3 does not exist"));
    // A plan edited by hand so that a shard reaches past the nights is refused, not run.
    let mut edited: serde_json::Value = serde_json::from_slice(&std::fs::read(&plan).unwrap()).unwrap();
    edited["shards"][2]["count"] = serde_json::json!(5);
    let broken = dir.path().join("broken/plan.json");
    std::fs::create_dir_all(broken.parent().unwrap()).unwrap();
    std::fs::write(&broken, serde_json::to_vec(&edited).unwrap()).unwrap();
    let refused = axsift(&["shard-run", "--plan", s(&broken), "--index", "2"]).output().unwrap();
    assert_eq!(refused.status.code(), Some(2));
    assert!(String::from_utf8_lossy(&refused.stderr).contains("field `shards`, entry 2"), "{}", String::from_utf8_lossy(&refused.stderr));
}

/// A reprocessing merged with a calibration has the limits of nightly `reduce --state
/// --calibration`: limits.csv and limit_blocks.csv byte-identical and the same limit range in
/// the state; a campaign merge refuses a calibration.
#[test]
fn sharded_reduction_with_a_calibration_has_the_nightly_limits() {
    let dir = tempfile::tempdir().unwrap();
    let (scenario_file, spec_file, cal_dir) = campaign_reference(dir.path());
    let cal = cal_dir.join("calibration.json");
    let nights = three_nights(dir.path());
    let (ref_state, ref_out) = (dir.path().join("ref-state"), dir.path().join("ref-out"));
    for n in &nights {
        run_ok(&["reduce", "--config", "pipeline.toml", "--calibration", s(&cal), "--state", s(&ref_state), "--out", s(&ref_out), s(n)]);
    }
    let plan = plan_reduction(&dir.path().join("work"), &nights, 2);
    run_shards(&plan, &[0, 1]);
    let (state, out) = (dir.path().join("state"), dir.path().join("out"));
    let m = axsift(&["shard-merge", "--plan", s(&plan), "--out", s(&out), "--state", s(&state), "--calibration", s(&cal)]).output().unwrap();
    assert!(m.status.success(), "{}", String::from_utf8_lossy(&m.stderr));
    assert_same_reduction((&ref_state, &ref_out), (&state, &out));
    for name in ["limits.csv", "limit_blocks.csv"] {
        assert_eq!(std::fs::read(ref_out.join(name)).unwrap(), std::fs::read(out.join(name)).unwrap(), "{name} differs");
    }
    let limit = |d: &Path| axsift::state::State::load(d).unwrap().unwrap().limit;
    assert!(limit(&ref_state).is_some());
    assert_eq!(limit(&ref_state), limit(&state));

    let campaign = plan_campaign(&dir.path().join("camp"), &scenario_file, &spec_file, 2);
    let refused = axsift(&["shard-merge", "--plan", s(&campaign), "--out", s(&dir.path().join("c")), "--calibration", s(&cal)]).output().unwrap();
    assert_eq!(refused.status.code(), Some(2));
    assert!(String::from_utf8_lossy(&refused.stderr).contains("takes none"), "{}", String::from_utf8_lossy(&refused.stderr));
}

/// `calibrate --spec` runs the campaign the spec file describes: its calibration.json is
/// byte-identical to the library campaign with the same spec.
#[test]
fn calibrate_command_with_a_spec_equals_the_library_campaign() {
    let dir = tempfile::tempdir().unwrap();
    let (scenario_file, spec_file, reference) = campaign_reference(dir.path());
    let out = dir.path().join("cli-cal");
    run_ok(&["calibrate", "--config", "pipeline.toml", "--scenario", s(&scenario_file), "--spec", s(&spec_file), "--out", s(&out)]);
    assert_eq!(std::fs::read(reference.join("calibration.json")).unwrap(), std::fs::read(out.join("calibration.json")).unwrap());
}

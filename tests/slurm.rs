//! Against a real single-node Slurm (scripts/slurm_local.sh): the shard array and the merge
//! submitted by `axsift shard-slurm --submit` finish and the merge equals the single-machine
//! result bit for bit; a failed shard cancels the merge (no job left pending) and, rerun
//! alone with the documented command, completes the reduction; a campaign's head array, its
//! dependent efficiency array and the merge give the single-machine calibration.
//! Skips, with the reason printed, when not root or when Slurm cannot be installed here.

mod common;
mod shard_common;

use shard_common::{assert_same_reduction, campaign_reference, nightly, plan_campaign, plan_reduction, run_ok, s, three_nights};
use std::path::Path;
use std::process::Command;
use std::time::{Duration, Instant};

const SCRIPT: &str = concat!(env!("CARGO_MANIFEST_DIR"), "/scripts/slurm_local.sh");
/// Held while the local cluster runs (scripts/test.sh does not stop it while held).
const LOCK: &str = "/run/axsift-slurm-local.lock";
/// Longest wait for a set of jobs to leave the queue.
const JOB_WAIT: Duration = Duration::from_secs(120);

/// Stops the daemons the script started when the test ends, also on a failed assertion.
struct Cluster;

impl Drop for Cluster {
    fn drop(&mut self) {
        let _ = Command::new("timeout").args(["60", "bash", SCRIPT, "stop"]).status();
    }
}

/// Output of a Slurm client command, each bounded by `timeout`.
fn slurm(args: &[&str]) -> String {
    let out = Command::new("timeout").arg("20").args(args).output().expect("timeout runs");
    assert!(out.status.success(), "{args:?} failed: {}", String::from_utf8_lossy(&out.stderr));
    String::from_utf8_lossy(&out.stdout).into_owned()
}

fn wait_gone(ids: &[&str]) -> Duration {
    let start = Instant::now();
    while !slurm(&["squeue", "-h", "-j", &ids.join(","), "-o", "%i"]).trim().is_empty() {
        assert!(start.elapsed() < JOB_WAIT, "jobs {ids:?} still queued after {JOB_WAIT:?}");
        std::thread::sleep(Duration::from_millis(300));
    }
    start.elapsed()
}

/// Final state of every job of `id` (one per array task), from `scontrol show job`.
fn states(id: &str) -> Vec<String> {
    slurm(&["scontrol", "show", "job", id]).split_whitespace().filter_map(|w| w.strip_prefix("JobState=")).map(str::to_string).collect()
}

fn sbatch(args: &[&str]) -> String {
    slurm(&[&["sbatch", "--parsable"], args].concat()).trim().split(';').next().unwrap_or_default().to_string()
}

fn can_run() -> Result<(), String> {
    let uid = Command::new("id").arg("-u").output().map_err(|e| format!("cannot run id: {e}"))?;
    if String::from_utf8_lossy(&uid.stdout).trim() != "0" {
        return Err("not running as root".into());
    }
    let have = |cmd: &str| Command::new("sh").args(["-c", &format!("command -v {cmd}")]).output().is_ok_and(|o| o.status.success());
    if !have("sbatch") && !have("apt-get") {
        return Err("Slurm is not installed and apt-get is unavailable".into());
    }
    Ok(())
}

#[test]
fn shard_array_and_merge_on_a_local_slurm() {
    if let Err(reason) = can_run() {
        println!("skipped: {reason}");
        return;
    }
    // One local cluster at a time: a concurrent run of this test waits here.
    let lock = std::fs::File::create(LOCK).expect("lock file");
    lock.lock().expect("lock");
    let start = Command::new("timeout").args(["300", "bash", SCRIPT, "start"]).output().expect("bash runs");
    let cluster = Cluster;
    match start.status.code() {
        Some(0) => {}
        Some(3) => {
            println!("skipped: {}", String::from_utf8_lossy(&start.stderr).trim());
            return;
        }
        _ => panic!("slurm_local.sh start failed ({}): {}", start.status, String::from_utf8_lossy(&start.stderr)),
    }

    let dir = tempfile::tempdir().unwrap();
    let nights = three_nights(dir.path());
    let reference = nightly(dir.path(), &nights);
    let plan = plan_reduction(&dir.path().join("work"), &nights, 3);
    let text = std::fs::read_to_string(&plan).unwrap();
    let stored: serde_json::Value = serde_json::from_str(&text).unwrap();
    assert_eq!(stored["config_text"].as_str(), Some(common::PIPELINE), "the plan carries the pipeline text");

    // First submission with night 1 unreadable: its shard fails, the merge is cancelled.
    let away = nights[1].with_extension("away");
    std::fs::rename(&nights[1], &away).unwrap();
    let (state, out) = (dir.path().join("state"), dir.path().join("out"));
    let submitted = run_ok(&["shard-slurm", "--plan", s(&plan), "--out", s(&out), "--state", s(&state), "--submit"]);
    let printed = String::from_utf8_lossy(&submitted.stdout).into_owned();
    let ids: Vec<&str> = printed.lines().find_map(|l| l.strip_prefix("submitted jobs ")).expect("job ids printed").split(' ').collect();
    assert_eq!(ids.len(), 2, "one array and one merge: {printed}");
    let waited = wait_gone(&ids);
    let mut array = states(ids[0]);
    array.sort();
    assert_eq!(array, ["COMPLETED", "COMPLETED", "FAILED"], "shard 1 fails, 0 and 2 complete");
    assert_eq!(states(ids[1]), ["CANCELLED"], "the merge is cancelled, not left pending");
    assert!(!state.join("state.json").exists());
    println!("failed run left the queue after {waited:?}");

    // Rerun the failed shard alone, then the merge, as the printed hint says.
    assert!(printed.contains("sbatch --array=K"), "{printed}");
    std::fs::rename(&away, &nights[1]).unwrap();
    let scripts = dir.path().join("work/slurm");
    let rerun = sbatch(&["--array=1", s(&scripts.join("shard.sbatch"))]);
    let merge = sbatch(&[&format!("--dependency=afterok:{rerun}"), "--kill-on-invalid-dep=yes", s(&scripts.join("merge.sbatch"))]);
    let waited = wait_gone(&[&rerun, &merge]);
    assert_eq!(states(&rerun), ["COMPLETED"]);
    assert_eq!(states(&merge), ["COMPLETED"]);
    println!("rerun shard and merge finished in {waited:?}");
    assert_same_reduction((&reference.0, &reference.1), (&state, &out));
    assert!(Path::new(&scripts.join(format!("merge-{merge}.log"))).exists(), "the merge wrote its log");

    // A campaign in three shards: shard 0, then shards 1-2 after it, then the merge.
    let (scenario, spec, reference) = campaign_reference(dir.path());
    let campaign = plan_campaign(&dir.path().join("camp"), &scenario, &spec, 3);
    let cal = dir.path().join("cal");
    let submitted = run_ok(&["shard-slurm", "--plan", s(&campaign), "--out", s(&cal), "--submit"]);
    let printed = String::from_utf8_lossy(&submitted.stdout).into_owned();
    let ids: Vec<&str> = printed.lines().find_map(|l| l.strip_prefix("submitted jobs ")).expect("job ids printed").split(' ').collect();
    assert_eq!(ids.len(), 3, "head array, efficiency array, merge: {printed}");
    let waited = wait_gone(&ids);
    assert_eq!(states(ids[0]), ["COMPLETED"]);
    assert_eq!(states(ids[1]), ["COMPLETED", "COMPLETED"]);
    assert_eq!(states(ids[2]), ["COMPLETED"]);
    println!("campaign arrays and merge finished in {waited:?}");
    assert_eq!(std::fs::read(reference.join("calibration.json")).unwrap(), std::fs::read(cal.join("calibration.json")).unwrap());
    drop(cluster);
    drop(lock);
}

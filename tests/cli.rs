//! The command line as a user meets it: the demo end to end, plan printing, exit codes.

use std::process::Command;

fn axsift() -> Command {
    Command::new(env!("CARGO_BIN_EXE_axsift"))
}

/// `axsift demo` simulates, reduces, prints a summary with the injected candidate and the
/// advisory, and leaves every output in place with the documented summary fields.
#[test]
fn demo_runs_end_to_end() {
    let dir = tempfile::tempdir().unwrap();
    // Limits left by an earlier calibrated reduction into the same folder: this uncalibrated
    // one must not leave them beside its own results.
    for stale in ["limits.csv", "exclusion.png"] {
        std::fs::write(dir.path().join(stale), b"earlier").unwrap();
    }
    let out = axsift().args(["demo", "--out"]).arg(dir.path()).output().unwrap();
    let stdout = String::from_utf8_lossy(&out.stdout);
    assert!(out.status.success(), "demo failed: {}", String::from_utf8_lossy(&out.stderr));
    assert!(stdout.contains("rescan candidate"), "{stdout}");
    assert!(stdout.contains("does not control the magnet"), "{stdout}");
    for name in ["night.h5", "results.h5", "candidates.csv", "summary.json", "grand_spectrum.png", "grand_spectrum.svg"] {
        assert!(dir.path().join(name).is_file(), "{name} missing");
    }
    let summary: serde_json::Value = serde_json::from_str(&std::fs::read_to_string(dir.path().join("summary.json")).unwrap()).unwrap();
    for key in ["n_steps_in", "n_steps_used", "n_rf_bins", "grand_mean", "grand_std", "threshold", "n_candidates", "candidates"] {
        assert!(summary.get(key).is_some(), "summary.json lacks {key}");
    }
    assert_eq!(summary["n_steps_in"], 600);
    // The demo's synthetic axion sits at 5205.2 MHz.
    let found = summary["candidates"].as_array().unwrap().iter().any(|c| (c["frequency_hz"].as_f64().unwrap() - 5.2052e9).abs() < 4e3);
    assert!(found, "the demo axion was not flagged");
    let leftovers: Vec<_> = std::fs::read_dir(dir.path()).unwrap().filter_map(|e| e.ok()).filter(|e| e.file_name().to_string_lossy().contains("tmp")).collect();
    assert!(leftovers.is_empty(), "temporary files left: {leftovers:?}");
    for stale in ["limits.csv", "exclusion.png"] {
        assert!(!dir.path().join(stale).exists(), "{stale} of an earlier reduction left in place");
    }
    // The log goes to a pipe here: plain text, no colour escapes.
    let log = String::from_utf8_lossy(&out.stderr);
    assert!(log.contains("INFO"), "no log on stderr: {log}");
    assert!(!log.contains('\u{1b}'), "colour escapes in a piped log: {log:?}");
}

/// `--help` documents the exit statuses.
#[test]
fn help_documents_exit_statuses() {
    let out = axsift().arg("--help").output().unwrap();
    let text = String::from_utf8_lossy(&out.stdout);
    assert!(out.status.success() && text.contains("Exit status: 0 success, 1 a failure while running, 2 bad input"), "{text}");
}

/// `axsift plan` prints every stage with its defaults resolved.
#[test]
fn plan_prints_every_stage() {
    let out = axsift().args(["plan", "--config", concat!(env!("CARGO_MANIFEST_DIR"), "/pipeline.toml")]).output().unwrap();
    assert!(out.status.success());
    let text = String::from_utf8_lossy(&out.stdout);
    for kind in ["ingest", "baseline", "rescale", "combine", "filter", "flag"] {
        assert!(text.contains(kind), "{kind} missing from:\n{text}");
    }
    assert!(text.contains("window_bins = 401"), "{text}");
}

/// Bad input exits with status 2 and a message naming the file; no panic.
#[test]
fn bad_input_exits_with_status_two() {
    let dir = tempfile::tempdir().unwrap();
    let not_hdf5 = dir.path().join("garbage.h5");
    std::fs::write(&not_hdf5, b"this is not an HDF5 file").unwrap();
    let out = axsift().arg("inspect").arg(&not_hdf5).output().unwrap();
    assert_eq!(out.status.code(), Some(2));
    let err = String::from_utf8_lossy(&out.stderr);
    assert!(err.contains("garbage.h5") && !err.contains("panicked"), "{err}");
}

/// Output piped into a reader that has gone (`axsift plan ... | head -1`, a closed pager) ends
/// the process quietly, as Unix tools do, never with a panic.
#[test]
fn closed_output_pipe_is_not_a_panic() {
    let mut child = axsift()
        .args(["plan", "--config", concat!(env!("CARGO_MANIFEST_DIR"), "/pipeline.toml")])
        .stdout(std::process::Stdio::piped())
        .stderr(std::process::Stdio::piped())
        .spawn()
        .unwrap();
    drop(child.stdout.take());
    let out = child.wait_with_output().unwrap();
    let err = String::from_utf8_lossy(&out.stderr);
    assert!(!err.contains("panicked"), "{err}");
}

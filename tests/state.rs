//! The analysis state across nights: incremental == batch, rescans clear fluctuations and
//! keep signals, refusals, and crash safety under SIGKILL.

mod common;

use axsift::config;
use axsift::sim::{self, Axion, IfBurst};
use axsift::state::{self, Class, State};
use common::{PIPELINE, null_scenario};
use std::path::{Path, PathBuf};
use std::process::Command;

fn night(seed: u64, first_cavity_hz: f64, dir: &Path, axion: bool) -> PathBuf {
    night_of_steps(seed, first_cavity_hz, dir, axion, 200)
}

/// A night like [`night`] of `n_steps` steps.
fn night_of_steps(seed: u64, first_cavity_hz: f64, dir: &Path, axion: bool, n_steps: usize) -> PathBuf {
    let mut sc = null_scenario(seed);
    sc.scan.n_steps = n_steps;
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

/// The sums over the state's whole grid.
fn whole(st: &State) -> state::Sums {
    st.sums(st.grid_bins.map_or(0..0, |(lo, hi)| lo..hi)).unwrap()
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
    let (inc, bat) = (whole(&incremental), whole(&batch));
    assert_eq!(bits(&inc.weight), bits(&bat.weight));
    assert_eq!(bits(&inc.weighted_sum), bits(&bat.weighted_sum));
    assert_eq!((&inc.coverage, &inc.line_steps), (&bat.coverage, &bat.line_steps));
    assert_eq!((incremental.rf_origin_hz, incremental.grid_bins), (batch.rf_origin_hz, batch.grid_bins));
    let (a, b) = (&last.unwrap().reduction.spectrum, &updates[2].reduction.spectrum);
    assert_eq!(bits(&a.grand), bits(&b.grand));
    assert!(incremental.candidates.len() > 10, "{} candidates", incremental.candidates.len());
    assert_eq!(incremental.candidates.all().unwrap(), batch.candidates.all().unwrap());
    assert_eq!(incremental.candidates.by_class, batch.candidates.by_class);
    assert_eq!(incremental.nights.len(), 3);
    // The third night extends the grid below the first one's origin.
    assert!(incremental.grid_bins.unwrap().0 < 0);
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
    let noise_first: Vec<f64> = st.candidates.all().unwrap().iter().filter(|c| (c.frequency_hz - 5.2021e9).abs() > 2e4).map(|c| c.frequency_hz).collect();
    assert!(!noise_first.is_empty(), "the first night should have noise candidates to clear");
    state::add_nights(&mut st, &plan, &[vec![rescan]]).unwrap();
    let axion = st.candidates.all().unwrap().iter().find(|c| (c.frequency_hz - 5.2021e9).abs() < 4e3).expect("axion tracked");
    assert_eq!(axion.class, Class::Persists, "{}", axion.evidence);
    assert!(axion.rescan_integration_s.is_finite() && axion.rescan_integration_s > 0.0);
    let cleared = st.candidates.all().unwrap().iter().filter(|c| noise_first.contains(&c.frequency_hz) && c.class == Class::Cleared).count();
    // A fluctuation above 3.355 stays above it after a second, independent night with
    // probability well under 10%.
    assert!(cleared as f64 >= 0.8 * noise_first.len() as f64, "{cleared} of {} cleared", noise_first.len());
}

/// Acceptance: re-adding a file, another pipeline, a night of another spectrum estimator and
/// another schema version are refused
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

    // A night whose spectra correlate neighbouring bins (another spectrum estimator).
    let hann_like = night(23, 5.2e9, dir.path(), false);
    let file = hdf5::File::open_rw(&hann_like).unwrap();
    file.new_attr::<f64>().shape(1).create("bin_correlation").unwrap().write_raw(&[0.25]).unwrap();
    drop(file);
    let err = state::add_nights(&mut st, &plan, &[vec![hann_like]]).unwrap_err().to_string();
    assert!(err.contains("bin_correlation") && err.contains("[0.25]") && err.contains("window and overlap"), "{err}");

    let state_dir = dir.path().join("state");
    st.save(&state_dir).unwrap();
    let index = state_dir.join("state.json");
    let text = std::fs::read_to_string(&index).unwrap().replace(&format!("\"schema_version\": {}", state::STATE_SCHEMA_VERSION), "\"schema_version\": 7");
    std::fs::write(&index, text).unwrap();
    let err = State::load(&state_dir).unwrap_err().to_string();
    assert!(err.contains("state.json") && err.contains("schema_version") && err.contains('7'), "{err}");
    // A state of the previous layout (one sums file, version 2) is refused the same way.
    let text = std::fs::read_to_string(&index).unwrap().replace("\"schema_version\": 7", "\"schema_version\": 2");
    std::fs::write(&index, text).unwrap();
    let err = State::load(&state_dir).unwrap_err().to_string();
    assert!(err.contains("schema_version` is 2") && err.contains("start a new state folder"), "{err}");
    // And one of the layout with every candidate in state.json (version 3).
    let text = std::fs::read_to_string(&index).unwrap().replace("\"schema_version\": 2", "\"schema_version\": 3");
    std::fs::write(&index, text).unwrap();
    let err = State::load(&state_dir).unwrap_err().to_string();
    assert!(err.contains("state.json") && err.contains("schema_version` is 3") && err.contains("start a new state folder"), "{err}");
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
    let run = |state: &Path, file: &Path| {
        Command::new(exe).args(["-q", "reduce", "--config", pipeline, "--state"]).arg(state).arg("--out").arg(state.join("out")).arg(file).output().unwrap()
    };
    let reference = dir.path().join("reference");
    assert!(run(&reference, &first).status.success());
    assert!(run(&reference, &second).status.success());
    let expected = State::load(&reference).unwrap().unwrap();

    for (i, delay_ms) in [0u64, 30, 80, 150, 250, 400, 600, 900].into_iter().enumerate() {
        let state_dir = dir.path().join(format!("killed-{i}"));
        assert!(run(&state_dir, &first).status.success());
        let mut child = Command::new(exe)
            .args(["-q", "reduce", "--config", pipeline, "--state"])
            .arg(&state_dir)
            .arg("--out")
            .arg(state_dir.join("out"))
            .arg(&second)
            .spawn()
            .unwrap();
        std::thread::sleep(std::time::Duration::from_millis(delay_ms));
        let _ = child.kill();
        let _ = child.wait();
        let after = State::load(&state_dir).unwrap().expect("a state survives");
        assert!(after.nights.len() == 1 || after.nights.len() == 2);
        let committed_before_the_kill = after.nights.len() == 2;
        // Every candidate block it names is there and reads.
        assert_eq!(after.candidates.all().unwrap().len(), after.candidates.len(), "kill after {delay_ms} ms");
        if after.nights.len() == 1 {
            let out = run(&state_dir, &second);
            assert!(out.status.success(), "{}", String::from_utf8_lossy(&out.stderr));
        }
        let done = State::load(&state_dir).unwrap().unwrap();
        assert_eq!(bits(&whole(&done).weighted_sum), bits(&whole(&expected).weighted_sum), "kill after {delay_ms} ms");
        assert!(!expected.candidates.is_empty());
        assert_eq!(done.candidates, expected.candidates);
        if committed_before_the_kill {
            // Killed between its commit and its clean-up: every file the index names is there,
            // and the others are earlier generations of named blocks, which the next update
            // removes.
            assert_superseded_at_most(&files_in(&state_dir.join("blocks")), &named_blocks(&done), delay_ms);
            assert_superseded_at_most(&files_in(&state_dir.join("candidates")), &named_candidate_blocks(&done), delay_ms);
        } else {
            // What the killed run left behind is gone once an update has committed.
            assert_eq!(files_in(&state_dir.join("blocks")), named_blocks(&done), "kill after {delay_ms} ms");
            assert_eq!(files_in(&state_dir.join("candidates")), named_candidate_blocks(&done), "kill after {delay_ms} ms");
        }
        assert_eq!(files_in(&state_dir.join("nights")), vec!["night-0.h5".to_string(), "night-1.h5".to_string()]);
    }
}

/// `present` holds every name of `named`, and each other name is an earlier generation of a
/// named one (`<kind><index>-g<generation>.<ext>`, the same kind, index and extension).
fn assert_superseded_at_most(present: &[String], named: &[String], delay_ms: u64) {
    let parts = |name: &str| -> Option<(String, u64, String)> {
        let (stem, ext) = name.rsplit_once('.')?;
        let (block, generation) = stem.rsplit_once("-g")?;
        Some((block.to_string(), generation.parse().ok()?, ext.to_string()))
    };
    for name in named {
        assert!(present.contains(name), "kill after {delay_ms} ms: {name} is named but missing");
    }
    for name in present.iter().filter(|p| !named.contains(p)) {
        let newer =
            parts(name).is_some_and(|(block, generation, ext)| named.iter().filter_map(|n| parts(n)).any(|(b, g, e)| b == block && e == ext && g > generation));
        assert!(newer, "kill after {delay_ms} ms: {name} is neither named nor an earlier generation of a named file");
    }
}

/// The names of the files in a folder, sorted.
fn files_in(dir: &Path) -> Vec<String> {
    let mut names: Vec<String> = std::fs::read_dir(dir).unwrap().map(|e| e.unwrap().file_name().to_string_lossy().into_owned()).collect();
    names.sort();
    names
}

/// The block files a state's index names, sorted.
fn named_blocks(st: &State) -> Vec<String> {
    let mut names: Vec<String> = st.blocks.iter().map(|b| format!("b{}-g{}.h5", b.index, b.generation)).collect();
    names.sort();
    names
}

/// The candidate files a state's index names, sorted.
fn named_candidate_blocks(st: &State) -> Vec<String> {
    let mut names: Vec<String> = st.candidates.blocks.iter().map(|b| format!("c{}-g{}.json", b.index, b.generation)).collect();
    names.sort();
    names
}

/// Copies a state folder (its files and its subfolders' files).
fn copy_state(from: &Path, to: &Path) {
    for entry in std::fs::read_dir(from).unwrap() {
        let entry = entry.unwrap();
        let target = to.join(entry.file_name());
        if entry.file_type().unwrap().is_dir() {
            std::fs::create_dir_all(&target).unwrap();
            copy_state(&entry.path(), &target);
        } else {
            std::fs::create_dir_all(to).unwrap();
            std::fs::copy(entry.path(), &target).unwrap();
        }
    }
}

/// Acceptance: the candidates are kept with the blocks they lie in, and `state.json` holds
/// none. A night of 10 steps (1.4 blocks) inside the first night's band (11 blocks of 4096
/// bins) leaves every candidate file outside the span it recomputes as it was (same name, so
/// same generation, same inode, same bytes), and the update never reads them: with those
/// files replaced by garbage, the same update succeeds and writes the same candidate files in
/// its span, while listing the whole campaign (`status`) then fails with a message naming the
/// damaged file, exit status 2.
#[test]
fn an_update_leaves_the_candidate_blocks_outside_its_span_untouched() {
    use std::os::unix::fs::MetadataExt;
    // A threshold of 2.355 (target SNR 4 at 95 %) flags many noise runs: candidates in most blocks.
    let plan = config::load(&PIPELINE.replace("target_snr = 5.0", "target_snr = 4.0"), "pipeline.toml").unwrap();
    let dir = tempfile::tempdir().unwrap();
    let (state_dir, copy_dir) = (dir.path().join("state"), dir.path().join("copy"));
    let mut st = State::with_block_bins(state::plan_hash(&plan), 4096);
    state::add_nights(&mut st, &plan, &[vec![night(81, 5.2e9, dir.path(), false)]]).unwrap();
    st.save(&state_dir).unwrap();
    copy_state(&state_dir, &copy_dir);
    let before = State::load(&state_dir).unwrap().unwrap();
    let index_text = std::fs::read_to_string(state_dir.join("state.json")).unwrap();
    assert!(!index_text.contains("evidence") && !index_text.contains("frequency_hz"), "state.json lists candidates");
    let cand_dir = state_dir.join("candidates");
    let identity = |dir: &Path, name: &str| {
        let path = dir.join(name);
        (std::fs::metadata(&path).unwrap().ino(), std::fs::read(&path).unwrap())
    };
    let stored: Vec<_> = before.candidates.blocks.iter().map(|b| (b.clone(), identity(&cand_dir, &format!("c{}-g{}.json", b.index, b.generation)))).collect();

    // 10 steps: 5896 bins, 2 MHz into the first night's band.
    let short = night_of_steps(82, 5.202e9, dir.path(), false, 10);
    let mut st = State::load(&state_dir).unwrap().unwrap();
    let update = state::add_nights(&mut st, &plan, &[vec![short.clone()]]).unwrap().remove(0);
    st.save(&state_dir).unwrap();
    let sp = &update.reduction.spectrum;
    let first = first_bin(&st, sp);
    let reach = (update.match_hz / st.bin_width_hz).ceil() as i64;
    let read = st.block_of(first - reach - 1)..=st.block_of(first + sp.grand.len() as i64 + reach);
    assert!(read.clone().count() <= 8, "the update's span {first}+{} is short", sp.grand.len());
    let after = State::load(&state_dir).unwrap().unwrap();
    let outside: Vec<_> = stored.iter().filter(|(b, _)| !read.contains(&b.index)).collect();
    assert!(outside.iter().filter(|(b, _)| b.count > 0).count() >= 3, "candidates outside the span: {outside:?}");
    for (b, id) in &outside {
        assert!(after.candidates.blocks.contains(b), "block {} was rewritten: {:?}", b.index, after.candidates.blocks);
        assert_eq!(&identity(&state_dir.join("candidates"), &format!("c{}-g{}.json", b.index, b.generation)), id, "block {}", b.index);
    }
    // The night covered candidates of the first one and changed their class: the blocks
    // holding them were written under the new generation.
    let rewritten: Vec<_> = after.candidates.blocks.iter().filter(|b| b.generation == after.generation).collect();
    assert!(!rewritten.is_empty() && rewritten.iter().all(|b| read.contains(&b.index)), "{:?}", after.candidates.blocks);
    assert!(after.candidates.all().unwrap().iter().any(|c| c.first_night == 0 && c.class != Class::New));
    assert_eq!(after.candidates.all().unwrap().len(), after.candidates.len());

    // The same update on the copy, every candidate file outside the span damaged.
    for (b, _) in &outside {
        std::fs::write(copy_dir.join("candidates").join(format!("c{}-g{}.json", b.index, b.generation)), "not json").unwrap();
    }
    let mut damaged = State::load(&copy_dir).unwrap().unwrap();
    state::add_nights(&mut damaged, &plan, &[vec![short]]).unwrap();
    damaged.save(&copy_dir).unwrap();
    for b in &rewritten {
        let name = format!("c{}-g{}.json", b.index, b.generation);
        assert_eq!(std::fs::read(copy_dir.join("candidates").join(&name)).unwrap(), std::fs::read(state_dir.join("candidates").join(&name)).unwrap(), "{name}");
    }
    let err = State::load(&copy_dir).unwrap().unwrap().candidates.all().unwrap_err().to_string();
    assert!(err.contains("candidates") && err.contains(".json") && err.contains("not a candidate block"), "{err}");
    let exe = env!("CARGO_BIN_EXE_axsift");
    let status = Command::new(exe).args(["status", "--state"]).arg(&copy_dir).output().unwrap();
    assert_eq!(status.status.code(), Some(2));
    assert!(String::from_utf8_lossy(&status.stderr).contains("not a candidate block"), "{}", String::from_utf8_lossy(&status.stderr));
}

/// Grid bin of a spectrum's first bin.
fn first_bin(st: &State, sp: &axsift::stage::Spectrum) -> i64 {
    ((sp.rf_start_hz - st.rf_origin_hz) / st.bin_width_hz).round() as i64
}

/// Acceptance: with blocks of 4096 bins (a night spans 11), every update recomputes only the
/// span its night changed, and the values it writes there equal, bit for bit, the whole
/// campaign's grand spectrum recomputed from the stored blocks by `axsift export`, block
/// edges included: the bins a later update did not recompute keep the values of the update
/// that last did. Blocks that a night does not reach keep the generation that wrote them,
/// and every run of bins above threshold in the whole campaign's grand spectrum is a tracked
/// candidate.
#[test]
fn span_updates_agree_with_the_whole_campaign_at_block_edges() {
    let plan = config::load(PIPELINE, "pipeline.toml").unwrap();
    let dir = tempfile::tempdir().unwrap();
    let state_dir = dir.path().join("state");
    // The second night overlaps the first; the third lies 6 MHz above, past a gap.
    let nights: Vec<PathBuf> = [(71, 5.2e9), (72, 5.2015e9), (73, 5.206e9)].iter().map(|&(s, f)| night(s, f, dir.path(), false)).collect();
    let mut latest: std::collections::HashMap<i64, u64> = std::collections::HashMap::new();
    let mut st = State::with_block_bins(state::plan_hash(&plan), 4096);
    let mut match_hz = 0.0;
    for (i, n) in nights.iter().enumerate() {
        let update = state::add_nights(&mut st, &plan, &[vec![n.clone()]]).unwrap().remove(0);
        st.save(&state_dir).unwrap();
        let sp = &update.reduction.spectrum;
        let first = first_bin(&st, sp);
        assert_eq!(first.rem_euclid(4096), 0, "a span starts at a block edge");
        for (k, g) in sp.grand.iter().enumerate() {
            latest.insert(first + k as i64, g.to_bits());
        }
        let (lo, hi) = st.grid_bins.unwrap();
        if i == 2 {
            // The third night's span leaves out the first night's band: its own 44 096 bins
            // cover at most 12 blocks, and the span adds one tile on each side.
            assert!(first > lo + 44_000 && sp.grand.len() <= 14 * 4096, "span {first}+{} of grid {lo}..{hi}", sp.grand.len());
            let untouched: Vec<_> = st.blocks.iter().filter(|b| b.index < st.block_of(first) - 1).collect();
            assert!(!untouched.is_empty() && untouched.iter().all(|b| b.generation <= 2), "{untouched:?}");
        }
        match_hz = update.match_hz;
        st = State::load(&state_dir).unwrap().unwrap();
    }

    let out = dir.path().join("campaign.h5");
    let exe = env!("CARGO_BIN_EXE_axsift");
    let pipeline = concat!(env!("CARGO_MANIFEST_DIR"), "/pipeline.toml");
    let run = Command::new(exe).args(["-q", "export", "--config", pipeline, "--state"]).arg(&state_dir).arg("--out").arg(&out).output().unwrap();
    assert!(run.status.success(), "{}", String::from_utf8_lossy(&run.stderr));
    let file = hdf5::File::open(&out).unwrap();
    let grand: Vec<f64> = file.dataset("grand").unwrap().read_raw().unwrap();
    let first: i64 = file.attr("first_bin").unwrap().read_scalar().unwrap();
    let (lo, hi) = st.grid_bins.unwrap();
    assert_eq!((first, grand.len()), (lo, (hi - lo) as usize));
    let mut compared = 0;
    for (k, g) in grand.iter().enumerate() {
        if let Some(&b) = latest.get(&(first + k as i64)) {
            assert_eq!(b, g.to_bits(), "grid bin {}: update wrote {}, the whole campaign gives {g}", first + k as i64, f64::from_bits(b));
            compared += 1;
        }
    }
    assert_eq!(compared, grand.len(), "every bin of the grid was written by some update");

    let threshold = 3.355;
    let mut j = 0;
    while j < grand.len() {
        if !(grand[j] > threshold) {
            j += 1;
            continue;
        }
        let mut peak = j;
        while j < grand.len() && grand[j] > threshold {
            peak = if grand[j] > grand[peak] { j } else { peak };
            j += 1;
        }
        let f = st.freq_hz(first + peak as i64) - st.bin_width_hz / 2.0;
        assert!(
            st.candidates.all().unwrap().iter().any(|c| (c.frequency_hz - f).abs() <= 2.0 * match_hz),
            "run at {f} Hz (grand {}) is not tracked",
            grand[peak]
        );
    }

    let other = dir.path().join("other.toml");
    std::fs::write(&other, PIPELINE.replace("order = 4", "order = 3")).unwrap();
    let refused = Command::new(exe).args(["-q", "export", "--config"]).arg(&other).arg("--state").arg(&state_dir).arg("--out").arg(&out).output().unwrap();
    assert_eq!(refused.status.code(), Some(2));
    assert!(String::from_utf8_lossy(&refused.stderr).contains("another pipeline"));
}

/// IF bins of the simulated receiver line of the interference tests: 30 bins (3 kHz) wide,
/// 660 bins below the cavity (IF bin 2048), on in 12 of the night's 200 steps.
const BURST_IF_BINS: std::ops::Range<usize> = 1388..1418;

/// A night like [`night`] with a receiver line fixed in IF that is on in steps 60 to 71:
/// about 6 sigma per bin in each of those steps (power 0.045 k_B T dnu_b, N = 20000).
fn night_with_burst(seed: u64, dir: &Path) -> PathBuf {
    let mut sc = null_scenario(seed);
    sc.scan.n_steps = 200;
    sc.scan.first_cavity_freq_hz = 5.2e9;
    sc.axion.push(Axion { freq_hz: 5.2021e9, coupling_rel_ksvz: 1.2 });
    sc.if_burst = BURST_IF_BINS.map(|if_bin| IfBurst { if_bin, power_rel: 0.045, first_step: 60, last_step: 71 }).collect();
    let path = dir.join(format!("burst-{seed}.h5"));
    sim::simulate(&sc, &path).unwrap();
    path
}

/// RF span (line-start frequencies) that the burst reaches: its IF bins in steps 60 to 71.
fn burst_rf_span_hz(seed: u64) -> (f64, f64) {
    let mut sc = null_scenario(seed);
    sc.scan.first_cavity_freq_hz = 5.2e9;
    let bw = sc.scan.bin_width_hz;
    (sc.start_freq_hz(60) + BURST_IF_BINS.start as f64 * bw, sc.start_freq_hz(71) + BURST_IF_BINS.end as f64 * bw)
}

/// Acceptance: a receiver line fixed in IF, on in part of a night, shows in that night's IF
/// profile at its IF bins; the candidates it makes in RF are classified interference at once,
/// with the IF offsets, their IF-profile significance and the steps as evidence; the
/// injected axion is not, and persists after a rescan night, which clears the noise
/// candidates. The state saves and reloads with the new class and evidence.
#[test]
fn an_if_fixed_line_is_interference_and_the_axion_persists() {
    let plan = config::load(PIPELINE, "pipeline.toml").unwrap();
    let dir = tempfile::tempdir().unwrap();
    let mut st = State::new(state::plan_hash(&plan));
    let first = night_with_burst(41, dir.path());
    state::add_nights(&mut st, &plan, &[vec![first]]).unwrap();

    let lines: Vec<usize> = st.nights[0].if_lines.iter().map(|l| l.if_bin).collect();
    let inside = lines.iter().filter(|k| BURST_IF_BINS.contains(k)).count();
    assert!(inside >= BURST_IF_BINS.len() / 2, "IF lines {lines:?}");
    // Outside the line's bins (and the baseline fit's reach around them) the null holds.
    let outside: Vec<&usize> = lines.iter().filter(|&&k| k + 200 < BURST_IF_BINS.start || k > BURST_IF_BINS.end + 200).collect();
    assert!(outside.is_empty(), "IF lines away from the burst: {outside:?}");

    let (lo, hi) = burst_rf_span_hz(41);
    let bursty: Vec<_> = st.candidates.all().unwrap().iter().filter(|c| c.frequency_hz > lo - 5e3 && c.frequency_hz < hi).collect();
    assert!(!bursty.is_empty(), "the burst should make candidates in {lo}..{hi} Hz: {:#?}", st.candidates);
    let interference: Vec<_> = bursty.iter().filter(|c| c.class == Class::Interference).collect();
    assert!(interference.len() as f64 >= 0.8 * bursty.len() as f64, "{:#?}", bursty);
    let n_interference = interference.len();
    for c in &interference {
        let ev = c.interference.as_ref().expect("interference evidence");
        assert!(ev.n_steps >= 1 && ev.significance_without <= 3.355 + 1e-9, "{ev:?}");
        assert!(ev.lines.iter().all(|l| l.night == 0 && BURST_IF_BINS.contains(&l.if_bin) && l.if_profile_sigma > state::IF_LINE_SIGMA), "{ev:?}");
        assert!(ev.lines.iter().all(|l| l.if_offset_hz == l.if_bin as f64 * 100.0));
        assert!(c.evidence.contains("fixed-IF line") && c.evidence.contains("IF bin"), "{}", c.evidence);
    }
    let axion = st.candidates.all().unwrap().iter().find(|c| (c.frequency_hz - 5.2021e9).abs() < 4e3).expect("axion flagged");
    assert_eq!(axion.class, Class::New, "{}", axion.evidence);
    let noise_first: Vec<f64> =
        st.candidates.all().unwrap().iter().filter(|c| c.class == Class::New && (c.frequency_hz - 5.2021e9).abs() > 2e4).map(|c| c.frequency_hz).collect();

    let state_dir = dir.path().join("state");
    st.save(&state_dir).unwrap();
    let mut st = State::load(&state_dir).unwrap().unwrap();
    assert_eq!(st.candidates.all().unwrap().iter().filter(|c| c.class == Class::Interference).count(), n_interference);
    let profile = st.if_profile(0).unwrap();
    assert!(profile.if_profile_sigma.len() == 4096 && profile.if_steps.iter().all(|&n| n <= 200));

    state::add_nights(&mut st, &plan, &[vec![night(42, 5.2e9, dir.path(), true)]]).unwrap();
    assert!(st.nights[1].if_lines.iter().all(|l| !BURST_IF_BINS.contains(&l.if_bin)), "{:?}", st.nights[1].if_lines);
    let axion = st.candidates.all().unwrap().iter().find(|c| (c.frequency_hz - 5.2021e9).abs() < 4e3).unwrap();
    assert_eq!(axion.class, Class::Persists, "{}", axion.evidence);
    let cleared = st.candidates.all().unwrap().iter().filter(|c| noise_first.contains(&c.frequency_hz) && c.class == Class::Cleared).count();
    assert!(cleared as f64 >= 0.7 * noise_first.len() as f64, "{cleared} of {} cleared", noise_first.len());
    assert_eq!(st.candidates.all().unwrap().iter().filter(|c| c.class == Class::Interference).count(), n_interference, "interference stays interference");
}

/// The IF profile is accumulated in step order whatever the thread count: one and two
/// threads give bit-identical profiles and line samples.
#[test]
fn the_if_profile_does_not_depend_on_the_thread_count() {
    let plan = config::load(PIPELINE, "pipeline.toml").unwrap();
    let dir = tempfile::tempdir().unwrap();
    let file = night_with_burst(43, dir.path());
    let scan = |threads: usize| {
        let pool = rayon::ThreadPoolBuilder::new().num_threads(threads).build().unwrap();
        pool.install(|| axsift::pipeline::reduce(&plan, std::slice::from_ref(&file), &|_, _| {}).unwrap().if_scan)
    };
    let (one, two) = (scan(1), scan(2));
    assert!(!one.lines.is_empty());
    assert_eq!(bits(&one.if_profile_sigma), bits(&two.if_profile_sigma));
    assert_eq!(bits(&one.removed_weighted_sum), bits(&two.removed_weighted_sum));
    assert_eq!((one.lines, one.removed_if_bin, one.if_steps), (two.lines, two.removed_if_bin, two.if_steps));
}

/// `status` prints the nights, coverage and candidates by class of a state written by
/// `reduce --state`; `status --json` gives the same as JSON with unit-named keys, agreeing
/// with the state read through the library.
#[test]
fn status_reports_text_and_json() {
    let dir = tempfile::tempdir().unwrap();
    let exe = env!("CARGO_BIN_EXE_axsift");
    let pipeline = concat!(env!("CARGO_MANIFEST_DIR"), "/pipeline.toml");
    let state_dir = dir.path().join("state");
    for file in [night_with_burst(51, dir.path()), night(52, 5.2e9, dir.path(), true)] {
        let out = Command::new(exe)
            .args(["-q", "reduce", "--config", pipeline, "--state"])
            .arg(&state_dir)
            .arg("--out")
            .arg(dir.path().join("out"))
            .arg(&file)
            .output()
            .unwrap();
        assert!(out.status.success(), "{}", String::from_utf8_lossy(&out.stderr));
    }
    let st = State::load(&state_dir).unwrap().unwrap();
    let count = |k: Class| st.candidates.all().unwrap().iter().filter(|c| c.class == k).count();
    assert!(count(Class::Interference) > 0 && count(Class::Persists) > 0);

    let text = Command::new(exe).args(["status", "--state"]).arg(&state_dir).output().unwrap();
    assert!(text.status.success());
    let text = String::from_utf8(text.stdout).unwrap();
    assert!(text.contains("2 night(s), 2 run file(s)"), "{text}");
    assert!(text.contains(&format!("{} interference", count(Class::Interference))) && text.contains("Interference (fixed IF offset"), "{text}");
    assert!(text.contains("night 0:") && text.contains("IF bin(s) with a line"), "{text}");
    assert!(text.contains("limit: none recorded"), "{text}");

    let json = Command::new(exe).args(["status", "--json", "--state"]).arg(&state_dir).output().unwrap();
    assert!(json.status.success());
    let v: serde_json::Value = serde_json::from_slice(&json.stdout).unwrap();
    assert_eq!(v["schema_version"], state::STATE_SCHEMA_VERSION);
    assert_eq!(v["nights"].as_array().unwrap().len(), 2);
    assert_eq!(v["nights"][0]["n_steps"], 200);
    assert!(v["nights"][0]["if_line_bins"].as_array().unwrap().iter().any(|k| BURST_IF_BINS.contains(&(k.as_u64().unwrap() as usize))));
    assert_eq!(v["bin_width_hz"], 100.0);
    assert_eq!(v["rf_span_hz"][0].as_f64().unwrap(), st.rf_span_hz().unwrap().0);
    let covered = whole(&st).coverage.iter().filter(|&&c| c > 0).count() as f64 * 100.0;
    assert_eq!(v["covered_hz"].as_f64().unwrap(), covered);
    for (key, class) in [("new", Class::New), ("persists", Class::Persists), ("cleared", Class::Cleared), ("interference", Class::Interference)] {
        assert_eq!(v["candidates_by_class"][key].as_u64().unwrap() as usize, count(class), "{key}");
    }
    assert_eq!(v["candidates"].as_array().unwrap().len(), st.candidates.len());
    assert!(v["candidates"].as_array().unwrap().iter().any(|c| c["class"] == "interference" && c["evidence"].as_str().unwrap().contains("fixed-IF line")));
    assert!(v["limit"].is_null());

    let missing = Command::new(exe).args(["status", "--json", "--state"]).arg(dir.path().join("nothing")).output().unwrap();
    assert_eq!(missing.status.code(), Some(2));
    assert!(String::from_utf8_lossy(&missing.stderr).contains("no state.json"));
}

/// A calibrated update records the limit range, and `status` reports it: the smallest and
/// largest |g_gamma| / KSVZ over the excluded bins equal those of the same update's
/// limits.csv (its values rounded to 5 decimals), with the same number of excluded bins.
#[test]
fn status_reports_the_limit_range_of_a_calibrated_update() {
    use axsift::calib::{self, NoiseSource};
    let dir = tempfile::tempdir().unwrap();
    let exe = env!("CARGO_BIN_EXE_axsift");
    let pipeline = concat!(env!("CARGO_MANIFEST_DIR"), "/pipeline.toml");
    let plan = config::load(PIPELINE, "pipeline.toml").unwrap();
    // A small campaign, enough for an eta: one null and three injection realisations.
    let mut small = null_scenario(61);
    small.scan.n_steps = 60;
    let spec = common::eta_campaign(9);
    let cal = calib::calibrate(&plan, &NoiseSource::Simulated { scenario: &small, scratch: dir.path() }, &spec, &|_, _| {}).unwrap();
    let cal_dir = dir.path().join("calib");
    cal.write(&cal_dir).unwrap();

    let state_dir = dir.path().join("state");
    let out_dir = dir.path().join("out");
    let run = Command::new(exe)
        .args(["-q", "reduce", "--config", pipeline, "--calibration"])
        .arg(cal_dir.join("calibration.json"))
        .arg("--state")
        .arg(&state_dir)
        .arg("--out")
        .arg(&out_dir)
        .arg(night(62, 5.2e9, dir.path(), true))
        .output()
        .unwrap();
    assert!(run.status.success(), "{}", String::from_utf8_lossy(&run.stderr));

    let mut reader = csv::Reader::from_path(out_dir.join("limits.csv")).unwrap();
    let excluded: Vec<f64> =
        reader.records().map(|r| r.unwrap()).filter(|r| &r[2] == "true").map(|r| r[5].parse::<f64>().unwrap()).filter(|v| v.is_finite()).collect();
    assert!(!excluded.is_empty());
    let csv_min = excluded.iter().cloned().fold(f64::INFINITY, f64::min);
    let csv_max = excluded.iter().cloned().fold(f64::NEG_INFINITY, f64::max);

    let json = Command::new(exe).args(["status", "--json", "--state"]).arg(&state_dir).output().unwrap();
    assert!(json.status.success());
    let v: serde_json::Value = serde_json::from_slice(&json.stdout).unwrap();
    let limit = &v["limit"];
    assert!(!limit.is_null(), "{v}");
    let (min, max) = (limit["min_rel_ksvz"].as_f64().unwrap(), limit["max_rel_ksvz"].as_f64().unwrap());
    assert!((min - csv_min).abs() <= 5e-6 && (max - csv_max).abs() <= 5e-6, "status {min}..{max}, limits.csv {csv_min}..{csv_max}");
    assert_eq!(limit["excluded_bins"].as_u64().unwrap() as usize, excluded.len());
    assert_eq!(limit["confidence"].as_f64().unwrap(), 0.95);

    let text = Command::new(exe).args(["status", "--state"]).arg(&state_dir).output().unwrap();
    let text = String::from_utf8(text.stdout).unwrap();
    assert!(text.contains(&format!("|g_gamma| / KSVZ {min:.3} to {max:.3} over {} bins", excluded.len())), "{text}");
}

/// Every per-bin sum of two states over the union of their grids, as bits.
fn sums_bits(st: &State) -> Vec<Vec<u64>> {
    let s = whole(st);
    let wide = |v: &[u32]| v.iter().map(|&x| u64::from(x)).collect::<Vec<u64>>();
    let signed = |v: &[i32]| v.iter().map(|&x| x as u64).collect::<Vec<u64>>();
    vec![
        bits(&s.weight),
        bits(&s.weighted_sum),
        wide(&s.coverage),
        bits(&s.line_weight),
        bits(&s.line_weighted_sum),
        wide(&s.line_steps),
        signed(&s.line_night),
        signed(&s.line_if_bin),
        bits(&s.line_if_profile_sigma),
    ]
}

/// A night streamed block by block into a state staged in its folder (what `reduce --state`
/// does: the sums written as they are finished, the top samples set aside until the IF
/// profile is complete) gives the same bits as the same night reduced whole and then added
/// (what a shard merge does): sums, IF-line samples, grand spectrum of the span and tracked
/// candidates, over two nights of 400 steps (two blocks of the night's grid each) with an IF
/// line on part of the first, into states of 1000-bin blocks (so a night spans about 80 of
/// them, the night's blocks and the state's are not aligned, and runs above threshold sit
/// within a line width of tile edges). Before the save the staged
/// blocks are in the folder but `state.json` is not; after it, the folder holds exactly the
/// files `state.json` names.
#[test]
fn a_night_streamed_into_a_staged_state_equals_the_night_reduced_whole() {
    let plan = config::load(PIPELINE, "pipeline.toml").unwrap();
    let dir = tempfile::tempdir().unwrap();
    let mut sc = null_scenario(61);
    sc.scan.n_steps = 400;
    sc.scan.first_cavity_freq_hz = 5.2e9;
    sc.axion.push(Axion { freq_hz: 5.2021e9, coupling_rel_ksvz: 1.2 });
    sc.if_burst = BURST_IF_BINS.map(|if_bin| IfBurst { if_bin, power_rel: 0.045, first_step: 60, last_step: 71 }).collect();
    let first = dir.path().join("first.h5");
    sim::simulate(&sc, &first).unwrap();
    let second = night_of_steps(62, 5.2031e9, dir.path(), true, 400);
    let (streamed_dir, whole_dir) = (dir.path().join("streamed"), dir.path().join("whole"));
    for (k, n) in [first, second].iter().enumerate() {
        let load = |d: &Path| State::load(d).unwrap().unwrap_or_else(|| State::with_block_bins(state::plan_hash(&plan), 1000));
        let (mut streamed, mut whole_st) = (load(&streamed_dir), load(&whole_dir));
        streamed.stage_in(&streamed_dir).unwrap();
        let a = state::collecting_span(|out| state::add_night(&mut streamed, &plan, std::slice::from_ref(n), &|_, _| {}, out)).unwrap();
        let reduced = state::reduce_night(&plan, std::slice::from_ref(n)).unwrap();
        let b = state::collecting_span(|out| state::add_reduced_night(&mut whole_st, &plan, reduced, out)).unwrap();
        if k == 0 {
            assert!(!streamed.nights[0].if_lines.is_empty(), "the first night should show its IF line");
            assert!(!streamed_dir.join("state.json").exists());
            assert!(std::fs::read_dir(streamed_dir.join("blocks")).unwrap().count() >= 15, "staged blocks");
        }
        assert_eq!(sums_bits(&streamed), sums_bits(&whole_st), "night {k}");
        let (sa, sb) = (&a.reduction.spectrum, &b.reduction.spectrum);
        assert!(sa.grand.len() > 65536, "{} bins", sa.grand.len());
        assert_eq!((bits(&sa.grand), bits(&sa.amplitude), &sa.coverage), (bits(&sb.grand), bits(&sb.amplitude), &sb.coverage), "night {k}");
        assert_eq!((&sa.candidates, &a.changes), (&sb.candidates, &b.changes), "night {k}");
        assert_eq!(streamed.candidates.all().unwrap(), whole_st.candidates.all().unwrap(), "night {k}");
        assert_eq!(streamed.nights, whole_st.nights);
        if k == 1 {
            // Each earlier candidate the second night re-examined took the highest grand value
            // within a line width of it, here read from the whole span's values.
            let bw = sa.bin_width_hz;
            let reach = (a.match_hz / bw).ceil() as i64;
            let rechecked: Vec<_> = streamed.candidates.all().unwrap().iter().filter(|c| c.first_night == 0 && c.evidence.contains("night 1")).collect();
            assert!(rechecked.len() >= 3, "{} re-examined", rechecked.len());
            for c in rechecked {
                let centre = ((c.frequency_hz + bw / 2.0 - sa.rf_start_hz) / bw).round() as i64;
                let peak = (centre - reach..=centre + reach).map(|j| sa.grand[j as usize]).filter(|g| g.is_finite()).fold(f64::NEG_INFINITY, f64::max);
                assert_eq!(c.significance.to_bits(), peak.to_bits(), "{c:?}");
            }
        }
        streamed.save(&streamed_dir).unwrap();
        whole_st.save(&whole_dir).unwrap();
        let named: std::collections::BTreeSet<String> = streamed.blocks.iter().map(|b| format!("b{}-g{}.h5", b.index, b.generation)).collect();
        let present: std::collections::BTreeSet<String> =
            std::fs::read_dir(streamed_dir.join("blocks")).unwrap().map(|e| e.unwrap().file_name().to_string_lossy().into_owned()).collect();
        assert_eq!(named, present, "night {k}");
    }
    let interference = State::load(&streamed_dir).unwrap().unwrap().candidates.all().unwrap().iter().filter(|c| c.class == Class::Interference).count();
    assert!(interference > 0, "the IF line's candidates are interference");
}

/// Two updates of one state folder cannot interleave: while one holds the folder's update
/// lock, `reduce --state` is refused (exit status 2, naming the lock file) and changes
/// nothing; once the lock is released the same update goes through.
/// `axsift reduce --state STATE --out OUT NIGHT` with the default pipeline.
fn reduce_into_state(state_dir: &Path, out: &Path, night: &Path) -> std::process::Output {
    let config = concat!(env!("CARGO_MANIFEST_DIR"), "/pipeline.toml");
    Command::new(env!("CARGO_BIN_EXE_axsift"))
        .args(["-q", "reduce", "--config", config, "--state"])
        .arg(state_dir)
        .arg("--out")
        .arg(out)
        .arg(night)
        .env("HDF5_USE_FILE_LOCKING", "FALSE")
        .output()
        .unwrap()
}

#[test]
fn a_second_update_of_a_locked_state_is_refused() {
    let dir = tempfile::tempdir().unwrap();
    let n = night(91, 5.2e9, dir.path(), false);
    let state_dir = dir.path().join("state");
    let update = || reduce_into_state(&state_dir, &dir.path().join("out"), &n);
    let held = State::lock_folder(&state_dir).unwrap();
    let refused = update();
    let err = String::from_utf8_lossy(&refused.stderr);
    assert_eq!(refused.status.code(), Some(2), "{err}");
    assert!(err.contains(".lock") && err.contains("another axsift is updating this state"), "{err}");
    assert!(!state_dir.join("state.json").exists() && !state_dir.join("blocks").exists());
    drop(held);
    let done = update();
    assert!(done.status.success(), "{}", String::from_utf8_lossy(&done.stderr));
    assert_eq!(State::load(&state_dir).unwrap().unwrap().nights.len(), 1);
}

/// A run file added again through `reduce --state` (the night streamed into the state while
/// its files are hashed beside it) is refused before anything of it reaches the state: exit 2,
/// the message names the file and the night that holds it, and the state folder is unchanged
/// file for file.
#[test]
fn a_file_streamed_in_again_is_refused_and_changes_nothing() {
    let dir = tempfile::tempdir().unwrap();
    let n = night(92, 5.2e9, dir.path(), false);
    let state_dir = dir.path().join("state");
    let update = || reduce_into_state(&state_dir, &dir.path().join("out"), &n);
    let first = update();
    assert!(first.status.success(), "{}", String::from_utf8_lossy(&first.stderr));
    let snapshot = |root: &Path| -> Vec<(PathBuf, Vec<u8>)> {
        let mut files = Vec::new();
        let mut pending = vec![root.to_path_buf()];
        while let Some(d) = pending.pop() {
            for entry in std::fs::read_dir(&d).unwrap() {
                let path = entry.unwrap().path();
                if path.is_dir() {
                    pending.push(path);
                } else {
                    files.push((path.clone(), std::fs::read(&path).unwrap()));
                }
            }
        }
        files.sort();
        files
    };
    let before = snapshot(&state_dir);
    let again = update();
    let err = String::from_utf8_lossy(&again.stderr);
    assert_eq!(again.status.code(), Some(2), "{err}");
    assert!(err.contains("already in the state") && err.contains("night-92.h5") && err.contains("night 0"), "{err}");
    assert!(snapshot(&state_dir) == before, "the refused update changed the state folder");
}

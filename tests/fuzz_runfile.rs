//! Property-based fuzzing of the run-file reader: small HDF5 files generated with random
//! structure (attributes, shapes, types and values, each present, absent or wrong), and
//! byte-level mutations (flips, overwrites, truncations, insertions) of a valid file, reduced
//! by the command line in a child process each. Nothing may panic: a file is read, or
//! refused with a message naming it. A mutated file may not crash or hang the HDF5 library
//! either: the writer uses the checksummed 1.10 format and no variable-length strings, so
//! damaged metadata is detected instead of followed.
//!
//! Case counts are fixed (see `CASES_*`) so the suite stays well under a minute in
//! `cargo test --release` on two cores; each test prints how many cases ran.

use axsift::pipeline;
use axsift::runfile::RunReader;
use axsift::sim::{self, Scenario};
use hdf5::types::{FixedAscii, TypeDescriptor, VarLenUnicode};
use proptest::prelude::*;
use proptest::test_runner::{Config, TestRunner};
use std::path::Path;
use std::sync::atomic::{AtomicUsize, Ordering};

const DEMO_SCENARIO: &str = include_str!("../fixtures/demo_night.toml");
const CASES_GENERATED: u32 = 600;
const CASES_MUTATED: u32 = 300;

/// HDF5 opens files without close-on-exec: a child started while the other test has a file
/// open would inherit (and keep locked) that file. File work and child runs take turns.
static FILES: std::sync::Mutex<()> = std::sync::Mutex::new(());

fn files() -> std::sync::MutexGuard<'static, ()> {
    FILES.lock().unwrap_or_else(|e| e.into_inner())
}

/// A runner for `cases` cases, times `AXSIFT_FUZZ_FACTOR` when that is set (a longer run by
/// hand: `AXSIFT_FUZZ_FACTOR=20 cargo test --release --test fuzz_runfile`).
fn runner(cases: u32) -> TestRunner {
    TestRunner::new(Config { cases: cases * fuzz_factor(), failure_persistence: None, max_shrink_iters: 100, ..Config::default() })
}

fn fuzz_factor() -> u32 {
    std::env::var("AXSIFT_FUZZ_FACTOR").ok().and_then(|v| v.parse().ok()).filter(|&f| f > 0).unwrap_or(1)
}

/// Opens `path` and, if it opens, reads every row and opens it as a night.
/// Returns whether the file was accepted.
fn exercise(path: &Path) -> Result<bool, TestCaseError> {
    let name = path.file_name().unwrap().to_string_lossy().into_owned();
    match RunReader::open(path) {
        Err(e) => {
            let msg = e.to_string();
            prop_assert!(msg.contains(&name), "message does not name the file: {}", msg);
            Ok(false)
        }
        Ok(r) => {
            let n = r.steps().len();
            for start in (0..n).step_by(5) {
                if let Ok(rows) = r.read_rows(start..(start + 5).min(n)) {
                    prop_assert_eq!(rows.ncols(), r.n_bins());
                }
            }
            drop(r);
            let _ = pipeline::open_night(&[path.to_path_buf()]);
            Ok(true)
        }
    }
}

// ---------------------------------------------------------------------------------------
// Generated files

/// A value to store in a numeric slot: mostly sensible, sometimes not.
fn number() -> impl Strategy<Value = f64> {
    prop_oneof![
        6 => 1.0f64..1.0e10,
        1 => Just(0.0),
        1 => Just(-1.0),
        1 => Just(f64::NAN),
        1 => Just(f64::INFINITY),
        1 => any::<f64>(),
    ]
}

/// How one attribute is stored.
#[derive(Debug, Clone)]
enum Attr {
    Missing,
    Number(f64),
    Integer(i64),
    Text(String),
    /// A fixed-length ASCII string sized to the text (as other writers store strings).
    FixedText(String),
    Array(Vec<f64>),
}

fn attr(good: Attr) -> impl Strategy<Value = Attr> {
    prop_oneof![
        95 => Just(good),
        1 => Just(Attr::Missing),
        1 => number().prop_map(Attr::Number),
        1 => any::<i64>().prop_map(Attr::Integer),
        1 => "[a-z-]{0,12}".prop_map(Attr::Text),
        1 => "[a-z-]{0,12}".prop_map(Attr::FixedText),
        1 => proptest::collection::vec(number(), 0..3).prop_map(Attr::Array),
    ]
}

/// How one dataset is stored.
#[derive(Debug, Clone)]
enum Data {
    Missing,
    F32(Vec<usize>, Vec<f32>),
    F64(Vec<usize>, Vec<f64>),
    I32(Vec<usize>),
    U8(Vec<usize>),
    Text(usize),
    /// Declared but never written (chunked), any shape.
    Hollow(Vec<usize>),
}

fn shape_near(rows: usize, cols: Option<usize>) -> impl Strategy<Value = Vec<usize>> {
    let exact = match cols {
        Some(c) => vec![rows, c],
        None => vec![rows],
    };
    prop_oneof![
        60 => Just(exact),
        1 => proptest::collection::vec(0usize..40, 0..4),
        1 => Just(vec![rows + 1, cols.unwrap_or(1)]),
    ]
}

/// A dataset of `rows` (x `cols`) values; `good` is the usual type (0 f32, 1 f64, 2 u8).
fn data(rows: usize, cols: Option<usize>, good: u8) -> impl Strategy<Value = Data> {
    (shape_near(rows, cols), 0u8..100, proptest::option::weighted(0.04, number())).prop_map(move |(shape, pick, bad)| {
        let len: usize = shape.iter().product();
        // Increasing values (valid frequencies, counts and times), one of them maybe bad.
        let fill = |x: f64| (0..len).map(|i| if i == len / 2 { bad.unwrap_or(x + i as f64) } else { x + i as f64 }).collect::<Vec<f64>>();
        match (pick, good) {
            (0, _) => Data::Missing,
            (1, _) => Data::I32(shape),
            (2, _) => Data::Text(len),
            (3, _) => Data::Hollow(if shape.is_empty() { vec![1 << 20] } else { shape.iter().map(|d| d * 1000 + 1).collect() }),
            (4..=6, _) | (_, 1) => Data::F64(shape, fill(1.0e9)),
            (_, 2) => Data::U8(shape),
            _ => Data::F32(shape, fill(1.0).into_iter().map(|x| x as f32).collect()),
        }
    })
}

#[derive(Debug, Clone)]
struct FileSpec {
    attrs: Vec<(&'static str, Attr)>,
    spectra: Data,
    mask: Option<Data>,
    has_steps: bool,
    columns: Vec<(&'static str, Data)>,
}

const COLUMNS: [&str; 7] = ["start_freq_hz", "cavity_freq_hz", "loaded_q", "coupling_beta", "noise_temp_k", "n_averages", "timestamp_s"];

fn file_spec() -> impl Strategy<Value = FileSpec> {
    (1usize..12, 16usize..80).prop_flat_map(|(rows, cols)| {
        let text = |s: &str| prop_oneof![attr(Attr::Text(s.into())), attr(Attr::FixedText(s.into()))];
        let attrs = (
            text("axsift-run"),
            attr(Attr::Integer(1)),
            attr(Attr::Number(100.0)),
            attr(Attr::Number(8.0)),
            attr(Attr::Number(0.02)),
            attr(Attr::Number(0.45)),
            text("fuzz"),
        )
            .prop_map(|(a, b, c, d, e, f, g)| {
                vec![
                    ("format", a),
                    ("format_version", b),
                    ("bin_width_hz", c),
                    ("magnet_field_t", d),
                    ("cavity_volume_m3", e),
                    ("form_factor", f),
                    ("run_label", g),
                ]
            });
        let columns = proptest::collection::vec(data(rows, None, 1), 7).prop_map(|d| COLUMNS.iter().copied().zip(d).collect::<Vec<_>>());
        (attrs, data(rows, Some(cols), 0), proptest::option::weighted(0.2, data(rows, Some(cols), 2)), proptest::bool::weighted(0.98), columns)
            .prop_map(|(attrs, spectra, mask, has_steps, columns)| FileSpec { attrs, spectra, mask, has_steps, columns })
    })
}

fn write_attr(file: &hdf5::File, name: &str, a: &Attr) -> hdf5::Result<()> {
    match a {
        Attr::Missing => Ok(()),
        Attr::Number(v) => file.new_attr::<f64>().create(name)?.write_scalar(v),
        Attr::Integer(v) => file.new_attr::<i64>().create(name)?.write_scalar(v),
        Attr::Text(s) => file.new_attr::<VarLenUnicode>().create(name)?.write_scalar(&s.parse::<VarLenUnicode>().unwrap()),
        Attr::FixedText(s) => file
            .new_attr_builder()
            .empty_as(TypeDescriptor::FixedAscii(s.len().max(1)))
            .create(name)?
            .write_scalar(&FixedAscii::<64>::from_ascii(s.as_str()).map_err(|e| e.to_string())?),
        Attr::Array(v) => file.new_attr_builder().with_data(v.as_slice()).create(name).map(|_| ()),
    }
}

fn write_data(group: &hdf5::Group, name: &str, d: &Data) -> hdf5::Result<()> {
    match d {
        Data::Missing => Ok(()),
        Data::F32(shape, v) => group.new_dataset::<f32>().shape(shape.as_slice()).create(name)?.write_raw(v),
        Data::F64(shape, v) => group.new_dataset::<f64>().shape(shape.as_slice()).create(name)?.write_raw(v),
        Data::I32(shape) => {
            let len: usize = shape.iter().product();
            group.new_dataset::<i32>().shape(shape.as_slice()).create(name)?.write_raw(&vec![1i32; len])
        }
        Data::U8(shape) => {
            let len: usize = shape.iter().product();
            group.new_dataset::<u8>().shape(shape.as_slice()).create(name)?.write_raw(&(0..len).map(|i| (i % 5 == 0) as u8).collect::<Vec<u8>>())
        }
        Data::Text(len) => {
            let v: Vec<VarLenUnicode> = (0..*len).map(|_| "x".parse().unwrap()).collect();
            group.new_dataset_builder().with_data(&v).create(name).map(|_| ())
        }
        Data::Hollow(shape) => {
            let chunk: Vec<usize> = shape.iter().map(|&d| d.clamp(1, 64)).collect();
            group.new_dataset::<f32>().shape(shape.as_slice()).chunk(chunk.as_slice()).create(name).map(|_| ())
        }
    }
}

fn write_spec(path: &Path, spec: &FileSpec) -> hdf5::Result<()> {
    let file = hdf5::File::create(path)?;
    for (name, a) in &spec.attrs {
        write_attr(&file, name, a)?;
    }
    write_data(&file, "spectra", &spec.spectra)?;
    if let Some(m) = &spec.mask {
        write_data(&file, "mask", m)?;
    }
    if spec.has_steps {
        let g = file.create_group("steps")?;
        for (name, d) in &spec.columns {
            write_data(&g, name, d)?;
        }
    }
    file.close()
}

#[test]
fn generated_files_never_panic() {
    let dir = tempfile::tempdir().unwrap();
    let path = dir.path().join("generated.h5");
    let (count, written, accepted) = (AtomicUsize::new(0), AtomicUsize::new(0), AtomicUsize::new(0));
    runner(CASES_GENERATED)
        .run(&file_spec(), |spec| {
            let _files = files();
            count.fetch_add(1, Ordering::Relaxed);
            let _ = std::fs::remove_file(&path);
            // Some generated layouts are refused by HDF5 itself when writing; skip those.
            if write_spec(&path, &spec).is_err() {
                return Ok(());
            }
            written.fetch_add(1, Ordering::Relaxed);
            if exercise(&path)? {
                accepted.fetch_add(1, Ordering::Relaxed);
            }
            Ok(())
        })
        .unwrap();
    let (n, w, a) = (count.load(Ordering::Relaxed), written.load(Ordering::Relaxed), accepted.load(Ordering::Relaxed));
    eprintln!("fuzz_runfile generated: {n} cases, {w} written, {a} accepted by the reader");
    assert_eq!(n, (CASES_GENERATED * fuzz_factor()) as usize);
    assert!(w > n / 2, "only {w} of {n} files could be written");
    assert!(a > 0 && a < w, "the generator must produce both good and bad files ({a} of {w} accepted)");
}

// ---------------------------------------------------------------------------------------
// Byte-level mutations of a valid file

#[derive(Debug, Clone)]
enum ByteEdit {
    Flip(f64, u8),
    Overwrite(f64, Vec<u8>),
    Truncate(f64),
    Insert(f64, Vec<u8>),
    /// Overwrite inside the first 4 KiB, where the superblock and metadata live.
    Header(usize, u8),
}

fn byte_edit() -> impl Strategy<Value = ByteEdit> {
    prop_oneof![
        4 => (0.0..1.0, 1u8..=255).prop_map(|(at, x)| ByteEdit::Flip(at, x)),
        2 => (0.0..1.0, proptest::collection::vec(any::<u8>(), 1..64)).prop_map(|(at, b)| ByteEdit::Overwrite(at, b)),
        1 => (0.0..1.0).prop_map(ByteEdit::Truncate),
        1 => (0.0..1.0, proptest::collection::vec(any::<u8>(), 1..16)).prop_map(|(at, b)| ByteEdit::Insert(at, b)),
        4 => (0usize..4096, any::<u8>()).prop_map(|(at, x)| ByteEdit::Header(at, x)),
    ]
}

fn mutate(bytes: &mut Vec<u8>, e: &ByteEdit) {
    let at = |f: f64, len: usize| ((len as f64 * f) as usize).min(len.saturating_sub(1));
    match e {
        ByteEdit::Flip(f, x) => {
            // A file truncated to nothing by an earlier edit has no byte to flip.
            let i = at(*f, bytes.len());
            if let Some(byte) = bytes.get_mut(i) {
                *byte ^= x;
            }
        }
        ByteEdit::Overwrite(f, b) => {
            let i = at(*f, bytes.len());
            for (k, v) in b.iter().enumerate() {
                if let Some(slot) = bytes.get_mut(i + k) {
                    *slot = *v;
                }
            }
        }
        ByteEdit::Truncate(f) => bytes.truncate(at(*f, bytes.len())),
        ByteEdit::Insert(f, b) => {
            let i = at(*f, bytes.len());
            bytes.splice(i..i, b.iter().copied());
        }
        ByteEdit::Header(i, x) => {
            if let Some(slot) = bytes.get_mut(*i) {
                *slot = *x;
            }
        }
    }
}

/// A pipeline whose Savitzky-Golay window fits the mutated file's 64 bins.
fn small_pipeline() -> String {
    include_str!("../pipeline.toml").replacen("window_bins = 401", "window_bins = 31", 1)
}

/// How a child `axsift reduce` ended.
#[derive(Debug, Clone, Copy, PartialEq)]
enum Outcome {
    /// Exit 0.
    Reduced,
    /// Exit 2: the file was refused as bad input.
    Refused,
    /// Exit 1: the file was read but the reduction could not finish (e.g. no valid power).
    Failed,
    /// Exit 101: a Rust panic.
    Panicked,
    /// Killed by a signal (a crash inside the HDF5 C library).
    Crashed,
    /// Still running after [`CHILD_TIMEOUT`] (a loop inside the HDF5 C library), then killed.
    Hung,
}

/// Longest a child may run before it counts as hung. Most runs take well under 1 s, but a
/// mutated start frequency can spread 12 steps over an RF grid close to the accepted maximum
/// (`runfile::MAX_RF_BINS`, 2^25 bins), which is then reduced in earnest: a mutation giving
/// 22.7 M RF bins took 6.8 s on the 2-core machine. The limit leaves room for the largest grid
/// on a loaded machine.
const CHILD_TIMEOUT: std::time::Duration = std::time::Duration::from_secs(60);

fn reduce_in_child(config: &Path, run: &Path, out: &Path) -> (Outcome, String) {
    use std::io::Read;
    let _files = files();
    let mut child = std::process::Command::new(env!("CARGO_BIN_EXE_axsift"))
        .args(["--quiet", "reduce", "--config"])
        .arg(config)
        .arg("--out")
        .arg(out)
        .arg(run)
        .stdout(std::process::Stdio::null())
        .stderr(std::process::Stdio::piped())
        .spawn()
        .expect("axsift starts");
    let started = std::time::Instant::now();
    let status = loop {
        if let Some(status) = child.try_wait().expect("child status") {
            break Some(status);
        }
        if started.elapsed() > CHILD_TIMEOUT {
            let _ = child.kill();
            let _ = child.wait();
            break None;
        }
        std::thread::sleep(std::time::Duration::from_millis(2));
    };
    let mut raw = Vec::new();
    if let Some(mut e) = child.stderr.take() {
        let _ = e.read_to_end(&mut raw);
    }
    let stderr = String::from_utf8_lossy(&raw).into_owned();
    let outcome = match status.map(|s| s.code()) {
        None => Outcome::Hung,
        Some(Some(0)) => Outcome::Reduced,
        Some(Some(2)) => Outcome::Refused,
        Some(Some(1)) => Outcome::Failed,
        Some(Some(101)) => Outcome::Panicked,
        Some(_) => Outcome::Crashed,
    };
    (outcome, stderr)
}

/// Byte mutations of a valid file, each reduced by the command line in its own process, so
/// that a crash or endless loop inside the HDF5 C library (which no Rust code can catch) is
/// counted and reported instead of ending or stalling the test run. A Rust panic (exit 101),
/// a refusal that does not name the file, a crash or a hang fail the test; the inputs that
/// crashed or hung are kept, and the failure lists them with their edits.
#[test]
fn mutated_files_never_panic() {
    let dir = tempfile::tempdir().unwrap();
    let good = dir.path().join("good.h5");
    let mut sc = Scenario::from_toml(DEMO_SCENARIO).unwrap();
    sc.scan.n_steps = 12;
    sc.scan.n_bins = 64;
    sc.scan.step_bins = 16;
    {
        let _files = files();
        sim::simulate(&sc, &good).unwrap();
    }
    let config = dir.path().join("pipeline.toml");
    std::fs::write(&config, small_pipeline()).unwrap();
    let out = dir.path().join("out");
    assert_eq!(reduce_in_child(&config, &good, &out).0, Outcome::Reduced, "the unmutated file must reduce");
    let original = std::fs::read(&good).unwrap();
    let path = dir.path().join("mutated.h5");
    let crashes_dir = std::env::temp_dir().join("axsift-fuzz-crashes");
    let tally = std::sync::Mutex::new([0usize; 6]);
    let kept = std::sync::Mutex::new(Vec::<String>::new());
    runner(CASES_MUTATED)
        .run(&proptest::collection::vec(byte_edit(), 1..5), |edits| {
            let mut bytes = original.clone();
            for e in &edits {
                mutate(&mut bytes, e);
            }
            std::fs::write(&path, &bytes).unwrap();
            let (outcome, stderr) = reduce_in_child(&config, &path, &out);
            prop_assert!(outcome != Outcome::Panicked, "panic on {:?}:\n{}", edits, stderr);
            if outcome == Outcome::Refused {
                prop_assert!(stderr.contains("mutated.h5"), "refusal does not name the file: {}", stderr);
            }
            if outcome == Outcome::Crashed || outcome == Outcome::Hung {
                let n = tally.lock().unwrap()[outcome as usize];
                let _ = std::fs::create_dir_all(&crashes_dir);
                let file = crashes_dir.join(format!("{outcome:?}-{}-{n}.h5", std::process::id()).to_lowercase());
                let _ = std::fs::write(&file, &bytes);
                kept.lock().unwrap().push(format!("{outcome:?}: {} from edits {edits:?}", file.display()));
            }
            tally.lock().unwrap()[outcome as usize] += 1;
            Ok(())
        })
        .unwrap();
    let [reduced, refused, failed, panicked, crashed, hung] = *tally.lock().unwrap();
    let n = reduced + refused + failed + panicked + crashed + hung;
    eprintln!(
        "fuzz_runfile mutated: {n} cases through `axsift reduce`: {reduced} reduced, {refused} refused naming the file, {failed} read but not reducible, {panicked} panics, {crashed} crashes and {hung} hangs inside the HDF5 library{}",
        if crashed + hung > 0 { format!(" (inputs kept in {})", crashes_dir.display()) } else { String::new() }
    );
    assert_eq!(n, (CASES_MUTATED * fuzz_factor()) as usize);
    assert_eq!(panicked, 0);
    assert!(crashed + hung == 0, "the HDF5 library crashed or hung on mutated files:\n{}", kept.lock().unwrap().join("\n"));
    assert!(refused > 0, "no mutation was refused: the mutations did not reach the file's structure");
}

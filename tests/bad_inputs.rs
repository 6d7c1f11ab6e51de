//! Bad inputs, one test each: broken run files, inconsistent nights and faulty pipeline
//! files. Every test asserts that the error names the right place (file, step, field,
//! stage, key, line and column) and that nothing panics. Also: "no data" bins propagate as
//! coverage gaps, and a failed run leaves earlier results untouched.

use axsift::config;
use axsift::pipeline::{self, ReduceError};
use axsift::runfile::RunReader;
use axsift::sim::{self, Scenario};
use std::path::{Path, PathBuf};
use std::sync::{RwLock, RwLockReadGuard, RwLockWriteGuard};

const DEMO_SCENARIO: &str = include_str!("../fixtures/demo_night.toml");
const PIPELINE: &str = include_str!("../pipeline.toml");

// ---------------------------------------------------------------------------------------
// Helpers

/// HDF5 opens files without close-on-exec, so a child process started by one test inherits
/// the locked files other tests are writing at that moment. Tests that touch files share
/// this lock; the one that starts the command line takes it alone.
static FILES: RwLock<()> = RwLock::new(());

fn files() -> RwLockReadGuard<'static, ()> {
    FILES.read().unwrap_or_else(|e| e.into_inner())
}

fn files_alone() -> RwLockWriteGuard<'static, ()> {
    FILES.write().unwrap_or_else(|e| e.into_inner())
}

/// A small, clean night: 24 steps of 1024 bins, moving 200 bins per step, no signals.
fn small_scenario(seed: u64) -> Scenario {
    let mut sc = Scenario::from_toml(DEMO_SCENARIO).expect("demo scenario parses");
    sc.seed = seed;
    sc.scan.n_steps = 24;
    sc.scan.n_bins = 1024;
    sc.scan.step_bins = 200;
    sc.axion.clear();
    sc.interference.clear();
    sc
}

fn write_night(dir: &Path, name: &str, sc: &Scenario) -> PathBuf {
    let path = dir.join(name);
    sim::simulate(sc, &path).expect("simulation writes");
    path
}

/// A valid run file in a fresh temporary folder.
fn good_file(name: &str) -> (tempfile::TempDir, PathBuf) {
    let dir = tempfile::tempdir().unwrap();
    let path = write_night(dir.path(), name, &small_scenario(3));
    (dir, path)
}

/// Opens `path` read-write and applies `f`.
fn patch(path: &Path, f: impl FnOnce(&hdf5::File) -> hdf5::Result<()>) {
    let file = hdf5::File::open_rw(path).expect("open for patching");
    f(&file).expect("patch applies");
    file.close().unwrap();
}

fn set_attr_f64(file: &hdf5::File, name: &str, v: f64) -> hdf5::Result<()> {
    file.delete_attr(name)?;
    file.new_attr::<f64>().create(name)?.write_scalar(&v)
}

fn set_attr_str(file: &hdf5::File, name: &str, v: &str) -> hdf5::Result<()> {
    file.delete_attr(name)?;
    let s: hdf5::types::VarLenUnicode = v.parse().unwrap();
    file.new_attr::<hdf5::types::VarLenUnicode>().create(name)?.write_scalar(&s)
}

/// Replaces `steps/<name>` by `f` applied to its values.
fn edit_column(file: &hdf5::File, name: &str, f: impl FnOnce(&mut Vec<f64>)) -> hdf5::Result<()> {
    let g = file.group("steps")?;
    let mut v = g.dataset(name)?.read_raw::<f64>()?;
    f(&mut v);
    g.unlink(name)?;
    g.new_dataset_builder().with_data(&v).create(name)?;
    Ok(())
}

fn replace_dataset<T: hdf5::H5Type>(file: &hdf5::File, name: &str, data: &[T]) -> hdf5::Result<()> {
    file.unlink(name)?;
    file.new_dataset_builder().with_data(data).create(name)?;
    Ok(())
}

fn open_error(path: &Path) -> String {
    match RunReader::open(path) {
        Ok(_) => panic!("{} opened without error", path.display()),
        Err(e) => e.to_string(),
    }
}

fn assert_names(msg: &str, parts: &[&str]) {
    for p in parts {
        assert!(msg.contains(p), "message does not name {p:?}:\n{msg}");
    }
}

/// A file patched by `f` must fail to open with a message naming the file and `parts`.
fn bad_file(name: &str, f: impl FnOnce(&hdf5::File) -> hdf5::Result<()>, parts: &[&str]) {
    let _files = files();
    let (_dir, path) = good_file(name);
    patch(&path, f);
    let msg = open_error(&path);
    assert_names(&msg, &[name]);
    assert_names(&msg, parts);
}

fn night_error(paths: &[PathBuf]) -> String {
    match pipeline::open_night(paths) {
        Ok(_) => panic!("night opened without error"),
        Err(e) => e.to_string(),
    }
}

fn config_error(text: &str) -> Vec<String> {
    match config::load(text, "night.toml") {
        Ok(_) => panic!("pipeline loaded without error:\n{text}"),
        Err(e) => {
            assert!(e.to_string().starts_with("night.toml: "), "{e}");
            e.problems
        }
    }
}

/// The default pipeline with `from` replaced by `to` (which must occur).
fn pipeline_with(from: &str, to: &str) -> String {
    assert!(PIPELINE.contains(from), "pipeline.toml has no {from:?}");
    PIPELINE.replacen(from, to, 1)
}

/// 1-based line of the first occurrence of `needle` in `text`.
fn line_of(text: &str, needle: &str) -> usize {
    text[..text.find(needle).expect("needle present")].matches('\n').count() + 1
}

/// The only problem, which must start with `line L, column C:` and contain `parts`.
fn one_problem(text: &str, line: usize, column: usize, parts: &[&str]) {
    let problems = config_error(text);
    assert_eq!(problems.len(), 1, "{problems:#?}");
    let at = format!("line {line}, column {column}: ");
    assert!(problems[0].starts_with(&at), "expected {at:?}:\n{}", problems[0]);
    assert_names(&problems[0], parts);
}

// ---------------------------------------------------------------------------------------
// Run files: the file itself

#[test]
fn missing_file() {
    let _files = files();
    let dir = tempfile::tempdir().unwrap();
    let msg = open_error(&dir.path().join("absent.h5"));
    assert_names(&msg, &["absent.h5", "does not exist"]);
}

#[test]
fn empty_file() {
    let _files = files();
    let dir = tempfile::tempdir().unwrap();
    let p = dir.path().join("zero.h5");
    std::fs::write(&p, b"").unwrap();
    assert_names(&open_error(&p), &["zero.h5", "empty"]);
}

#[test]
fn file_that_is_not_hdf5() {
    let _files = files();
    let dir = tempfile::tempdir().unwrap();
    let p = dir.path().join("notes.h5");
    std::fs::write(&p, "step,freq\n0,5.2e9\n".repeat(100)).unwrap();
    assert_names(&open_error(&p), &["notes.h5", "not an HDF5 file"]);
}

#[test]
fn truncated_file() {
    let _files = files();
    let (_dir, path) = good_file("cut.h5");
    let bytes = std::fs::read(&path).unwrap();
    std::fs::write(&path, &bytes[..bytes.len() / 2]).unwrap();
    assert_names(&open_error(&path), &["cut.h5", "truncated or corrupted"]);
}

#[test]
fn corrupted_superblock() {
    let _files = files();
    let (_dir, path) = good_file("garbled.h5");
    let mut bytes = std::fs::read(&path).unwrap();
    for b in &mut bytes[8..96] {
        *b = 0xA5;
    }
    std::fs::write(&path, &bytes).unwrap();
    assert_names(&open_error(&path), &["garbled.h5", "truncated or corrupted"]);
}

#[test]
fn corrupted_spectrum_chunk_is_an_error_naming_the_steps() {
    let _files = files();
    let (_dir, path) = good_file("chunk.h5");
    // Locate spectra's first chunk by its first stored values, then make the chunk's
    // neighbour region unreadable by cutting the file right after the metadata.
    let reader = RunReader::open(&path).expect("good file opens");
    let rows = reader.read_rows(0..2).expect("good rows read");
    assert_eq!(rows.shape(), &[2, 1024]);
    drop(reader);
    let bytes = std::fs::read(&path).unwrap();
    let first = rows[[0, 0]] as f32;
    let pos = bytes.windows(4).position(|w| w == first.to_le_bytes()).expect("first value stored as f32 LE");
    let mut cut = bytes.clone();
    cut.truncate(pos + 100);
    std::fs::write(&path, &cut).unwrap();
    let msg = match RunReader::open(&path) {
        Err(e) => e.to_string(),
        Ok(r) => r.read_rows(0..24).expect_err("rows of a cut file must not read").to_string(),
    };
    assert_names(&msg, &["chunk.h5"]);
    assert!(msg.contains("truncated or corrupted") || msg.contains("steps 0..24"), "{msg}");
}

// ---------------------------------------------------------------------------------------
// Run files: root attributes

#[test]
fn missing_attribute() {
    bad_file("a.h5", |f| f.delete_attr("bin_width_hz"), &["field `bin_width_hz`", "attribute is missing"]);
}

#[test]
fn wrong_format_name() {
    bad_file("fmt.h5", |f| set_attr_str(f, "format", "someone-else"), &["field `format`", "someone-else", "axsift-run"]);
}

#[test]
fn unsupported_format_version() {
    bad_file("ver.h5", |f| set_attr_f64(f, "format_version", 2.0), &["field `format_version`", "is 2"]);
}

#[test]
fn nan_bin_width() {
    bad_file("bw.h5", |f| set_attr_f64(f, "bin_width_hz", f64::NAN), &["field `bin_width_hz`", "NaN", "finite and > 0"]);
}

fn set_bin_correlation(file: &hdf5::File, values: &[f64]) -> hdf5::Result<()> {
    file.new_attr::<f64>().shape(values.len()).create("bin_correlation")?.write_raw(values)
}

#[test]
fn bin_correlation_outside_minus_one_to_one_or_too_long() {
    bad_file("rho.h5", |f| set_bin_correlation(f, &[0.4, 1.5]), &["field `bin_correlation`", "lag 2", "1.5", "[-1, 1]"]);
    bad_file("rho-nan.h5", |f| set_bin_correlation(f, &[f64::NAN]), &["field `bin_correlation`", "lag 1", "NaN"]);
    bad_file("rho-long.h5", |f| set_bin_correlation(f, &[0.0; 300]), &["field `bin_correlation`", "at most 256"]);
}

#[test]
fn negative_magnet_field() {
    bad_file("b.h5", |f| set_attr_f64(f, "magnet_field_t", -8.0), &["field `magnet_field_t`", "-8"]);
}

#[test]
fn zero_cavity_volume() {
    bad_file("v.h5", |f| set_attr_f64(f, "cavity_volume_m3", 0.0), &["field `cavity_volume_m3`", "is 0"]);
}

#[test]
fn infinite_form_factor() {
    bad_file("c.h5", |f| set_attr_f64(f, "form_factor", f64::INFINITY), &["field `form_factor`", "inf"]);
}

#[test]
fn form_factor_above_one() {
    bad_file("c1.h5", |f| set_attr_f64(f, "form_factor", 1.5), &["field `form_factor`", "at most 1"]);
}

#[test]
fn attribute_of_the_wrong_type() {
    bad_file("t.h5", |f| set_attr_str(f, "bin_width_hz", "100 Hz"), &["field `bin_width_hz`", "is a string, expected a number"]);
}

#[test]
fn label_that_is_a_number() {
    bad_file(
        "lab.h5",
        |f| {
            f.delete_attr("run_label")?;
            f.new_attr::<f64>().create("run_label")?.write_scalar(&3.0)
        },
        &["field `run_label`", "expected a variable-length string"],
    );
}

// ---------------------------------------------------------------------------------------
// Run files: spectra and mask

#[test]
fn missing_spectra() {
    bad_file("s.h5", |f| f.unlink("spectra"), &["field `spectra`", "missing"]);
}

#[test]
fn spectra_with_one_dimension() {
    bad_file("s1.h5", |f| replace_dataset(f, "spectra", &vec![1.0f32; 24 * 1024]), &["field `spectra`", "1 dimensions"]);
}

#[test]
fn spectra_of_integers() {
    bad_file(
        "si.h5",
        |f| {
            f.unlink("spectra")?;
            f.new_dataset::<i32>().shape((24, 1024)).create("spectra")?.write(&ndarray::Array2::<i32>::ones((24, 1024)))
        },
        &["field `spectra`", "32-bit signed integer", "expected 32- or 64-bit floats"],
    );
}

#[test]
fn absurd_declared_shape_is_refused_before_reading() {
    bad_file(
        "huge.h5",
        |f| {
            f.unlink("spectra")?;
            f.new_dataset::<f32>().shape((24, 1usize << 30)).chunk((1, 1024)).create("spectra").map(|_| ())
        },
        &["field `spectra`", "shape [24, 1073741824] is outside"],
    );
}

#[test]
fn declared_but_unwritten_spectra_are_refused() {
    bad_file(
        "hollow.h5",
        |f| {
            f.unlink("spectra")?;
            f.new_dataset::<f32>().shape((24, 1usize << 20)).chunk((1, 1024)).create("spectra").map(|_| ())
        },
        &["field `spectra`", "bytes are stored"],
    );
}

#[test]
fn mask_of_the_wrong_shape() {
    bad_file("m.h5", |f| f.new_dataset_builder().with_data(&vec![0u8; 10]).create("mask").map(|_| ()), &["field `mask`", "differs from spectra"]);
}

#[test]
fn mask_of_floats() {
    bad_file(
        "mf.h5",
        |f| f.new_dataset::<f64>().shape((24, 1024)).create("mask")?.write(&ndarray::Array2::<f64>::zeros((24, 1024))),
        &["field `mask`", "64-bit float", "expected u8 flags"],
    );
}

// ---------------------------------------------------------------------------------------
// Run files: per-step metadata

#[test]
fn missing_steps_group() {
    bad_file("g.h5", |f| f.unlink("steps"), &["field `steps`", "group is missing"]);
}

#[test]
fn missing_step_column() {
    bad_file("q.h5", |f| f.group("steps")?.unlink("loaded_q"), &["field `steps/loaded_q`", "dataset is missing"]);
}

#[test]
fn step_column_of_the_wrong_length() {
    bad_file("len.h5", |f| edit_column(f, "noise_temp_k", |v| v.truncate(20)), &["field `steps/noise_temp_k`", "shape [20]", "expected [24]"]);
}

#[test]
fn step_column_of_strings() {
    bad_file(
        "str.h5",
        |f| {
            let g = f.group("steps")?;
            g.unlink("cavity_freq_hz")?;
            let s: Vec<hdf5::types::VarLenUnicode> = (0..24).map(|_| "5.2 GHz".parse().unwrap()).collect();
            g.new_dataset_builder().with_data(&s).create("cavity_freq_hz").map(|_| ())
        },
        &["field `steps/cavity_freq_hz`", "is a string, expected numbers"],
    );
}

#[test]
fn nan_loaded_q() {
    bad_file("nq.h5", |f| edit_column(f, "loaded_q", |v| v[5] = f64::NAN), &["field `steps/loaded_q`, step 5", "NaN", "not a finite number"]);
}

#[test]
fn negative_coupling() {
    bad_file("nb.h5", |f| edit_column(f, "coupling_beta", |v| v[3] = -2.0), &["field `steps/coupling_beta`, step 3", "-2 must be > 0"]);
}

#[test]
fn infinite_noise_temperature() {
    bad_file("nt.h5", |f| edit_column(f, "noise_temp_k", |v| v[2] = f64::INFINITY), &["field `steps/noise_temp_k`, step 2", "inf"]);
}

#[test]
fn zero_start_frequency() {
    bad_file("f0.h5", |f| edit_column(f, "start_freq_hz", |v| v[0] = 0.0), &["field `steps/start_freq_hz`, step 0", "0 must be > 0"]);
}

#[test]
fn zero_averages() {
    bad_file("n0.h5", |f| edit_column(f, "n_averages", |v| v[4] = 0.0), &["field `steps/n_averages`, step 4", "whole number >= 1"]);
}

#[test]
fn fractional_averages() {
    bad_file("nf.h5", |f| edit_column(f, "n_averages", |v| v[1] = 2.5), &["field `steps/n_averages`, step 1", "2.5"]);
}

#[test]
fn duplicate_step() {
    bad_file("dup.h5", |f| edit_column(f, "timestamp_s", |v| v[7] = v[6]), &["field `steps/timestamp_s`, step 7", "equals step 6's", "duplicate step"]);
}

#[test]
fn unsorted_steps() {
    bad_file(
        "order.h5",
        |f| edit_column(f, "timestamp_s", |v| v.swap(9, 10)),
        &["field `steps/timestamp_s`, step 10", "earlier than step 9's", "acquisition order"],
    );
}

#[test]
fn nan_timestamp() {
    bad_file("tn.h5", |f| edit_column(f, "timestamp_s", |v| v[0] = f64::NAN), &["field `steps/timestamp_s`, step 0", "NaN"]);
}

// ---------------------------------------------------------------------------------------
// Nights: files that cannot be reduced together

#[test]
fn no_run_files() {
    let _files = files();
    assert_names(&night_error(&[]), &["no run files given"]);
}

#[test]
fn same_file_given_twice() {
    let _files = files();
    let (_dir, path) = good_file("twice.h5");
    let other = path.parent().unwrap().join(".").join("twice.h5");
    assert_names(&night_error(&[path, other]), &["twice.h5", "given twice"]);
}

#[test]
fn bin_widths_differ_between_files() {
    let _files = files();
    let dir = tempfile::tempdir().unwrap();
    let a = write_night(dir.path(), "first.h5", &small_scenario(1));
    let mut sc = small_scenario(2);
    sc.scan.bin_width_hz = 50.0;
    let b = write_night(dir.path(), "second.h5", &sc);
    assert_names(&night_error(&[a, b]), &["second.h5", "field `bin_width_hz`", "50 Hz", "first.h5", "100 Hz"]);
}

#[test]
fn bin_correlations_differ_between_files() {
    let _files = files();
    let dir = tempfile::tempdir().unwrap();
    let a = write_night(dir.path(), "first.h5", &small_scenario(1));
    let b = write_night(dir.path(), "second.h5", &small_scenario(2));
    patch(&b, |f| set_bin_correlation(f, &[0.25]));
    assert_names(&night_error(&[a, b]), &["second.h5", "field `bin_correlation`", "[0.25]", "first.h5", "[]", "window and overlap"]);
}

#[test]
fn bin_counts_differ_between_files() {
    let _files = files();
    let dir = tempfile::tempdir().unwrap();
    let a = write_night(dir.path(), "first.h5", &small_scenario(1));
    let mut sc = small_scenario(2);
    sc.scan.n_bins = 2048;
    let b = write_night(dir.path(), "second.h5", &sc);
    assert_names(&night_error(&[a, b]), &["second.h5", "field `spectra`", "2048 bins", "first.h5"]);
}

#[test]
fn step_repeated_in_a_second_file() {
    let _files = files();
    let dir = tempfile::tempdir().unwrap();
    let a = write_night(dir.path(), "night.h5", &small_scenario(1));
    // A re-export of the same steps (same times and frequencies) under another name.
    let mut sc = small_scenario(2);
    sc.scan.n_steps = 10;
    let b = write_night(dir.path(), "export.h5", &sc);
    assert_names(&night_error(&[a, b]), &["export.h5", "field `steps/timestamp_s`, step 0", "duplicate of step 0 of", "night.h5"]);
}

#[test]
fn absurd_frequency_span_is_refused_before_allocating() {
    let _files = files();
    let (_dir, path) = good_file("span.h5");
    patch(&path, |f| edit_column(f, "start_freq_hz", |v| v[11] = 4.0e15));
    assert_names(&night_error(&[path]), &["field `steps/start_freq_hz`", "span.h5 step 11", "more than the"]);
}

#[test]
fn lo_step_off_the_bin_grid() {
    let _files = files();
    let (_dir, path) = good_file("grid.h5");
    patch(&path, |f| edit_column(f, "start_freq_hz", |v| v[6] += 37.0));
    let plan = config::load(PIPELINE, "pipeline.toml").unwrap();
    let err = pipeline::reduce(&plan, &[path], &|_, _| {}).expect_err("an off-grid step must stop the reduction");
    assert!(matches!(err, ReduceError::Night(_)));
    assert_names(&err.to_string(), &["step 6", "row 6", "start_freq_hz", "0.3700 bins off the RF grid"]);
}

// ---------------------------------------------------------------------------------------
// "No data" bins: weight 0, coverage gaps, never zeros

/// A night with no-data bins of every cause: step 0 holds 100 negative and 200 NaN bins,
/// step 5 two infinite values and two zeros, step 23 has its top 200 bins masked.
fn night_with_gaps(name: &str) -> (tempfile::TempDir, PathBuf) {
    let (dir, path) = good_file(name);
    patch(&path, |f| {
        let spectra = f.dataset("spectra")?;
        let mut first: ndarray::Array1<f32> = spectra.read_slice_1d((0, ..))?;
        first.slice_mut(ndarray::s![0..100]).fill(-1.0);
        first.slice_mut(ndarray::s![100..300]).fill(f32::NAN);
        spectra.write_slice(&first, (0, ..))?;
        let mut sixth: ndarray::Array1<f32> = spectra.read_slice_1d((5, ..))?;
        sixth[10] = f32::INFINITY;
        sixth[11] = f32::NEG_INFINITY;
        sixth[500] = 0.0;
        sixth[501] = -0.0;
        spectra.write_slice(&sixth, (5, ..))?;
        let mut mask = ndarray::Array2::<u8>::zeros((24, 1024));
        mask.slice_mut(ndarray::s![23, 824..]).fill(1);
        f.new_dataset_builder().with_data(&mask).create("mask").map(|_| ())
    });
    (dir, path)
}

#[test]
fn nan_negative_and_masked_bins_become_coverage_gaps() {
    let _files = files();
    let (_dir, path) = night_with_gaps("gaps.h5");
    let plan = config::load(PIPELINE, "pipeline.toml").unwrap();
    let r = pipeline::reduce(&plan, &[path], &|_, _| {}).expect("a night with gaps reduces");
    let sp = &r.spectrum;
    assert_eq!(r.cuts.len(), 0, "no step is cut: {:?}", r.cuts);
    let n = sp.combined.len();
    // RF bins 0..200 are seen only by step 0 (all bad there); the top 200 only by step 23.
    for j in (0..200).chain(n - 200..n) {
        assert_eq!(sp.coverage[j], 0, "bin {j}");
        assert!(sp.combined[j].is_nan(), "bin {j}: combined {}", sp.combined[j]);
        assert!(sp.combined_sigma[j].is_infinite(), "bin {j}");
    }
    // Bins 200..300 lost step 0 but keep step 1.
    assert!(sp.coverage[200..300].iter().all(|&c| c == 1), "{:?}", &sp.coverage[200..300]);
    assert!(sp.coverage[300..400].iter().all(|&c| c == 2));
    // The grand spectrum is NaN where the filter window sees only the gap, never zero.
    // (The kernel looks forward from its bin and is shorter than 150 bins at 5.2 GHz.)
    assert!(sp.grand[..50].iter().all(|g| g.is_nan()), "{:?}", &sp.grand[..50]);
    assert!(sp.grand.iter().all(|&g| g != 0.0));
    assert!(sp.grand[300..n - 300].iter().all(|g| g.is_finite()));
    let valid = sp.grand.iter().filter(|g| g.is_finite()).count();
    assert!(valid <= n - 200, "{valid} of {n} bins hold a value");
}

#[test]
fn no_data_bins_are_counted_by_cause_and_warned_of_per_file() {
    use axsift::stage::no_data::CauseCount;
    let _files = files();
    let (_dir, path) = night_with_gaps("counted.h5");
    let plan = config::load(PIPELINE, "pipeline.toml").unwrap();
    let r = pipeline::reduce(&plan, std::slice::from_ref(&path), &|_, _| {}).expect("a night with gaps reduces");
    let nd = &r.no_data;
    assert_eq!(nd.masked, CauseCount { bins: 200, steps: 1 });
    assert_eq!(nd.non_finite, CauseCount { bins: 202, steps: 2 });
    assert_eq!(nd.non_positive, CauseCount { bins: 102, steps: 2 });
    assert_eq!(nd.files.len(), 1);
    assert_eq!((nd.files[0].steps, nd.files[0].bins, nd.files[0].worst.clone()), (2, 304, vec![(0, 300), (5, 4)]));
    let warnings = nd.warnings();
    assert_eq!(warnings.len(), 1, "one line per file: {warnings:?}");
    assert_names(&warnings[0], &["counted.h5", "2 steps hold 304 bins", "mask does not mark", "step 0 (300 bins)", "step 5 (4 bins)"]);

    // summary.json carries the same counts.
    let prov = axsift::output::Provenance::new(PIPELINE, std::slice::from_ref(&path)).unwrap();
    let json: serde_json::Value = serde_json::to_value(r.summary(&prov, None, None)).unwrap();
    assert_eq!(json["no_data"]["masked"]["bins"], 200);
    assert_eq!(json["no_data"]["non_finite"]["steps"], 2);
    assert_eq!(json["no_data"]["non_positive"]["bins"], 102);

    // The same file with a stricter ingest limit: step 0 (300 of 1024 bins, 29 %) is cut.
    let strict = config::load(&pipeline_with("max_no_data_fraction = 0.5", "max_no_data_fraction = 0.25"), "strict.toml").unwrap();
    let r = pipeline::reduce(&strict, &[path], &|_, _| {}).expect("reduces");
    assert_eq!(r.cuts.iter().map(|c| c.step).collect::<Vec<_>>(), vec![0], "{:?}", r.cuts);
    assert_eq!(r.cuts[0].stage, "ingest");
    assert_names(&r.cuts[0].reason, &["300 of 1024 bins hold no data", "100 non-positive", "200 non-finite", "max_no_data_fraction = 0.25"]);
    // Every step is still counted, the cut one included.
    assert_eq!(r.no_data.non_finite, CauseCount { bins: 202, steps: 2 });
}

#[test]
fn no_data_fraction_outside_zero_to_one_is_refused() {
    let problems = config_error(&pipeline_with("max_no_data_fraction = 0.5", "max_no_data_fraction = 1.5"));
    assert!(problems.iter().any(|p| p.contains("max_no_data_fraction") && p.contains("[0, 1]")), "{problems:?}");
}

// ---------------------------------------------------------------------------------------
// Failed runs keep earlier results

fn snapshot(dir: &Path) -> Vec<(String, Vec<u8>)> {
    let mut files: Vec<(String, Vec<u8>)> = std::fs::read_dir(dir)
        .unwrap()
        .map(|e| e.unwrap().path())
        .filter(|p| p.is_file() && !p.file_name().unwrap().to_string_lossy().starts_with(".tmp."))
        .map(|p| (p.file_name().unwrap().to_string_lossy().into_owned(), std::fs::read(&p).unwrap()))
        .collect();
    files.sort();
    files
}

#[test]
fn failed_runs_never_replace_good_outputs() {
    let _files = files();
    let (dir, good) = good_file("good.h5");
    let out = dir.path().join("results");
    let plan = config::load(PIPELINE, "pipeline.toml").unwrap();
    let reduction = pipeline::reduce(&plan, std::slice::from_ref(&good), &|_, _| {}).unwrap();
    let prov = axsift::output::Provenance::new(PIPELINE, std::slice::from_ref(&good)).unwrap();
    reduction.write(&out, PIPELINE, &prov, None).expect("first outputs are written");
    let before = snapshot(&out);
    assert_eq!(before.len(), 5, "{:?}", before.iter().map(|f| &f.0).collect::<Vec<_>>());

    // 1. A reduction that fails on a bad run file writes nothing.
    let bad = dir.path().join("bad.h5");
    std::fs::copy(&good, &bad).unwrap();
    patch(&bad, |f| edit_column(f, "n_averages", |v| v[0] = 0.0));
    assert!(pipeline::reduce(&plan, &[bad], &|_, _| {}).is_err());
    assert_eq!(snapshot(&out), before);

    // 2. A second, different result whose writing fails half-way (one temporary name is
    //    blocked by a folder) leaves the first results byte for byte.
    let mut sc = small_scenario(99);
    sc.scan.n_steps = 20;
    let other = write_night(dir.path(), "other.h5", &sc);
    let second = pipeline::reduce(&plan, std::slice::from_ref(&other), &|_, _| {}).unwrap();
    std::fs::create_dir(out.join(".tmp.summary.json")).unwrap();
    let prov2 = axsift::output::Provenance::new(PIPELINE, std::slice::from_ref(&other)).unwrap();
    assert!(second.write(&out, PIPELINE, &prov2, None).is_err(), "writing over a blocked temporary must fail");
    assert_eq!(snapshot(&out), before);
}

#[test]
fn command_line_failure_keeps_results_and_exits_with_2() {
    let _files = files_alone();
    let (dir, good) = good_file("good.h5");
    let out = dir.path().join("results");
    let exe = env!("CARGO_BIN_EXE_axsift");
    let run = |runs: &[&Path]| {
        std::process::Command::new(exe)
            .args(["--quiet", "reduce", "--config", "pipeline.toml", "--out"])
            .arg(&out)
            .args(runs)
            .current_dir(env!("CARGO_MANIFEST_DIR"))
            .output()
            .unwrap()
    };
    let ok = run(&[&good]);
    assert!(ok.status.success(), "{}", String::from_utf8_lossy(&ok.stderr));
    let before = snapshot(&out);
    let broken = dir.path().join("broken.h5");
    std::fs::write(&broken, b"interrupted").unwrap();
    let failed = run(&[&good, &broken]);
    assert_eq!(failed.status.code(), Some(2));
    assert_names(&String::from_utf8_lossy(&failed.stderr), &["broken.h5", "not an HDF5 file"]);
    assert_eq!(snapshot(&out), before);
}

// ---------------------------------------------------------------------------------------
// Pipeline files

#[test]
fn toml_syntax_error() {
    let text = pipeline_with("order = 4", "order = 4 4");
    one_problem(&text, line_of(&text, "order = 4 4"), 9, &["TOML syntax", "string values must be quoted"]);
}

#[test]
fn duplicate_key() {
    let text = pipeline_with("order = 4", "order = 4\norder = 5");
    one_problem(&text, line_of(&text, "order = 5"), 1, &["duplicate key"]);
}

#[test]
fn unknown_kind_with_suggestion() {
    let text = pipeline_with("kind = \"baseline\"", "kind = \"baseline_fit\"");
    one_problem(&text, line_of(&text, "baseline_fit"), 8, &["stage 2", "unknown kind \"baseline_fit\"", "did you mean \"baseline\"?", "valid kinds: ingest"]);
}

#[test]
fn missing_kind() {
    let text = pipeline_with("kind = \"combine\"\n", "");
    let problems = config_error(&text);
    // the table without `kind` is stage 4; its header line is reported.
    assert_eq!(problems.len(), 1, "{problems:#?}");
    assert_names(&problems[0], &["stage 4", "missing key `kind`"]);
    let header_line = text.lines().enumerate().filter(|(_, l)| *l == "[[stage]]").nth(3).unwrap().0 + 1;
    assert!(problems[0].starts_with(&format!("line {header_line}, column 1:")), "{}", problems[0]);
}

#[test]
fn kind_that_is_not_a_string() {
    let text = pipeline_with("kind = \"filter\"", "kind = 5");
    one_problem(&text, line_of(&text, "kind = 5"), 8, &["stage 5", "key `kind` must be a string, found integer"]);
}

#[test]
fn unknown_key_with_suggestion() {
    let text = pipeline_with("window_bins = 401", "window_bins = 401\nwindw_bins = 401");
    one_problem(
        &text,
        line_of(&text, "windw_bins"),
        1,
        &["stage 2 \"baseline\"", "unknown key `windw_bins`", "did you mean `window_bins`?", "valid keys: window_bins, order"],
    );
}

#[test]
fn value_of_the_wrong_type() {
    let text = pipeline_with("window_bins = 401", "window_bins = \"401\"");
    one_problem(&text, line_of(&text, "window_bins"), 15, &["stage 2 \"baseline\"", "key `window_bins`", "invalid type: string \"401\""]);
}

#[test]
fn negative_count() {
    let text = pipeline_with("order = 4", "order = -4");
    one_problem(&text, line_of(&text, "order = -4"), 9, &["stage 2 \"baseline\"", "key `order`", "-4"]);
}

#[test]
fn wrong_type_inside_an_array() {
    let text = pipeline_with("loaded_q_range = [1.0e3, 1.0e6]", "loaded_q_range = [1.0e3, \"high\"]");
    one_problem(&text, line_of(&text, "loaded_q_range"), 26, &["stage 1 \"ingest\"", "key `loaded_q_range`", "string \"high\""]);
}

#[test]
fn even_savitzky_golay_window() {
    let text = pipeline_with("window_bins = 401", "window_bins = 400");
    one_problem(&text, line_of(&text, "window_bins"), 15, &["stage 2 \"baseline\"", "key `window_bins`", "400 must be odd"]);
}

#[test]
fn order_not_below_window() {
    let text = pipeline_with("order = 4", "order = 401");
    one_problem(&text, line_of(&text, "order = 401"), 9, &["stage 2 \"baseline\"", "key `order`", "smaller than window_bins (401)"]);
}

#[test]
fn reference_coupling_out_of_range() {
    for (value, shown) in [("1.0e-9", "1e-9"), ("-3.0e7", "-3e7"), ("0.0", "0e0")] {
        let text = pipeline_with("reference = \"ksvz\"", &format!("reference = {value}"));
        one_problem(&text, line_of(&text, "reference = "), 13, &["stage 3 \"rescale\"", "key `reference`", shown, "magnitude 1e-6 to 1e6"]);
    }
    // A number inside the range is a valid reference.
    config::load(&pipeline_with("reference = \"ksvz\"", "reference = -0.5"), "night.toml").unwrap();
}

#[test]
fn threshold_not_positive() {
    let text = pipeline_with("target_snr = 5.0\nconfidence = 0.95", "threshold = 0.0");
    one_problem(&text, line_of(&text, "threshold = 0.0"), 13, &["stage 6 \"flag\"", "key `threshold`", "must be > 0"]);
}

#[test]
fn negative_quality_factor_range() {
    let text = pipeline_with("loaded_q_range = [1.0e3, 1.0e6]", "loaded_q_range = [-1.0e3, 1.0e6]");
    one_problem(&text, line_of(&text, "loaded_q_range"), 18, &["stage 1 \"ingest\"", "key `loaded_q_range`", "0 <= min < max"]);
}

#[test]
fn nan_in_a_range() {
    let text = pipeline_with("noise_temp_k_range = [0.05, 20.0]", "noise_temp_k_range = [nan, 20.0]");
    one_problem(&text, line_of(&text, "noise_temp_k_range"), 22, &["stage 1 \"ingest\"", "key `noise_temp_k_range`", "finite"]);
}

#[test]
fn confidence_out_of_range() {
    let text = pipeline_with("confidence = 0.95", "confidence = 1.5");
    one_problem(&text, line_of(&text, "confidence = 1.5"), 14, &["stage 6 \"flag\"", "key `confidence`", "[0.5, 1)"]);
}

#[test]
fn missing_required_key() {
    let text = pipeline_with("window_bins = 401\n", "");
    let problems = config_error(&text);
    assert_eq!(problems.len(), 1, "{problems:#?}");
    assert_names(&problems[0], &["stage 2 \"baseline\"", "missing key `window_bins`"]);
}

/// The default pipeline's stage tables, each starting at its `[[stage]]` line.
fn stage_blocks() -> (String, Vec<String>) {
    let mut parts = PIPELINE.split("\n[[stage]]\n");
    let preamble = parts.next().unwrap().to_string();
    (preamble, parts.map(|b| format!("\n[[stage]]\n{b}")).collect())
}

#[test]
fn stages_in_an_impossible_order() {
    let (preamble, mut blocks) = stage_blocks();
    blocks.swap(2, 3); // combine before rescale
    let text = preamble + &blocks.concat();
    let line = line_of(&text, "kind = \"combine\"") - 1;
    one_problem(
        &text,
        line,
        1,
        &[
            "stage 3 \"combine\": is in the wrong place",
            "needs Rescaled data but receives Normalised",
            "stages that fit here: rescale",
            "order ingest, baseline",
        ],
    );
}

#[test]
fn stage_given_twice() {
    let (preamble, mut blocks) = stage_blocks();
    blocks.insert(1, blocks[0].clone());
    let text = preamble + &blocks.concat();
    let problems = config_error(&text);
    assert_eq!(problems.len(), 1, "{problems:#?}");
    assert_names(&problems[0], &["stage 2 \"ingest\": is in the wrong place", "needs Raw data but receives Accepted", "fit here: baseline"]);
}

#[test]
fn pipeline_without_flag() {
    let text = PIPELINE[..PIPELINE.rfind("[[stage]]").unwrap()].to_string();
    let problems = config_error(&text);
    assert_eq!(problems.len(), 1, "{problems:#?}");
    assert_names(&problems[0], &["ends with Grand data", "must end with a \"flag\" stage"]);
}

#[test]
fn pipeline_without_stages() {
    let problems = config_error("# nothing here\n");
    assert_names(&problems[0], &["line 1, column 1", "no [[stage]] tables"]);
}

#[test]
fn unknown_top_level_key() {
    let text = format!("stages = 3\n{PIPELINE}");
    one_problem(&text, 1, 1, &["unknown top-level key `stages`", "did you mean `[[stage]]`?"]);
}

#[test]
fn single_bracket_stage_table() {
    one_problem("[stage]\nkind = \"ingest\"\n", 1, 1, &["`stage` must be an array of tables", "[[stage]]", "found table"]);
}

#[test]
fn several_problems_are_all_reported_in_file_order() {
    // (A wrong type in a key without a default hides that stage's range checks: they need
    // every key. Here the wrongly typed key has a default, so the window is still checked.)
    let text = PIPELINE
        .replacen("noise_temp_k_range = [0.05, 20.0]", "noise_temp_k_rang = [0.05, 20.0]", 1)
        .replacen("window_bins = 401", "window_bins = 400", 1)
        .replacen("max_spread_deviation = 0.2", "max_spread_deviation = \"a fifth\"", 1)
        .replacen("kind = \"rescale\"", "kind = \"rescal\"", 1)
        .replacen("max_misalignment_bins = 0.001", "max_misalignment_bins = 0.7", 1)
        .replacen("halo = \"maxwellian\"", "halo = \"maxwelian\"", 1)
        .replacen("confidence = 0.95", "confidence = 0.2", 1);
    let problems = config_error(&text);
    let expect = [
        ("noise_temp_k_rang", "unknown key `noise_temp_k_rang` (did you mean `noise_temp_k_range`?)"),
        ("window_bins = 400", "key `window_bins`"),
        ("max_spread_deviation = \"a fifth\"", "key `max_spread_deviation`: invalid type"),
        ("kind = \"rescal\"", "did you mean \"rescale\"?"),
        ("max_misalignment_bins = 0.7", "key `max_misalignment_bins`"),
        ("halo = \"maxwelian\"", "key `halo`"),
        ("confidence = 0.2", "key `confidence`"),
    ];
    assert_eq!(problems.len(), expect.len(), "{problems:#?}");
    for (p, (needle, part)) in problems.iter().zip(expect) {
        assert!(p.starts_with(&format!("line {}, column", line_of(&text, needle))), "{p}");
        assert_names(p, &[part]);
    }
}

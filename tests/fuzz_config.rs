//! Property-based fuzzing of the pipeline loader: generated pipelines, mutations of the
//! default pipeline, and arbitrary text. The loader must never panic; when it refuses a
//! file, every problem must start with a line and column inside the file.
//!
//! Case counts are fixed (see `CASES_*`) so the suite stays well under a minute in
//! `cargo test --release` on two cores; each test prints how many cases it ran.

use axsift::config;
use proptest::prelude::*;
use proptest::test_runner::{Config, TestRunner};
use std::sync::atomic::{AtomicUsize, Ordering};

const PIPELINE: &str = include_str!("../pipeline.toml");
const CASES_MUTATED: u32 = 20_000;
const CASES_GENERATED: u32 = 10_000;
const CASES_ARBITRARY: u32 = 10_000;

fn runner(cases: u32) -> TestRunner {
    TestRunner::new(Config { cases, failure_persistence: None, max_shrink_iters: 200, ..Config::default() })
}

/// Loads `text`; checks that every problem carries a position within the text.
fn check(text: &str) -> Result<(), TestCaseError> {
    match config::load(text, "fuzz.toml") {
        Ok(plan) => prop_assert!(!plan.describe().is_empty()),
        Err(e) => {
            prop_assert!(!e.problems.is_empty());
            let lines = text.split('\n').count();
            for p in &e.problems {
                let rest = p.strip_prefix("line ").ok_or_else(|| TestCaseError::fail(format!("no line: {p}")))?;
                let (line, rest) = rest.split_once(", column ").ok_or_else(|| TestCaseError::fail(format!("no column: {p}")))?;
                let line: usize = line.parse().map_err(|_| TestCaseError::fail(format!("bad line: {p}")))?;
                let column: usize = rest.split(':').next().unwrap_or("").parse().map_err(|_| TestCaseError::fail(format!("bad column: {p}")))?;
                prop_assert!(line >= 1 && line <= lines, "line {} of {}: {}", line, lines, p);
                prop_assert!(column >= 1, "{}", p);
            }
        }
    }
    Ok(())
}

/// One edit of a text, at a position given as a fraction of its length.
#[derive(Debug, Clone)]
enum Edit {
    Delete(f64, usize),
    Insert(f64, String),
    DuplicateLine(f64),
    SwapLines(f64, f64),
    ReplaceNumber(usize, String),
    ReplaceWord(usize, String),
}

fn toml_fragment() -> impl Strategy<Value = String> {
    prop_oneof![
        Just("[[stage]]\n".to_string()),
        Just("[stage]\n".to_string()),
        Just("kind = \"baseline\"\n".to_string()),
        Just("kind = 3\n".to_string()),
        Just("=".to_string()),
        Just("\"".to_string()),
        Just("[".to_string()),
        Just("]".to_string()),
        Just("\n".to_string()),
        Just("#".to_string()),
        Just("nan".to_string()),
        Just("-inf".to_string()),
        Just("é".to_string()),
        Just("\u{0}".to_string()),
        "[a-z_]{1,12}",
        "[ -~]{1,6}",
    ]
}

fn number() -> impl Strategy<Value = String> {
    prop_oneof![
        Just("0".to_string()),
        Just("-1".to_string()),
        Just("nan".to_string()),
        Just("inf".to_string()),
        Just("1e400".to_string()),
        Just("18446744073709551616".to_string()),
        Just("\"7\"".to_string()),
        Just("[]".to_string()),
        Just("{}".to_string()),
        Just("true".to_string()),
        any::<i64>().prop_map(|v| v.to_string()),
        any::<f64>().prop_map(|v| format!("{v:?}")),
    ]
}

fn edit() -> impl Strategy<Value = Edit> {
    prop_oneof![
        (0.0..1.0, 1usize..40).prop_map(|(at, n)| Edit::Delete(at, n)),
        (0.0..1.0, toml_fragment()).prop_map(|(at, s)| Edit::Insert(at, s)),
        (0.0..1.0).prop_map(Edit::DuplicateLine),
        (0.0..1.0, 0.0..1.0).prop_map(|(a, b)| Edit::SwapLines(a, b)),
        (0usize..40, number()).prop_map(|(i, s)| Edit::ReplaceNumber(i, s)),
        (0usize..80, "[a-z_]{0,14}").prop_map(|(i, s)| Edit::ReplaceWord(i, s)),
    ]
}

fn char_at(text: &str, frac: f64) -> usize {
    let mut i = ((text.len() as f64) * frac) as usize;
    i = i.min(text.len());
    while !text.is_char_boundary(i) {
        i -= 1;
    }
    i
}

fn apply(text: &str, e: &Edit) -> String {
    let lines: Vec<&str> = text.split('\n').collect();
    let line_index = |f: f64| ((lines.len() as f64 * f) as usize).min(lines.len() - 1);
    match e {
        Edit::Delete(at, n) => {
            let a = char_at(text, *at);
            let mut b = (a + n).min(text.len());
            while !text.is_char_boundary(b) {
                b += 1;
            }
            format!("{}{}", &text[..a], &text[b..])
        }
        Edit::Insert(at, s) => {
            let a = char_at(text, *at);
            format!("{}{s}{}", &text[..a], &text[a..])
        }
        Edit::DuplicateLine(at) => {
            let mut l = lines.clone();
            let i = line_index(*at);
            l.insert(i, lines[i]);
            l.join("\n")
        }
        Edit::SwapLines(a, b) => {
            let mut l = lines.clone();
            l.swap(line_index(*a), line_index(*b));
            l.join("\n")
        }
        Edit::ReplaceNumber(i, s) => replace_nth(text, *i, s, |c: char| c.is_ascii_digit() || c == '.' || c == 'e' || c == '-'),
        Edit::ReplaceWord(i, s) => replace_nth(text, *i, s, |c: char| c.is_ascii_alphanumeric() || c == '_'),
    }
}

/// Replaces the `n`-th (mod count) maximal run of characters matching `class` by `with`.
fn replace_nth(text: &str, n: usize, with: &str, class: impl Fn(char) -> bool) -> String {
    let mut runs = Vec::new();
    let mut start = None;
    for (i, c) in text.char_indices() {
        match (class(c), start) {
            (true, None) => start = Some(i),
            (false, Some(s)) => {
                runs.push(s..i);
                start = None;
            }
            _ => {}
        }
    }
    if let Some(s) = start {
        runs.push(s..text.len());
    }
    if runs.is_empty() {
        return text.to_string();
    }
    let r = runs[n % runs.len()].clone();
    format!("{}{with}{}", &text[..r.start], &text[r.end..])
}

#[test]
fn mutated_default_pipeline_never_panics() {
    let count = AtomicUsize::new(0);
    let refused = AtomicUsize::new(0);
    runner(CASES_MUTATED)
        .run(&proptest::collection::vec(edit(), 1..6), |edits| {
            count.fetch_add(1, Ordering::Relaxed);
            let text = edits.iter().fold(PIPELINE.to_string(), |t, e| apply(&t, e));
            if config::load(&text, "fuzz.toml").is_err() {
                refused.fetch_add(1, Ordering::Relaxed);
            }
            check(&text)
        })
        .unwrap();
    let (n, r) = (count.load(Ordering::Relaxed), refused.load(Ordering::Relaxed));
    eprintln!("fuzz_config mutated: {n} cases, {r} refused");
    assert_eq!(n, CASES_MUTATED as usize);
    assert!(r > n / 10, "mutations too gentle: only {r} of {n} refused");
}

const KINDS: [&str; 9] = ["ingest", "baseline", "rescale", "combine", "filter", "flag", "baselin", "Flag", ""];
const KEYS: [&str; 20] = [
    "noise_temp_k_range",
    "loaded_q_range",
    "coupling_beta_range",
    "window_bins",
    "order",
    "max_spread_deviation",
    "reference",
    "dm_density_gev_per_cm3",
    "max_misalignment_bins",
    "halo",
    "v_rms_km_s",
    "v0_km_s",
    "v_earth_km_s",
    "tail_fraction",
    "segment_fraction",
    "threshold",
    "target_snr",
    "confidence",
    "kind",
    "windw",
];

fn value() -> impl Strategy<Value = String> {
    prop_oneof![
        number(),
        Just("\"ksvz\"".to_string()),
        Just("\"maxwellian\"".to_string()),
        Just("\"lab_frame\"".to_string()),
        (any::<f64>(), any::<f64>()).prop_map(|(a, b)| format!("[{a:?}, {b:?}]")),
        (0u32..2000).prop_map(|v| v.to_string()),
        (0.0f64..1.0).prop_map(|v| format!("{v:?}")),
        Just("[1, \"x\"]".to_string()),
        Just("1979-05-27T07:32:00Z".to_string()),
    ]
}

fn stage() -> impl Strategy<Value = String> {
    (proptest::option::weighted(0.9, proptest::sample::select(&KINDS[..])), proptest::collection::vec((proptest::sample::select(&KEYS[..]), value()), 0..6))
        .prop_map(|(kind, keys)| {
            let mut s = "[[stage]]\n".to_string();
            if let Some(k) = kind {
                s.push_str(&format!("kind = \"{k}\"\n"));
            }
            for (k, v) in keys {
                s.push_str(&format!("{k} = {v}\n"));
            }
            s
        })
}

#[test]
fn generated_pipelines_never_panic() {
    let count = AtomicUsize::new(0);
    runner(CASES_GENERATED)
        .run(&proptest::collection::vec(stage(), 0..9), |stages| {
            count.fetch_add(1, Ordering::Relaxed);
            check(&stages.join("\n"))
        })
        .unwrap();
    let n = count.load(Ordering::Relaxed);
    eprintln!("fuzz_config generated: {n} cases");
    assert_eq!(n, CASES_GENERATED as usize);
}

#[test]
fn arbitrary_text_never_panics() {
    let count = AtomicUsize::new(0);
    runner(CASES_ARBITRARY)
        .run(&prop_oneof![any::<String>(), "[\\[\\]=\"a-z0-9 \n.#,{}-]{0,200}"], |text| {
            count.fetch_add(1, Ordering::Relaxed);
            check(&text)
        })
        .unwrap();
    let n = count.load(Ordering::Relaxed);
    eprintln!("fuzz_config arbitrary: {n} cases");
    assert_eq!(n, CASES_ARBITRARY as usize);
}

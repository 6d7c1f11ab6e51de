//! The morning report as a reader meets it: rendered by headless Chromium, screenshot decoded
//! and checked for content, every section heading present when its data exists, nothing
//! loaded from outside the file. Nights with none, a dozen and about a hundred candidates.
//!
//! Chromium comes from the Debian package `chromium` (`scripts/setup.sh` installs it); without
//! it these tests fail, they never pass silently.

#[allow(dead_code)]
mod common;

use axsift::output::SUMMARY_CANDIDATES;
use std::path::{Path, PathBuf};
use std::process::Command;

/// Browser window of the screenshots, pixels.
const WINDOW: (u32, u32) = (1280, 2400);

fn axsift() -> Command {
    Command::new(env!("CARGO_BIN_EXE_axsift"))
}

fn run(cmd: &mut Command) -> String {
    let out = cmd.output().expect("axsift starts");
    assert!(out.status.success(), "axsift failed: {}", String::from_utf8_lossy(&out.stderr));
    String::from_utf8_lossy(&out.stdout).into_owned()
}

/// The Chromium binary, or a failure saying how to install it.
fn chromium() -> PathBuf {
    let path = std::env::var_os("PATH").unwrap_or_default();
    std::env::split_paths(&path)
        .flat_map(|d| ["chromium", "chromium-browser"].map(|n| d.join(n)))
        .find(|p| p.is_file())
        .unwrap_or_else(|| panic!("chromium is not installed: run `bash scripts/setup.sh` (Debian package `chromium`); the report tests need it"))
}

/// Screenshots `html` at [`WINDOW`] and returns (width, height, RGB pixels).
fn screenshot(html: &Path, png: &Path) -> (u32, u32, Vec<[u8; 3]>) {
    let profile = tempfile::tempdir().unwrap();
    let out = Command::new(chromium())
        .args(["--headless", "--no-sandbox", "--disable-gpu", "--no-first-run", "--disable-background-networking", "--hide-scrollbars"])
        .arg(format!("--user-data-dir={}", profile.path().display()))
        .arg(format!("--screenshot={}", png.display()))
        .arg(format!("--window-size={},{}", WINDOW.0, WINDOW.1))
        .arg(format!("file://{}", html.display()))
        .output()
        .expect("chromium starts");
    assert!(png.is_file(), "chromium wrote no screenshot (status {:?}): {}", out.status, String::from_utf8_lossy(&out.stderr));
    let decoder = png::Decoder::new(std::io::BufReader::new(std::fs::File::open(png).unwrap()));
    let mut reader = decoder.read_info().expect("the screenshot is a PNG");
    let mut buf = vec![0; reader.output_buffer_size()];
    let info = reader.next_frame(&mut buf).expect("the screenshot decodes");
    let channels = match info.color_type {
        png::ColorType::Rgb => 3,
        png::ColorType::Rgba => 4,
        other => panic!("unexpected screenshot colour type {other:?}"),
    };
    assert_eq!(info.bit_depth, png::BitDepth::Eight);
    let pixels = buf[..info.buffer_size()].chunks_exact(channels).map(|p| [p[0], p[1], p[2]]).collect();
    (info.width, info.height, pixels)
}

/// The screenshot has the window's size and real content: many colours, a good share of
/// non-white pixels, and content in the lower half as well (the page is long).
fn assert_not_blank(html: &Path) {
    let png = html.with_extension("png");
    let (w, h, px) = screenshot(html, &png);
    assert_eq!((w, h), WINDOW, "screenshot size");
    let non_white = px.iter().filter(|p| p.iter().any(|&c| c < 235)).count();
    let lower_half = px[px.len() / 2..].iter().filter(|p| p.iter().any(|&c| c < 235)).count();
    let mut colours: Vec<[u8; 3]> = px.iter().step_by(7).copied().collect();
    colours.sort_unstable();
    colours.dedup();
    let share = non_white as f64 / px.len() as f64;
    assert!(share > 0.05, "{}: only {:.1} % of the screenshot is not white", png.display(), 100.0 * share);
    assert!(lower_half > px.len() / 100, "{}: the lower half of the screenshot is empty", png.display());
    assert!(colours.len() > 50, "{}: only {} colours", png.display(), colours.len());
}

/// Every heading expected is there, the absent ones are not, and nothing refers outside the
/// file: no script, no image without an inline source, links only to anchors of the page.
fn assert_page(html: &str, present: &[&str], absent: &[&str]) {
    for h in present {
        assert!(html.contains(&format!("<h2>{h}</h2>")), "heading \"{h}\" missing");
    }
    for h in absent {
        assert!(!html.contains(&format!("<h2>{h}</h2>")), "heading \"{h}\" present without its data");
    }
    assert!(html.starts_with("<!DOCTYPE html>") && html.trim_end().ends_with("</html>"));
    assert!(!html.contains("<script"), "the page must not need a script");
    for (i, _) in html.match_indices("<img") {
        let tag = &html[i..i + html[i..].find('>').unwrap()];
        let src = tag.split("src=\"").nth(1).and_then(|s| s.split('"').next()).unwrap_or("");
        assert!(src.starts_with("data:") && src.len() > 10, "image without an inline source: {tag}");
    }
    for (i, _) in html.match_indices("href=\"") {
        let target = &html[i + 6..i + 6 + html[i + 6..].find('"').unwrap()];
        let id = target.strip_prefix('#').unwrap_or_else(|| panic!("link out of the page: {target}"));
        assert!(html.contains(&format!("id=\"{id}\"")), "link to a missing anchor {target}");
    }
    for attr in ["src=\"http", "url(http", "@import", "<link"] {
        assert!(!html.contains(attr), "external reference `{attr}`");
    }
}

/// Writes the default pipeline with the flag threshold set to `threshold`.
fn pipeline_with_threshold(dir: &Path, threshold: f64) -> PathBuf {
    let text = common::PIPELINE.replace("target_snr = 5.0", &format!("threshold = {threshold}")).replace("confidence = 0.95", "");
    assert_ne!(text, common::PIPELINE);
    let path = dir.join(format!("pipeline_{threshold}.toml"));
    std::fs::write(&path, text).unwrap();
    path
}

fn summary(dir: &Path) -> serde_json::Value {
    serde_json::from_str(&std::fs::read_to_string(dir.join("summary.json")).unwrap()).unwrap()
}

/// The demo writes its report; it renders, holds the sections whose data exist (no limits and
/// no calibration without a calibration), lists the demo axion and stays small.
#[test]
fn demo_report_renders_in_chromium() {
    let dir = tempfile::tempdir().unwrap();
    let stdout = run(axsift().args(["demo", "--out"]).arg(dir.path()));
    let page = dir.path().join("report.html");
    assert!(stdout.contains("report.html"), "{stdout}");
    let html = std::fs::read_to_string(&page).unwrap();
    let always = [
        "The night at a glance",
        "Quality cuts",
        "Steps through the night",
        "Grand spectrum",
        "Distribution of the grand spectrum",
        "Rescan candidates",
        "Provenance",
    ];
    assert_page(&html, &always, &["Across nights", "Exclusion limits", "Calibration"]);
    assert!(html.contains("5205.20"), "the demo axion's frequency is not in the candidate table");
    assert!(html.contains("never drives the magnet"), "the rescan advice lacks the hardware note");
    assert!(html.contains("600 / 600"), "steps used");
    assert_eq!(html.matches("<svg").count(), 6, "four step panels, the grand spectrum, the histogram");
    assert!(html.len() < 250_000, "the page is {} bytes", html.len());
    let sha = summary(dir.path())["provenance"]["inputs"][0][1].as_str().unwrap().to_string();
    assert!(html.contains(&sha), "input hash missing from the provenance");
    assert_not_blank(&page);
    // Rebuilt from the folder alone, the page is the same.
    std::fs::remove_file(&page).unwrap();
    run(axsift().arg("report").arg(dir.path()).arg("-q"));
    assert_eq!(std::fs::read_to_string(&page).unwrap(), html);
}

/// A night with no candidate and one with about a hundred both render; the first says so,
/// the second lists the strongest [`SUMMARY_CANDIDATES`] (those of summary.json) and says
/// how many there are in all.
#[test]
fn reports_with_none_and_a_hundred_candidates_render() {
    let dir = tempfile::tempdir().unwrap();
    let night = dir.path().join("night.h5");
    run(axsift().args(["simulate", "--scenario", concat!(env!("CARGO_MANIFEST_DIR"), "/fixtures/demo_night.toml"), "--out"]).arg(&night));
    for (threshold, expect_none) in [(40.0, true), (2.6, false)] {
        let out = dir.path().join(format!("t{threshold}"));
        let config = pipeline_with_threshold(dir.path(), threshold);
        run(axsift().args(["reduce", "--report", "-q", "--config"]).arg(&config).arg("--out").arg(&out).arg(&night));
        let n = summary(&out)["n_candidates"].as_u64().unwrap() as usize;
        let html = std::fs::read_to_string(out.join("report.html")).unwrap();
        assert_page(&html, &["The night at a glance", "Grand spectrum", "Rescan candidates", "Provenance"], &["Exclusion limits"]);
        if expect_none {
            assert_eq!(n, 0);
            assert!(html.contains("nothing to rescan"));
        } else {
            assert!((80..=200).contains(&n), "{n} candidates at threshold {threshold}");
            let section = &html[html.find("<h2>Rescan candidates</h2>").unwrap()..html.find("<h2>Provenance</h2>").unwrap()];
            let listed = n.min(SUMMARY_CANDIDATES);
            assert_eq!(section.matches("<tr>").count(), listed + 1, "one row per listed candidate and a header");
            if n > listed {
                assert!(section.contains(&format!("the strongest {listed} of {n}")), "the note on the unlisted candidates is missing");
            }
        }
        assert_not_blank(&out.join("report.html"));
    }
}

/// With a calibration the page gains the exclusion curve and the calibration section.
#[test]
fn calibrated_report_has_limits_and_calibration() {
    use axsift::calib::*;
    let dir = tempfile::tempdir().unwrap();
    let night = dir.path().join("night.h5");
    run(axsift().args(["simulate", "--scenario", concat!(env!("CARGO_MANIFEST_DIR"), "/fixtures/demo_night.toml"), "--out"]).arg(&night));
    let plan = axsift::config::load(common::PIPELINE, "pipeline.toml").unwrap();
    let normal = |x: f64| 0.5 * (1.0 + statrs::function::erf::erf(x / 2f64.sqrt()));
    let efficiency = [2.0, 3.5, 5.0, 6.0]
        .iter()
        .map(|&snr| EfficiencyPoint {
            snr,
            n: 100,
            detected: (100.0 * normal(snr - 3.355)) as usize,
            efficiency: normal(snr - 3.355),
            standard_error: 0.02,
            ideal: normal(snr - 3.355),
        })
        .collect();
    // Figures of the size a campaign gives; the page only displays them.
    let cal = Calibration {
        version: CALIBRATION_VERSION,
        tool_version: env!("CARGO_PKG_VERSION").into(),
        stage_hash: stage_hash(&plan),
        noise: "simulated".into(),
        threshold: 3.355,
        spec: CampaignSpec::standard(1),
        null: NullSpread { mean: 0.0, std: 0.997, correction: 1.003, n_bins: 100_000, ks: KsResult { n: 800, statistic: 0.02, p_value: 0.6 } },
        attenuation: Attenuation { eta: 0.6286, spread: 0.05, standard_error: 0.004, n: 160 },
        efficiency,
        radiometer: RadiometerCheck { dicke_snr: 12.8, filter_snr: 12.5, ratio: 0.977, grand_snr: 9.96 },
        injections: Vec::new(),
    };
    let cal_path = dir.path().join("calibration.json");
    std::fs::write(&cal_path, serde_json::to_string(&cal).unwrap()).unwrap();
    let out = dir.path().join("out");
    run(axsift()
        .args(["reduce", "--report", "-q", "--config", concat!(env!("CARGO_MANIFEST_DIR"), "/pipeline.toml"), "--calibration"])
        .arg(&cal_path)
        .arg("--out")
        .arg(&out)
        .arg(&night));
    let html = std::fs::read_to_string(out.join("report.html")).unwrap();
    assert_page(&html, &["Exclusion limits", "Calibration", "Rescan candidates"], &[]);
    assert!(html.contains("0.6286"), "eta missing");
    assert!(html.contains("implied |g|/g_ref"), "implied couplings missing from the candidate table");
    assert_eq!(html.matches("<svg").count(), 8, "step panels, spectrum, histogram, exclusion, efficiency");
    assert_not_blank(&out.join("report.html"));
}

/// `inspect --json` prints the run file's shape and metadata ranges as JSON.
#[test]
fn inspect_json_is_machine_readable() {
    let dir = tempfile::tempdir().unwrap();
    let night = dir.path().join("night.h5");
    run(axsift().args(["simulate", "--scenario", concat!(env!("CARGO_MANIFEST_DIR"), "/fixtures/demo_night.toml"), "--out"]).arg(&night));
    let v: serde_json::Value = serde_json::from_str(&run(axsift().arg("inspect").arg("--json").arg(&night))).expect("inspect --json prints JSON");
    assert_eq!(v["n_steps"], 600);
    assert_eq!(v["n_bins"], 4096);
    assert_eq!(v["format"], "axsift-run");
    let t = &v["steps"]["noise_temp_k"];
    assert!(t["min"].as_f64().unwrap() <= t["median"].as_f64().unwrap() && t["median"].as_f64().unwrap() <= t["max"].as_f64().unwrap());
    assert!(v["rf_stop_hz"].as_f64().unwrap() > v["rf_start_hz"].as_f64().unwrap());
}

/// A reduction into an analysis state writes the section across nights: the nights, every
/// tracked candidate with its class and rescan integration as `status --json` gives them,
/// and the limit range; `report DIR --state` rebuilds the same page.
#[test]
fn state_reduction_report_has_the_section_across_nights() {
    let dir = tempfile::tempdir().unwrap();
    let night = dir.path().join("night.h5");
    run(axsift().args(["simulate", "--scenario", concat!(env!("CARGO_MANIFEST_DIR"), "/fixtures/demo_night.toml"), "--out"]).arg(&night));
    let (state, out) = (dir.path().join("state"), dir.path().join("out"));
    run(axsift()
        .args(["reduce", "--report", "-q", "--config", concat!(env!("CARGO_MANIFEST_DIR"), "/pipeline.toml"), "--state"])
        .arg(&state)
        .arg("--out")
        .arg(&out)
        .arg(&night));
    let page = out.join("report.html");
    let html = std::fs::read_to_string(&page).unwrap();
    assert_page(&html, &["The night at a glance", "Rescan candidates", "Across nights", "Provenance"], &["Exclusion limits"]);
    let status: serde_json::Value = serde_json::from_str(&run(axsift().args(["status", "--json", "--state"]).arg(&state))).unwrap();
    let tracked = status["candidates"].as_array().unwrap();
    assert!(!tracked.is_empty());
    let section = &html[html.find("<h2>Across nights</h2>").unwrap()..html.find("<h2>Provenance</h2>").unwrap()];
    for c in tracked {
        let row = format!("<td class=\"n\">{:.6}</td><td>{}</td>", c["frequency_hz"].as_f64().unwrap() / 1e6, c["class"].as_str().unwrap());
        assert!(section.contains(&row), "tracked candidate missing: {row}");
        assert!(section.contains(&format!("{:.0}", c["rescan_integration_s"].as_f64().unwrap())));
    }
    assert!(section.contains(&format!("{} new, 0 persist, 0 cleared, 0 interference", tracked.len())), "class counts");
    assert!(section.contains("no update of the state had a calibration"));
    assert!(section.contains("laboratory's safety rules"));
    assert_not_blank(&page);
    run(axsift().args(["report", "-q"]).arg(&out).arg("--state").arg(&state));
    assert_eq!(std::fs::read_to_string(&page).unwrap(), html);
}

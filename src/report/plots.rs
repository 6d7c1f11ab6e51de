//! The report's figures as inline SVG text (plotters' SVG backend into a string).
//!
//! Long series are reduced for drawing to the minimum and maximum of each pixel column, drawn
//! as one zig-zag path, so a figure's size depends on its width, not on the number of bins.

use super::diagnostics::StepDiagnostics;
use crate::calib::Calibration;
use crate::physics::constants::{G_GAMMA_DFSZ, G_GAMMA_KSVZ};
use crate::physics::units::g_agg_from_g_gamma_per_gev;
use plotters::coord::Shift;
use plotters::prelude::*;
use statrs::distribution::{Continuous, ContinuousCDF, Normal};

/// Line colour of data series.
const INK: RGBColor = RGBColor(31, 90, 160);
/// Colour of thresholds, candidates and cut steps.
const ALERT: RGBColor = RGBColor(200, 45, 40);
/// Colour of reference curves.
const REFERENCE: RGBColor = RGBColor(40, 140, 70);
/// Grid and frame colour.
const GRID: RGBColor = RGBColor(225, 228, 232);

type Area<'a> = DrawingArea<SVGBackend<'a>, Shift>;

fn err(e: impl std::fmt::Display) -> anyhow::Error {
    anyhow::anyhow!("{e}")
}

/// Draws with `f` on a white `width` x `height` SVG and returns its text, scaled to the
/// width of its container.
fn svg(width: u32, height: u32, f: impl FnOnce(&Area) -> anyhow::Result<()>) -> anyhow::Result<String> {
    crate::fonts::register_fonts()?;
    let mut text = String::new();
    {
        let area = SVGBackend::with_string(&mut text, (width, height)).into_drawing_area();
        area.fill(&WHITE).map_err(err)?;
        f(&area)?;
        area.present().map_err(err)?;
    }
    // Fixed pixel sizes become a responsive figure; the viewBox keeps the proportions.
    let fixed = format!("width=\"{width}\" height=\"{height}\"");
    Ok(text.replacen(&fixed, "class=\"figure\" role=\"img\"", 1))
}

/// Min/max per pixel column of `(x, y)` points sorted by x;
/// runs of columns without a finite value split the result into separate segments. Each segment alternates (x, min), (x, max).
pub fn column_envelope(points: &[(f64, f64)], columns: usize) -> Vec<Vec<(f64, f64)>> {
    let (Some(first), Some(last)) = (points.first(), points.last()) else { return Vec::new() };
    let mut envelope = Envelope::new(first.0, last.0, columns);
    for &(x, y) in points {
        envelope.add(x, y);
    }
    envelope.segments()
}

/// The min/max per pixel column of points with x from `x0` to `x_last`, taken in one at a
/// time (see [`column_envelope`]).
#[derive(Debug, Clone)]
struct Envelope {
    x0: f64,
    span: f64,
    lo: Vec<f64>,
    hi: Vec<f64>,
    seen: Vec<bool>,
}

impl Envelope {
    fn new(x0: f64, x_last: f64, columns: usize) -> Self {
        let columns = columns.max(1);
        Self {
            x0,
            span: (x_last - x0).max(f64::MIN_POSITIVE),
            lo: vec![f64::INFINITY; columns],
            hi: vec![f64::NEG_INFINITY; columns],
            seen: vec![false; columns],
        }
    }

    fn add(&mut self, x: f64, y: f64) {
        let columns = self.lo.len();
        let c = ((((x - self.x0) / self.span) * (columns - 1) as f64).round() as usize).min(columns - 1);
        if y.is_finite() {
            self.lo[c] = self.lo[c].min(y);
            self.hi[c] = self.hi[c].max(y);
            self.seen[c] = true;
        }
    }

    fn segments(&self) -> Vec<Vec<(f64, f64)>> {
        let columns = self.lo.len();
        let mut segments = vec![Vec::new()];
        for c in 0..columns {
            if self.seen[c] {
                let x = self.x0 + self.span * c as f64 / (columns - 1).max(1) as f64;
                let seg = segments.last_mut().expect("never empty");
                seg.push((x, self.lo[c]));
                if self.hi[c] > self.lo[c] {
                    seg.push((x, self.hi[c]));
                }
            } else if !segments.last().is_some_and(|s| s.is_empty()) {
                segments.push(Vec::new());
            }
        }
        segments.retain(|s| !s.is_empty());
        segments
    }
}

/// Width of the grand-spectrum figure, pixels.
const GRAND_WIDTH: u32 = 1100;
/// Width of a histogram bin, sigma.
const HISTOGRAM_BIN: f64 = 0.25;

/// What the report draws of a grand spectrum, gathered in two passes over its values in
/// consecutive runs, so the values never need to be in memory together: the min/max per
/// pixel column (MHz, sigma) and the histogram of the finite values in bins of 0.25 sigma
/// from the lowest value (at most -5, at least -12) to the highest (at least 5, at most 40;
/// values beyond fall into the end bins).
#[derive(Debug, Clone)]
pub struct GrandDigest {
    segments: Vec<Vec<(f64, f64)>>,
    /// RF frequency of the first and last bin, MHz.
    x_range_mhz: (f64, f64),
    /// Lower edge of the first histogram bin, sigma.
    histogram_start: f64,
    counts: Vec<u64>,
    n_finite: usize,
}

impl GrandDigest {
    /// The digest of `n` bins, bin j at `rf_start_hz + j * bin_width_hz`, whose values
    /// `read(range)` returns run by run (each call a run of at most `run_bins` bins, twice
    /// over the whole range).
    pub fn read(
        n: usize,
        rf_start_hz: f64,
        bin_width_hz: f64,
        run_bins: usize,
        mut read: impl FnMut(std::ops::Range<usize>) -> anyhow::Result<Vec<f64>>,
    ) -> anyhow::Result<Self> {
        let runs = || (0..n.div_ceil(run_bins.max(1))).map(move |r| r * run_bins..((r + 1) * run_bins).min(n));
        let x = |j: usize| (rf_start_hz + j as f64 * bin_width_hz) / 1e6;
        let (mut lo, mut hi) = (-5.0f64, 5.0f64);
        for r in runs() {
            for v in read(r)?.into_iter().filter(|v| v.is_finite()) {
                (lo, hi) = (lo.min(v), hi.max(v));
            }
        }
        let (lo, hi) = (lo.max(-12.0), hi.min(40.0));
        let start = (lo / HISTOGRAM_BIN).floor() * HISTOGRAM_BIN;
        let n_hist = (((hi - start) / HISTOGRAM_BIN).ceil() as usize).max(1) + 1;
        let mut counts = vec![0u64; n_hist];
        let mut envelope = Envelope::new(x(0), x(n.saturating_sub(1)), GRAND_WIDTH as usize - 90);
        let mut n_finite = 0;
        for r in runs() {
            let first = r.start;
            for (i, v) in read(r)?.into_iter().enumerate() {
                envelope.add(x(first + i), v);
                if v.is_finite() {
                    counts[(((v - start) / HISTOGRAM_BIN).floor().max(0.0) as usize).min(n_hist - 1)] += 1;
                    n_finite += 1;
                }
            }
        }
        let segments = if n == 0 { Vec::new() } else { envelope.segments() };
        Ok(Self { segments, x_range_mhz: (x(0), x(n.saturating_sub(1))), histogram_start: start, counts, n_finite })
    }

    /// The digest of values held in memory.
    pub fn of(grand: &[f64], rf_start_hz: f64, bin_width_hz: f64) -> Self {
        Self::read(grand.len(), rf_start_hz, bin_width_hz, 1 << 16, |r| Ok(grand[r].to_vec())).expect("reading a slice cannot fail")
    }
}

/// The grand spectrum (MHz, sigma) with the threshold line and the candidates marked.
pub fn grand_spectrum(digest: &GrandDigest, threshold: Option<f64>, candidates: &[(f64, f64)]) -> anyhow::Result<String> {
    const W: u32 = GRAND_WIDTH;
    let segments = &digest.segments;
    let finite = || segments.iter().flatten().map(|p| p.1);
    let y_hi = finite().fold(threshold.unwrap_or(4.0) + 1.0, f64::max) + 0.5;
    let y_lo = finite().fold(-5.0, f64::min) - 0.5;
    let (x_lo, x_hi) = digest.x_range_mhz;
    svg(W, 420, |area| {
        let mut chart = ChartBuilder::on(area)
            .margin(12)
            .x_label_area_size(44)
            .y_label_area_size(56)
            .build_cartesian_2d(x_lo..x_hi.max(x_lo + 1e-6), y_lo..y_hi)
            .map_err(err)?;
        chart
            .configure_mesh()
            .max_light_lines(0)
            .bold_line_style(GRID)
            .x_desc("RF frequency (MHz)")
            .y_desc("grand spectrum (sigma)")
            .x_label_formatter(&|v| format!("{v:.1}"))
            .label_style(("sans-serif", 14))
            .draw()
            .map_err(err)?;
        chart.draw_series(segments.iter().map(|s| PathElement::new(s.clone(), INK.stroke_width(1)))).map_err(err)?;
        if let Some(t) = threshold {
            chart.draw_series(std::iter::once(PathElement::new([(x_lo, t), (x_hi, t)], ALERT.stroke_width(1)))).map_err(err)?;
        }
        chart.draw_series(candidates.iter().map(|&(f, s)| Circle::new((f / 1e6, s), 4, ALERT.stroke_width(2)))).map_err(err)?;
        Ok(())
    })
}

/// Histogram of the finite grand-spectrum values (log counts) against the unit normal
/// expected for the same number of bins.
pub fn histogram(digest: &GrandDigest, threshold: Option<f64>) -> anyhow::Result<String> {
    const BIN: f64 = HISTOGRAM_BIN;
    let (start, counts) = (digest.histogram_start, &digest.counts);
    let n_hist = counts.len();
    let normal = Normal::standard();
    let n = digest.n_finite as f64;
    let expected: Vec<(f64, f64)> =
        (0..=(n_hist * 8)).map(|i| start + i as f64 * BIN / 8.0).map(|x| (x, n * BIN * normal.pdf(x))).filter(|p| p.1 >= 0.05).collect();
    let y_hi = counts.iter().copied().max().unwrap_or(1).max(1) as f64 * 3.0;
    let x_hi = start + n_hist as f64 * BIN;
    svg(1100, 380, |area| {
        let mut chart = ChartBuilder::on(area)
            .margin(12)
            .x_label_area_size(44)
            .y_label_area_size(64)
            .build_cartesian_2d(start..x_hi, (0.3..y_hi).log_scale())
            .map_err(err)?;
        chart
            .configure_mesh()
            .max_light_lines(0)
            .bold_line_style(GRID)
            .x_desc("grand spectrum value (sigma)")
            .y_desc("bins per 0.25 sigma")
            .y_label_formatter(&|v| if *v >= 1.0 { format!("{v:.0}") } else { String::new() })
            .label_style(("sans-serif", 14))
            .draw()
            .map_err(err)?;
        chart
            .draw_series(counts.iter().enumerate().filter(|(_, c)| **c > 0).map(|(k, &c)| {
                let x = start + k as f64 * BIN;
                Rectangle::new([(x, 0.3), (x + BIN, c as f64)], INK.mix(0.55).filled())
            }))
            .map_err(err)?;
        chart.draw_series(std::iter::once(PathElement::new(expected.clone(), REFERENCE.stroke_width(2)))).map_err(err)?;
        if let Some(t) = threshold {
            chart.draw_series(std::iter::once(PathElement::new([(t, 0.3), (t, y_hi)], ALERT.stroke_width(1)))).map_err(err)?;
        }
        Ok(())
    })
}

/// Which quantity of a step a diagnostics panel shows.
#[derive(Debug, Clone, Copy)]
pub enum StepQuantity {
    /// System noise temperature, K.
    NoiseTemp,
    /// Loaded quality factor.
    LoadedQ,
    /// Antenna coupling beta.
    Coupling,
    /// Residual spread after the baseline, with its prediction.
    ResidualSpread,
}

/// One per-step panel against hours since the night's first step; cut steps in red.
pub fn step_panel(d: &StepDiagnostics, cut: &std::collections::HashSet<usize>, q: StepQuantity) -> anyhow::Result<String> {
    const W: u32 = 540;
    let t0 = d.steps.iter().map(|s| s.meta.timestamp_s).fold(f64::INFINITY, f64::min);
    let value = |s: &super::diagnostics::StepDiag| match q {
        StepQuantity::NoiseTemp => s.meta.noise_temp_k,
        StepQuantity::LoadedQ => s.meta.loaded_q,
        StepQuantity::Coupling => s.meta.coupling_beta,
        StepQuantity::ResidualSpread => s.residual_spread.unwrap_or(f64::NAN),
    };
    let mut kept: Vec<(f64, f64)> = Vec::new();
    let mut removed: Vec<(f64, f64)> = Vec::new();
    let mut predicted: Vec<(f64, f64)> = Vec::new();
    for s in &d.steps {
        let p = ((s.meta.timestamp_s - t0) / 3600.0, value(s));
        if cut.contains(&s.index) {
            removed.push(p)
        } else {
            kept.push(p)
        }
        if let (StepQuantity::ResidualSpread, Some(e)) = (q, d.predicted_spread(&s.meta)) {
            predicted.push((p.0, e));
        }
    }
    for v in [&mut kept, &mut removed, &mut predicted] {
        v.sort_by(|a, b| a.0.total_cmp(&b.0));
    }
    let ys = || kept.iter().chain(&removed).chain(&predicted).map(|p| p.1).filter(|v| v.is_finite());
    let (mut y_lo, mut y_hi) = (ys().fold(f64::INFINITY, f64::min), ys().fold(f64::NEG_INFINITY, f64::max));
    if !y_lo.is_finite() {
        (y_lo, y_hi) = (0.0, 1.0);
    }
    // A constant quantity gets a band of +-2 % around it rather than a vanishing range.
    let pad = if y_hi - y_lo > y_hi.abs() * 1e-6 { (y_hi - y_lo) * 0.08 } else { (y_hi.abs() * 0.02).max(1e-12) };
    let digits = (-((y_hi - y_lo + 2.0 * pad).log10()).floor() + 1.0).clamp(0.0, 6.0) as usize;
    let x_hi = kept.iter().chain(&removed).map(|p| p.0).fold(0.0, f64::max).max(1e-3);
    let name = match q {
        StepQuantity::NoiseTemp => "T_sys (K)",
        StepQuantity::LoadedQ => "Q_L",
        StepQuantity::Coupling => "coupling beta",
        StepQuantity::ResidualSpread => "residual spread",
    };
    let scientific = matches!(q, StepQuantity::ResidualSpread);
    let fmt = move |v: &f64| if scientific { format!("{v:.2e}") } else { format!("{v:.digits$}") };
    let columns = W as usize - 80;
    svg(W, 250, |area| {
        let mut chart = ChartBuilder::on(area)
            .margin(10)
            .x_label_area_size(38)
            .y_label_area_size(72)
            .build_cartesian_2d(0.0..x_hi, (y_lo - pad)..(y_hi + pad))
            .map_err(err)?;
        chart
            .configure_mesh()
            .max_light_lines(0)
            .bold_line_style(GRID)
            .x_desc("hours since the first step")
            .y_desc(name)
            .y_labels(6)
            .y_label_formatter(&fmt)
            .label_style(("sans-serif", 13))
            .draw()
            .map_err(err)?;
        chart.draw_series(column_envelope(&kept, columns).into_iter().map(|s| PathElement::new(s, INK.stroke_width(1)))).map_err(err)?;
        chart.draw_series(column_envelope(&predicted, columns).into_iter().map(|s| PathElement::new(s, REFERENCE.stroke_width(2)))).map_err(err)?;
        // Cut steps: one marker per pixel column at most.
        let marks: Vec<(f64, f64)> = column_envelope(&removed, columns).into_iter().flatten().collect();
        chart.draw_series(marks.into_iter().map(|p| Cross::new(p, 4, ALERT.stroke_width(2)))).map_err(err)?;
        Ok(())
    })
}

/// The exclusion curve: per pixel column the weakest limit on |g_agg| (columns holding a bin
/// that is not excluded become gaps), with the KSVZ and DFSZ lines.
pub fn exclusion(columns: &crate::limits::ExclusionColumns) -> anyhow::Result<String> {
    const W: u32 = 1100;
    // Per pixel column: the mass of its middle bin and its largest limit over the excluded
    // bins (None: none excluded), as the exclusion plot draws it.
    let reduced: Vec<(f64, Option<f64>)> = columns.envelope().into_iter().map(|(m, worst, _)| (m, worst)).collect();
    let mut segments = vec![Vec::new()];
    for &(m, g) in &reduced {
        match g {
            Some(g) => segments.last_mut().expect("never empty").push((m, g)),
            None if !segments.last().is_some_and(|s| s.is_empty()) => segments.push(Vec::new()),
            None => {}
        }
    }
    segments.retain(|s| !s.is_empty());
    let (m_lo, m_hi) = (reduced.first().map_or(1.0, |p| p.0), reduced.last().map_or(2.0, |p| p.0));
    let ksvz = |m: f64| g_agg_from_g_gamma_per_gev(G_GAMMA_KSVZ, m).abs();
    let dfsz = |m: f64| g_agg_from_g_gamma_per_gev(G_GAMMA_DFSZ, m).abs();
    let finite = || segments.iter().flatten().map(|p| p.1);
    let y_hi = finite().fold(ksvz(m_hi), f64::max) * 3.0;
    let y_lo = finite().fold(dfsz(m_lo), f64::min) / 3.0;
    svg(W, 420, |area| {
        let mut chart = ChartBuilder::on(area)
            .margin(12)
            .x_label_area_size(44)
            .y_label_area_size(84)
            .build_cartesian_2d(m_lo..m_hi.max(m_lo * (1.0 + 1e-9)), (y_lo..y_hi).log_scale())
            .map_err(err)?;
        chart
            .configure_mesh()
            .max_light_lines(0)
            .bold_line_style(GRID)
            .x_desc("axion mass (micro-eV)")
            .y_desc("|g_agg| (1/GeV)")
            .x_label_formatter(&|v| format!("{v:.3}"))
            .y_label_formatter(&|v| format!("{v:.1e}"))
            .label_style(("sans-serif", 14))
            .draw()
            .map_err(err)?;
        chart.draw_series(segments.iter().map(|s| PathElement::new(s.clone(), INK.stroke_width(2)))).map_err(err)?;
        for (colour, f) in [(ALERT, &ksvz as &dyn Fn(f64) -> f64), (REFERENCE, &dfsz)] {
            chart.draw_series(std::iter::once(PathElement::new([(m_lo, f(m_lo)), (m_hi, f(m_hi))], colour.stroke_width(2)))).map_err(err)?;
        }
        Ok(())
    })
}

/// Measured detection efficiency (with binomial error bars) against Phi(SNR - threshold).
pub fn efficiency(cal: &Calibration) -> anyhow::Result<String> {
    let x_max = cal.efficiency.iter().map(|p| p.snr).fold(cal.threshold + 3.0, f64::max) + 0.5;
    let normal = Normal::standard();
    let ideal: Vec<(f64, f64)> = (0..=200).map(|i| x_max * f64::from(i) / 200.0).map(|x| (x, normal.cdf(x - cal.threshold))).collect();
    svg(700, 360, |area| {
        let mut chart = ChartBuilder::on(area).margin(12).x_label_area_size(44).y_label_area_size(56).build_cartesian_2d(0.0..x_max, 0.0..1.05).map_err(err)?;
        chart
            .configure_mesh()
            .max_light_lines(0)
            .bold_line_style(GRID)
            .x_desc("injected SNR")
            .y_desc("fraction flagged")
            .label_style(("sans-serif", 14))
            .draw()
            .map_err(err)?;
        chart.draw_series(std::iter::once(PathElement::new(ideal.clone(), REFERENCE.stroke_width(2)))).map_err(err)?;
        chart
            .draw_series(cal.efficiency.iter().map(|p| {
                let (lo, hi) = ((p.efficiency - p.standard_error).max(0.0), (p.efficiency + p.standard_error).min(1.05));
                PathElement::new([(p.snr, lo), (p.snr, hi)], INK.stroke_width(2))
            }))
            .map_err(err)?;
        chart.draw_series(cal.efficiency.iter().map(|p| Circle::new((p.snr, p.efficiency), 4, INK.filled()))).map_err(err)?;
        Ok(())
    })
}

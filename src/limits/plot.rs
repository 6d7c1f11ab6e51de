//! The exclusion plot: limit on |g_agg| versus axion mass, with the KSVZ and DFSZ lines.

use crate::physics::constants::{G_GAMMA_DFSZ, G_GAMMA_KSVZ};
use crate::physics::units::g_agg_from_g_gamma_per_gev;
use plotters::prelude::*;
use std::path::Path;

const WIDTH: u32 = 1000;
const HEIGHT: u32 = 560;

/// Draws the exclusion curve of `columns` into a PNG and an SVG.
pub fn exclusion_plot(columns: &ExclusionColumns, title: &str, png: &Path, svg: &Path) -> anyhow::Result<()> {
    crate::fonts::register_fonts()?;
    let columns = columns.envelope();
    draw(&columns, title, BitMapBackend::new(png, (WIDTH, HEIGHT)).into_drawing_area())?;
    draw(&columns, title, SVGBackend::new(svg, (WIDTH, HEIGHT)).into_drawing_area())?;
    Ok(())
}

/// The curve reduced to one value per pixel column, gathered point by point in order
/// (mass in micro-eV, |g_agg| limit in GeV^-1; NaN = not excluded): points `c * per ..
/// (c + 1) * per` fall in column c, which keeps the largest (most conservative) limit and
/// the mass of its middle point; a column holding any point that is not excluded becomes a
/// gap, so candidates awaiting a rescan stay visible. Memory: three numbers per column,
/// whatever the number of points.
#[derive(Debug, Clone)]
pub struct ExclusionColumns {
    n_points: usize,
    per: usize,
    mass_uev: Vec<f64>,
    worst: Vec<f64>,
    gap: Vec<bool>,
}

impl ExclusionColumns {
    /// Empty columns for a curve of `n_points` points.
    pub fn new(n_points: usize) -> Self {
        let per = n_points.div_ceil(WIDTH as usize).max(1);
        let columns = n_points.div_ceil(per);
        Self { n_points, per, mass_uev: vec![f64::NAN; columns], worst: vec![f64::NEG_INFINITY; columns], gap: vec![false; columns] }
    }

    /// The columns of a whole curve.
    pub fn of_points(points: &[(f64, f64)]) -> Self {
        let mut columns = Self::new(points.len());
        columns.add(0, points.iter().copied());
        columns
    }

    /// Takes in consecutive points, the first being point `first` of the curve.
    pub fn add(&mut self, first: usize, points: impl IntoIterator<Item = (f64, f64)>) {
        for (i, (mass_uev, g)) in (first..self.n_points).zip(points) {
            let c = i / self.per;
            let in_column = self.per.min(self.n_points - c * self.per);
            if i - c * self.per == in_column / 2 {
                self.mass_uev[c] = mass_uev;
            }
            self.worst[c] = self.worst[c].max(g.abs());
            self.gap[c] |= !g.is_finite();
        }
    }

    /// Per column, (mass of its middle point, largest limit or None for a gap).
    fn envelope(&self) -> Vec<(f64, Option<f64>)> {
        (0..self.mass_uev.len()).map(|c| (self.mass_uev[c], (!self.gap[c]).then_some(self.worst[c]))).collect()
    }
}

fn draw<DB: DrawingBackend>(columns: &[(f64, Option<f64>)], title: &str, area: DrawingArea<DB, plotters::coord::Shift>) -> anyhow::Result<()>
where
    DB::ErrorType: 'static,
{
    let err = |e: &dyn std::fmt::Display| anyhow::anyhow!("{e}");
    area.fill(&WHITE).map_err(|e| err(&e))?;
    let (m_lo, m_hi) = (columns.first().map_or(1.0, |c| c.0), columns.last().map_or(2.0, |c| c.0));
    let ksvz = |m: f64| g_agg_from_g_gamma_per_gev(G_GAMMA_KSVZ, m).abs();
    let dfsz = |m: f64| g_agg_from_g_gamma_per_gev(G_GAMMA_DFSZ, m).abs();
    let finite: Vec<f64> = columns.iter().filter_map(|c| c.1).collect();
    let y_hi = finite.iter().copied().fold(ksvz(m_hi), f64::max) * 3.0;
    let y_lo = finite.iter().copied().fold(dfsz(m_lo), f64::min) / 3.0;
    let mut chart = ChartBuilder::on(&area)
        .caption(title, ("sans-serif", 20))
        .margin(12)
        .x_label_area_size(45)
        .y_label_area_size(80)
        .build_cartesian_2d(m_lo..m_hi.max(m_lo * (1.0 + 1e-9)), (y_lo..y_hi).log_scale())
        .map_err(|e| err(&e))?;
    chart
        .configure_mesh()
        .x_desc("axion mass (ueV)")
        .y_desc("|g_agg| (1/GeV)")
        .y_label_formatter(&|v| format!("{v:.1e}"))
        .label_style(("sans-serif", 14))
        .draw()
        .map_err(|e| err(&e))?;
    let mut segment = Vec::new();
    let mut segments = Vec::new();
    for &(m, g) in columns {
        match g {
            Some(g) => segment.push((m, g)),
            None if !segment.is_empty() => segments.push(std::mem::take(&mut segment)),
            None => {}
        }
    }
    segments.push(segment);
    for (i, s) in segments.into_iter().filter(|s| !s.is_empty()).enumerate() {
        let series = chart.draw_series(LineSeries::new(s, BLUE.stroke_width(2))).map_err(|e| err(&e))?;
        if i == 0 {
            series.label("excluded above this line (gaps: not excluded)").legend(|(x, y)| PathElement::new([(x, y), (x + 20, y)], BLUE));
        }
    }
    for (name, colour, f) in [("KSVZ", RED, &ksvz as &dyn Fn(f64) -> f64), ("DFSZ", GREEN, &dfsz)] {
        chart
            .draw_series(LineSeries::new([(m_lo, f(m_lo)), (m_hi, f(m_hi))], colour.stroke_width(2)))
            .map_err(|e| err(&e))?
            .label(name)
            .legend(move |(x, y)| PathElement::new([(x, y), (x + 20, y)], colour));
    }
    chart
        .configure_series_labels()
        .position(SeriesLabelPosition::UpperRight)
        .background_style(WHITE)
        .border_style(BLACK)
        .label_font(("sans-serif", 14))
        .draw()
        .map_err(|e| err(&e))?;
    area.present().map_err(|e| err(&e))?;
    Ok(())
}

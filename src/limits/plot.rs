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
/// (c + 1) * per` fall in column c, which keeps the largest (most conservative) limit over
/// its excluded points, the mass of its middle point, and whether it holds a point that is
/// not excluded. The curve runs through the columns with an excluded point (a gap where a
/// column has none); columns holding points not excluded (candidates awaiting a rescan, bins
/// without data) are marked along the bottom, so they stay visible even where, as on a wide
/// night, nearly every column holds one. Memory: four numbers per column, whatever the
/// number of points.
#[derive(Debug, Clone)]
pub struct ExclusionColumns {
    n_points: usize,
    per: usize,
    mass_uev: Vec<f64>,
    /// Largest excluded limit (-inf: none yet).
    worst: Vec<f64>,
    /// Holds a point not excluded.
    open: Vec<bool>,
}

/// One column to draw: mass of its middle point, largest excluded limit (None: no excluded
/// point), whether it holds a point not excluded.
type Column = (f64, Option<f64>, bool);

impl ExclusionColumns {
    /// Empty columns for a curve of `n_points` points.
    pub fn new(n_points: usize) -> Self {
        let per = n_points.div_ceil(WIDTH as usize).max(1);
        let columns = n_points.div_ceil(per);
        Self { n_points, per, mass_uev: vec![f64::NAN; columns], worst: vec![f64::NEG_INFINITY; columns], open: vec![false; columns] }
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
            let excluded = g.is_finite();
            self.worst[c] = if excluded { self.worst[c].max(g.abs()) } else { self.worst[c] };
            self.open[c] |= !excluded;
        }
    }

    /// The columns to draw: the mass of each one's middle point, its largest excluded limit
    /// (None: no excluded point) and whether it holds a point not excluded.
    pub fn envelope(&self) -> Vec<Column> {
        (0..self.mass_uev.len()).map(|c| (self.mass_uev[c], Some(self.worst[c]).filter(|w| w.is_finite()), self.open[c])).collect()
    }
}

fn draw<DB: DrawingBackend>(columns: &[Column], title: &str, area: DrawingArea<DB, plotters::coord::Shift>) -> anyhow::Result<()>
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
    for &(m, g, _) in columns {
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
            series.label("excluded above this line (worst bin per column)").legend(|(x, y)| PathElement::new([(x, y), (x + 20, y)], BLUE));
        }
    }
    // A short stroke at the bottom of each column holding bins not excluded.
    let tick_top = y_lo * (y_hi / y_lo).powf(0.03);
    let open: Vec<f64> = columns.iter().filter(|c| c.2).map(|c| c.0).collect();
    if !open.is_empty() {
        chart
            .draw_series(open.iter().map(|&m| PathElement::new([(m, y_lo), (m, tick_top)], MAGENTA.stroke_width(1))))
            .map_err(|e| err(&e))?
            .label("column holds bins not excluded (candidates, no data)")
            .legend(|(x, y)| PathElement::new([(x + 10, y - 5), (x + 10, y + 5)], MAGENTA));
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

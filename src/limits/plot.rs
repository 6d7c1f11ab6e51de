//! The exclusion plot: limit on |g_agg| versus axion mass, with the KSVZ and DFSZ lines.

use crate::physics::constants::{G_GAMMA_DFSZ, G_GAMMA_KSVZ};
use crate::physics::units::g_agg_from_g_gamma_per_gev;
use plotters::prelude::*;
use std::path::Path;

const WIDTH: u32 = 1000;
const HEIGHT: u32 = 560;

/// Draws `points` (mass in micro-eV, |g_agg| limit in GeV^-1; NaN = not excluded) into a PNG
/// and an SVG. Many points are reduced to the largest (most conservative) limit per pixel
/// column.
pub fn exclusion_plot(points: &[(f64, f64)], title: &str, png: &Path, svg: &Path) -> anyhow::Result<()> {
    crate::fonts::register_fonts()?;
    let columns = reduce_columns(points, WIDTH as usize);
    draw(&columns, title, BitMapBackend::new(png, (WIDTH, HEIGHT)).into_drawing_area())?;
    draw(&columns, title, SVGBackend::new(svg, (WIDTH, HEIGHT)).into_drawing_area())?;
    Ok(())
}

/// Per pixel column, the largest limit; a column holding any bin that is not excluded
/// becomes a gap, so candidates awaiting a rescan stay visible.
fn reduce_columns(points: &[(f64, f64)], columns: usize) -> Vec<(f64, Option<f64>)> {
    let per = points.len().div_ceil(columns.max(1)).max(1);
    points
        .chunks(per)
        .map(|c| {
            let all_excluded = c.iter().all(|p| p.1.is_finite());
            let worst = c.iter().map(|p| p.1.abs()).reduce(f64::max).filter(|_| all_excluded);
            (c[c.len() / 2].0, worst)
        })
        .collect()
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

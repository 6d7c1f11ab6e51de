//! The grand-spectrum plot (PNG and SVG), reduced to min/max per pixel column.

use crate::stage::Spectrum;
use plotters::prelude::*;
use std::path::Path;

const WIDTH: u32 = 1200;
const HEIGHT: u32 = 500;

/// Draws the grand spectrum with the threshold and the candidates marked.
pub fn grand_spectrum(sp: &Spectrum, png: &Path, svg: &Path) -> anyhow::Result<()> {
    crate::fonts::register_fonts()?;
    draw(sp, BitMapBackend::new(png, (WIDTH, HEIGHT)).into_drawing_area())?;
    draw(sp, SVGBackend::new(svg, (WIDTH, HEIGHT)).into_drawing_area())?;
    Ok(())
}

fn draw<DB: DrawingBackend>(sp: &Spectrum, area: DrawingArea<DB, plotters::coord::Shift>) -> anyhow::Result<()>
where
    DB::ErrorType: 'static,
{
    area.fill(&WHITE).map_err(|e| anyhow::anyhow!("{e}"))?;
    let n = sp.grand.len().max(1);
    let mhz = |j: usize| sp.freq_hz(j) / 1e6;
    let columns = (WIDTH as usize).min(n);
    let per = n.div_ceil(columns);
    let mut lo_pts = Vec::new();
    let mut hi_pts = Vec::new();
    for c in (0..n).step_by(per) {
        let vals: Vec<f64> = sp.grand[c..(c + per).min(n)].iter().copied().filter(|v| v.is_finite()).collect();
        if let (Some(lo), Some(hi)) = (vals.iter().copied().reduce(f64::min), vals.iter().copied().reduce(f64::max)) {
            lo_pts.push((mhz(c), lo));
            hi_pts.push((mhz(c), hi));
        }
    }
    let ymax = hi_pts.iter().map(|p| p.1).fold(sp.threshold.unwrap_or(4.0) + 1.0, f64::max);
    let ymin = lo_pts.iter().map(|p| p.1).fold(-5.0, f64::min);
    let err = |e: &dyn std::fmt::Display| anyhow::anyhow!("{e}");
    let mut chart = ChartBuilder::on(&area)
        .caption("Grand spectrum", ("sans-serif", 22))
        .margin(10)
        .x_label_area_size(45)
        .y_label_area_size(60)
        .build_cartesian_2d(mhz(0)..mhz(n - 1), ymin..ymax)
        .map_err(|e| err(&e))?;
    chart.configure_mesh().x_desc("RF frequency (MHz)").y_desc("normalised excess (sigma)").label_style(("sans-serif", 14)).draw().map_err(|e| err(&e))?;
    // One vertical stroke per pixel column from its minimum to its maximum: every extreme
    // bin stays visible however many bins share the column.
    chart
        .draw_series(lo_pts.iter().zip(&hi_pts).map(|(lo, hi)| PathElement::new([*lo, *hi], BLUE.stroke_width(1))))
        .map_err(|e| err(&e))?
        .label("grand spectrum (min/max per column)")
        .legend(|(x, y)| PathElement::new([(x, y), (x + 20, y)], BLUE));
    if let Some(t) = sp.threshold {
        chart
            .draw_series(LineSeries::new([(mhz(0), t), (mhz(n - 1), t)], RED.stroke_width(2)))
            .map_err(|e| err(&e))?
            .label(format!("threshold {t:.3}"))
            .legend(|(x, y)| PathElement::new([(x, y), (x + 20, y)], RED));
    }
    chart
        .draw_series(sp.candidates.iter().map(|c| Circle::new((c.frequency_hz / 1e6, c.significance), 5, RED.filled())))
        .map_err(|e| err(&e))?
        .label("rescan candidates")
        .legend(|(x, y)| Circle::new((x + 10, y), 4, RED.filled()));
    chart
        .configure_series_labels()
        .position(SeriesLabelPosition::LowerRight)
        .background_style(WHITE)
        .border_style(BLACK)
        .label_font(("sans-serif", 14))
        .draw()
        .map_err(|e| err(&e))?;
    area.present().map_err(|e| err(&e))?;
    Ok(())
}

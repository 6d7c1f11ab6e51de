//! The efficiency curve (PNG and SVG): measured points with binomial error bars, ideal curve.

use super::Calibration;
use plotters::prelude::*;
use statrs::distribution::{ContinuousCDF, Normal};
use std::path::Path;

/// Draws detection efficiency versus injected SNR beside Phi(SNR - Theta).
pub fn efficiency(cal: &Calibration, png: &Path, svg: &Path) -> anyhow::Result<()> {
    crate::fonts::register_fonts()?;
    draw(cal, BitMapBackend::new(png, (900, 560)).into_drawing_area())?;
    draw(cal, SVGBackend::new(svg, (900, 560)).into_drawing_area())?;
    Ok(())
}

fn draw<DB: DrawingBackend>(cal: &Calibration, area: DrawingArea<DB, plotters::coord::Shift>) -> anyhow::Result<()>
where
    DB::ErrorType: 'static,
{
    let err = |e: &dyn std::fmt::Display| anyhow::anyhow!("{e}");
    area.fill(&WHITE).map_err(|e| err(&e))?;
    let x_max = cal.efficiency.iter().map(|p| p.snr).fold(cal.threshold + 3.0, f64::max) + 0.5;
    let mut chart = ChartBuilder::on(&area)
        .caption(format!("Detection efficiency at threshold {:.3} (eta = {:.3})", cal.threshold, cal.attenuation.eta), ("sans-serif", 20))
        .margin(12)
        .x_label_area_size(45)
        .y_label_area_size(60)
        .build_cartesian_2d(0.0..x_max, 0.0..1.05)
        .map_err(|e| err(&e))?;
    chart
        .configure_mesh()
        .x_desc("injected SNR (expected grand-spectrum value, eta applied)")
        .y_desc("fraction flagged")
        .label_style(("sans-serif", 14))
        .draw()
        .map_err(|e| err(&e))?;
    let normal = Normal::standard();
    let ideal: Vec<(f64, f64)> = (0..=200).map(|i| x_max * f64::from(i) / 200.0).map(|x| (x, normal.cdf(x - cal.threshold))).collect();
    chart
        .draw_series(LineSeries::new(ideal, RED.stroke_width(2)))
        .map_err(|e| err(&e))?
        .label("ideal Phi(SNR - threshold)")
        .legend(|(x, y)| PathElement::new([(x, y), (x + 20, y)], RED));
    chart
        .draw_series(cal.efficiency.iter().map(|p| {
            let (lo, hi) = ((p.efficiency - p.standard_error).max(0.0), (p.efficiency + p.standard_error).min(1.05));
            PathElement::new([(p.snr, lo), (p.snr, hi)], BLUE.stroke_width(2))
        }))
        .map_err(|e| err(&e))?;
    chart
        .draw_series(cal.efficiency.iter().map(|p| Circle::new((p.snr, p.efficiency), 5, BLUE.filled())))
        .map_err(|e| err(&e))?
        .label("measured (binomial 1 sigma)")
        .legend(|(x, y)| Circle::new((x + 10, y), 4, BLUE.filled()));
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

//! The grand-spectrum plot (PNG and SVG), reduced to min/max per pixel column.
//!
//! The extremes of each column are gathered as the bins go by ([`Columns`]), so a grid of
//! any length is drawn from 2 x 1200 numbers, in memory and time independent of its size
//! once the bins are read.

use super::Bins;
use crate::simd::per_bin_loop;
use crate::stage::{Candidate, finite};
use plotters::prelude::*;
use rayon::prelude::*;
use std::path::Path;

const WIDTH: u32 = 1200;
/// Bins one task of [`Columns::add`] scans.
const PIECE_BINS: usize = 16384;
const HEIGHT: u32 = 500;

/// Minimum and maximum of the finite grand-spectrum values of each pixel column: bins
/// `c * per .. (c + 1) * per` fall in column c.
#[derive(Debug, Clone)]
pub struct Columns {
    n_bins: usize,
    per: usize,
    lo: Vec<f64>,
    hi: Vec<f64>,
}

impl Columns {
    /// Empty columns for a grid of `n_bins` bins.
    pub fn new(n_bins: usize) -> Self {
        let n = n_bins.max(1);
        let per = n.div_ceil((WIDTH as usize).min(n));
        let columns = n.div_ceil(per);
        Self { n_bins: n, per, lo: vec![f64::INFINITY; columns], hi: vec![f64::NEG_INFINITY; columns] }
    }

    /// Takes in consecutive bins (pieces of them in parallel; min and max do not depend on
    /// the order).
    pub fn add(&mut self, bins: &Bins<'_>) {
        let per = self.per;
        let parts: Vec<Vec<(usize, f64, f64)>> = bins
            .pieces(PIECE_BINS)
            .collect::<Vec<_>>()
            .par_iter()
            .map(|piece| {
                let mut found: Vec<(usize, f64, f64)> = Vec::new();
                let mut start = 0;
                while start < piece.grand.len() {
                    // The piece's bins in column c: start..end.
                    let c = (piece.first_bin + start) / per;
                    let end = ((c + 1) * per - piece.first_bin).min(piece.grand.len());
                    if let Some((lo, hi)) = finite_extremes(&piece.grand[start..end]) {
                        found.push((c, lo, hi));
                    }
                    start = end;
                }
                found
            })
            .collect();
        for (c, lo, hi) in parts.into_iter().flatten() {
            self.lo[c] = self.lo[c].min(lo);
            self.hi[c] = self.hi[c].max(hi);
        }
    }
}

per_bin_loop! {
    /// Minimum and maximum of the finite values of `x`; None if there is none. Eight
    /// interleaved running extremes, so the comparisons are not one serial chain and the loop
    /// vectorises (min and max are exact, whatever the order).
    fn finite_extremes(x: &[f64]) -> Option<(f64, f64)> {
        const LANES: usize = 8;
        let (mut lo, mut hi) = ([f64::INFINITY; LANES], [f64::NEG_INFINITY; LANES]);
        let mut groups = x.chunks_exact(LANES);
        for group in &mut groups {
            for lane in 0..LANES {
                // Selects rather than branches: infinities and NaN leave both as they were.
                let (v, finite) = (group[lane], finite(group[lane]));
                lo[lane] = if finite && v < lo[lane] { v } else { lo[lane] };
                hi[lane] = if finite && v > hi[lane] { v } else { hi[lane] };
            }
        }
        for &v in groups.remainder() {
            let finite = finite(v);
            lo[0] = if finite && v < lo[0] { v } else { lo[0] };
            hi[0] = if finite && v > hi[0] { v } else { hi[0] };
        }
        let (lo, hi) = (lo.into_iter().fold(f64::INFINITY, f64::min), hi.into_iter().fold(f64::NEG_INFINITY, f64::max));
        (lo <= hi).then_some((lo, hi))
    }
}

/// What the plot shows besides the columns.
pub struct PlotFacts<'a> {
    /// Bin-centre frequency of grid bin 0, Hz.
    pub origin_hz: f64,
    /// Bin width, Hz.
    pub bin_width_hz: f64,
    /// Threshold of the flag stage.
    pub threshold: Option<f64>,
    /// Every candidate.
    pub candidates: &'a [Candidate],
}

/// Height of the empty band above the data that holds the legend, as a fraction of the
/// data's range.
const LEGEND_BAND: f64 = 0.25;

/// Draws the grand spectrum with the threshold and the candidates marked.
pub fn grand_spectrum(columns: &Columns, facts: &PlotFacts<'_>, png: &Path, svg: &Path) -> anyhow::Result<()> {
    crate::fonts::register_fonts()?;
    draw(columns, facts, BitMapBackend::new(png, (WIDTH, HEIGHT)).into_drawing_area())?;
    draw(columns, facts, SVGBackend::new(svg, (WIDTH, HEIGHT)).into_drawing_area())?;
    Ok(())
}

fn draw<DB: DrawingBackend>(columns: &Columns, sp: &PlotFacts<'_>, area: DrawingArea<DB, plotters::coord::Shift>) -> anyhow::Result<()>
where
    DB::ErrorType: 'static,
{
    area.fill(&WHITE).map_err(|e| anyhow::anyhow!("{e}"))?;
    let n = columns.n_bins;
    let mhz = |j: usize| (sp.origin_hz + j as f64 * sp.bin_width_hz) / 1e6;
    let mut lo_pts = Vec::new();
    let mut hi_pts = Vec::new();
    for (c, (&lo, &hi)) in columns.lo.iter().zip(&columns.hi).enumerate().filter(|(_, (lo, _))| lo.is_finite()) {
        lo_pts.push((mhz(c * columns.per), lo));
        hi_pts.push((mhz(c * columns.per), hi));
    }
    let top = hi_pts.iter().map(|p| p.1).fold(sp.threshold.unwrap_or(4.0) + 1.0, f64::max);
    let ymin = lo_pts.iter().map(|p| p.1).fold(-5.0, f64::min);
    // A band above the data, a quarter of its range, holds the legend clear of every value.
    let ymax = top + LEGEND_BAND * (top - ymin);
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
        .position(SeriesLabelPosition::UpperRight)
        .background_style(WHITE)
        .border_style(BLACK)
        .label_font(("sans-serif", 14))
        .draw()
        .map_err(|e| err(&e))?;
    area.present().map_err(|e| err(&e))?;
    Ok(())
}

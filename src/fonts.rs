//! The plots' font: built into the binary, so no system fonts are needed.

/// Makes the built-in DejaVu Sans the plots' "sans-serif" font (no system fonts needed).
pub fn register_fonts() -> anyhow::Result<()> {
    plotters::style::register_font("sans-serif", plotters::style::FontStyle::Normal, dejavu::sans::regular())
        .map_err(|_| anyhow::anyhow!("cannot register the built-in font"))
}

//! Plots rendered on the server as SVG, from plain data structs.
//!
//! The four views of a calibration: V_pi versus frequency (with uncertainty bars and the other
//! calibrations of the same device in muted colours), the electro-optic response in dB (both on a
//! logarithmic frequency axis when the points are log-spaced, see [`axis`]), one
//! analyzer spectrum with the fitted comb lines marked, and modulation index versus peak drive
//! voltage at one frequency with the fitted line through the origin. They are built with plotters'
//! SVG backend and its built-in text estimate, so no font files are read: the browser renders the
//! `<text>` elements with its own sans-serif face. Inputs are plain structs, so the functions are
//! unit-tested without a database, and the HTTP handlers only fetch and convert.

pub mod axis;
mod modulation;
mod response;
mod spectrum;
mod style;
mod vpi;

pub use modulation::{modulation_index_svg, ModulationPlot, ModulationPoint};
pub use response::{response_of, response_svg};
pub use spectrum::{spectrum_svg, MarkedLine, SpectrumPlot};
pub use vpi::{vpi_svg, VpiCurve, VpiPoint};

/// Why a plot could not be drawn.
#[derive(Debug, thiserror::Error)]
pub enum PlotError {
    /// Nothing to draw (no finite values).
    #[error("nothing to plot: {0}")]
    Empty(String),
    /// The data cannot make this plot (the message says why).
    #[error("cannot plot these values: {0}")]
    BadData(String),
    /// The drawing backend failed.
    #[error("drawing the plot failed: {0}")]
    Drawing(String),
}

impl<E: std::error::Error + Send + Sync> From<plotters::drawing::DrawingAreaErrorKind<E>>
    for PlotError
{
    fn from(e: plotters::drawing::DrawingAreaErrorKind<E>) -> Self {
        PlotError::Drawing(e.to_string())
    }
}

/// Width and height of every plot, pixels (the SVG scales in the page).
pub const PLOT_SIZE: (u32, u32) = (720, 420);

/// Height of the heading drawn by [`heading`], pixels.
const HEADING_HEIGHT: u32 = 50;

/// Draws a title and, under it, a subtitle (what the plot shows and why) at the top of `root`;
/// returns the area below them for the chart.
pub(crate) fn heading<DB: plotters::prelude::DrawingBackend>(
    root: &plotters::prelude::DrawingArea<DB, plotters::coord::Shift>,
    title: &str,
    subtitle: &str,
) -> Result<plotters::prelude::DrawingArea<DB, plotters::coord::Shift>, PlotError> {
    use plotters::prelude::*;
    let (head, body) = root.split_vertically(HEADING_HEIGHT);
    head.draw(&Text::new(
        title.to_string(),
        (70, 10),
        (style::FONT, 18).into_font().color(&style::INK),
    ))?;
    if !subtitle.is_empty() {
        head.draw(&Text::new(
            subtitle.to_string(),
            (70, 32),
            (style::FONT, 12).into_font().color(&style::MUTED),
        ))?;
    }
    Ok(body)
}

/// The range of the finite values, padded by a fraction of its width (or by 1 when flat).
pub(crate) fn padded_range(values: impl Iterator<Item = f64>, pad: f64) -> Option<(f64, f64)> {
    let (lo, hi) = values
        .filter(|v| v.is_finite())
        .fold((f64::INFINITY, f64::NEG_INFINITY), |(lo, hi), v| {
            (lo.min(v), hi.max(v))
        });
    if !lo.is_finite() || !hi.is_finite() {
        return None;
    }
    let width = hi - lo;
    if width <= f64::EPSILON * hi.abs().max(1.0) {
        let margin = if lo.abs() > 0.0 { lo.abs() * 0.1 } else { 1.0 };
        return Some((lo - margin, hi + margin));
    }
    Some((lo - pad * width, hi + pad * width))
}

#[cfg(test)]
pub(crate) mod test_support {
    /// Parses the SVG as XML and counts the elements with this tag name.
    pub fn count_elements(svg: &str, tag: &str) -> usize {
        let document = roxmltree::Document::parse(svg).expect("the SVG must be well-formed XML");
        assert_eq!(document.root_element().tag_name().name(), "svg");
        document
            .descendants()
            .filter(|n| n.is_element() && n.tag_name().name() == tag)
            .count()
    }

    /// Number of `<polyline>` elements stroked in this colour (`#rrggbb`, any case).
    pub fn polylines_in(svg: &str, colour: &str) -> usize {
        let document = roxmltree::Document::parse(svg).expect("the SVG must be well-formed XML");
        document
            .descendants()
            .filter(|n| n.is_element() && n.tag_name().name() == "polyline")
            .filter(|n| {
                n.attribute("stroke")
                    .is_some_and(|s| s.eq_ignore_ascii_case(colour))
            })
            .count()
    }

    /// All text content of the SVG's `<text>` elements.
    pub fn texts(svg: &str) -> Vec<String> {
        let document = roxmltree::Document::parse(svg).expect("the SVG must be well-formed XML");
        document
            .descendants()
            .filter(|n| n.is_element() && n.tag_name().name() == "text")
            .map(|n| {
                n.descendants()
                    .filter(|d| d.is_text())
                    .filter_map(|d| d.text())
                    .collect::<String>()
                    .trim()
                    .to_string()
            })
            .collect()
    }
}

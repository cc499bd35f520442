//! Plots rendered on the server as SVG, from plain data structs.
//!
//! The four views of a calibration: V_pi versus frequency (with uncertainty bars and earlier
//! calibrations of the same device in muted colours), the electro-optic response in dB, one
//! analyzer spectrum with the fitted comb lines marked, and modulation index versus peak drive
//! voltage at one frequency with the fitted line through the origin. They are built with plotters'
//! SVG backend and its built-in text estimate, so no font files are read: the browser renders the
//! `<text>` elements with its own sans-serif face. Inputs are plain structs, so the functions are
//! unit-tested without a database, and the HTTP handlers only fetch and convert.

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

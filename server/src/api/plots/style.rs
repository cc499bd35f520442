//! The plots' shared look: a warm off-white ground, a deep teal for the current data, muted
//! slate for history, amber for fitted marks. Chosen for contrast when printed in grey too.

use plotters::style::RGBColor;

pub const BACKGROUND: RGBColor = RGBColor(0xfb, 0xfa, 0xf6);
pub const CURRENT: RGBColor = RGBColor(0x0b, 0x6e, 0x69);
pub const FIT: RGBColor = RGBColor(0xd9, 0x7a, 0x06);
pub const GRID: RGBColor = RGBColor(0xe4, 0xe1, 0xd8);
pub const INK: RGBColor = RGBColor(0x2a, 0x2d, 0x34);
/// Secondary text (subtitles).
pub const MUTED: RGBColor = RGBColor(0x6b, 0x6f, 0x78);

/// Colours of earlier curves, oldest last; they repeat when there are more curves.
pub const HISTORY: [RGBColor; 4] = [
    RGBColor(0x7c, 0x86, 0x9a),
    RGBColor(0x9f, 0x8f, 0xb5),
    RGBColor(0xa7, 0x9c, 0x86),
    RGBColor(0x8d, 0xa8, 0x9b),
];

/// Font family written into the SVG (the browser chooses the face).
pub const FONT: &str = "sans-serif";

use plotters::element::PathElement;
use plotters::style::ShapeStyle;

/// A vertical uncertainty bar from `low` to `high` at `x`, with caps `cap_half_width` wide on
/// each side (in data units). Drawn as one path so that markers stay the only circles.
pub fn uncertainty_bar(
    x: f64,
    low: f64,
    high: f64,
    cap_half_width: f64,
    style: ShapeStyle,
) -> PathElement<(f64, f64)> {
    PathElement::new(
        vec![
            (x - cap_half_width, low),
            (x + cap_half_width, low),
            (x, low),
            (x, high),
            (x - cap_half_width, high),
            (x + cap_half_width, high),
        ],
        style,
    )
}

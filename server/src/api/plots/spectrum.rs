//! One analyzer spectrum (power in dBm against optical frequency offset), with the whole-trace
//! fit drawn over it and its residual (trace minus model) in a strip underneath. Lines above the
//! floor are marked with a filled circle at their measured power; orders the fit puts below the
//! floor with a hollow circle on the fitted floor (so they are never drawn as markers under the
//! floor line), each labelled with its order; a legend says which is which.

use super::style::{BACKGROUND, CURRENT, FIT, FONT, GRID, HISTORY, INK};
use super::{padded_range, PlotError, PLOT_SIZE};
use plotters::prelude::*;
use serde::{Deserialize, Serialize};

/// A comb line found by the analysis.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct MarkedLine {
    /// Order n of the line (0 is the carrier).
    pub order: i32,
    /// Optical frequency of the line, Hz (absolute, same axis as the trace).
    pub frequency_hz: f64,
    pub power_dbm: f64,
    /// Whether the line rises above the floor; a line that does not is drawn on the floor.
    #[serde(default = "above_by_default")]
    pub above_floor: bool,
}

fn above_by_default() -> bool {
    true
}

/// A trace, its marked lines and, when the fit could be made, the model on the same axis.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct SpectrumPlot {
    pub title: String,
    pub frequency_hz: Vec<f64>,
    pub power_dbm: Vec<f64>,
    pub lines: Vec<MarkedLine>,
    /// The fitted model's displayed level at each trace point (dBm).
    #[serde(default)]
    pub model_dbm: Option<Vec<f64>>,
    /// The fitted floor (dBm), where lines below it are drawn.
    #[serde(default)]
    pub floor_dbm: Option<f64>,
}

/// Most points drawn for the trace; longer traces are reduced by keeping each bucket's maximum
/// (peaks stay visible, which is what matters on a comb).
const MAX_DRAWN_POINTS: usize = 1500;

/// Draws the trace, the model and its residual, and one `<circle>` marker per line.
pub fn spectrum_svg(plot: &SpectrumPlot) -> Result<String, PlotError> {
    let model = plot
        .model_dbm
        .as_ref()
        .filter(|m| m.len() == plot.frequency_hz.len());
    // (frequency, level, model level) of the finite points.
    let trace: Vec<(f64, f64, f64)> = plot
        .frequency_hz
        .iter()
        .zip(plot.power_dbm.iter())
        .enumerate()
        .filter(|(_, (f, p))| f.is_finite() && p.is_finite())
        .map(|(i, (&f, &p))| (f, p, model.map_or(f64::NAN, |m| m[i])))
        .collect();
    if trace.is_empty() {
        return Err(PlotError::Empty(
            "the trace has no finite points".to_string(),
        ));
    }
    // Offset from the trace centre, in GHz, so the axis reads in the comb's own scale.
    let centre = 0.5
        * (trace.iter().map(|p| p.0).fold(f64::INFINITY, f64::min)
            + trace.iter().map(|p| p.0).fold(f64::NEG_INFINITY, f64::max));
    let to_x = |f: f64| (f - centre) / 1e9;
    let reduced = reduce_keep_max(&trace, MAX_DRAWN_POINTS);
    let floor = plot.floor_dbm.filter(|f| f.is_finite());
    let marker_level = |l: &MarkedLine| match (l.above_floor, floor) {
        (false, Some(floor)) => floor,
        _ => l.power_dbm,
    };
    let (x_lo, x_hi) = padded_range(trace.iter().map(|p| to_x(p.0)), 0.01)
        .ok_or_else(|| PlotError::Empty("no frequencies".to_string()))?;
    let (y_lo, y_hi) = padded_range(
        trace
            .iter()
            .map(|p| p.1)
            .chain(plot.lines.iter().map(marker_level)),
        0.08,
    )
    .ok_or_else(|| PlotError::Empty("no powers".to_string()))?;
    let residual: Vec<(f64, f64)> = reduced
        .iter()
        .filter(|p| p.2.is_finite())
        .map(|p| (to_x(p.0), p.1 - p.2))
        .collect();
    let r_span = residual
        .iter()
        .map(|r| r.1.abs())
        .fold(0.5f64, f64::max)
        .min(20.0)
        * 1.1;

    let mut svg = String::new();
    {
        let root = SVGBackend::with_string(&mut svg, PLOT_SIZE).into_drawing_area();
        root.fill(&BACKGROUND)?;
        let (upper, lower) = if residual.is_empty() {
            (root.clone(), None)
        } else {
            let (u, l) = root.split_vertically(PLOT_SIZE.1 * 3 / 4);
            (u, Some(l))
        };
        let mut chart = ChartBuilder::on(&upper)
            .caption(plot.title.clone(), (FONT, 18).into_font().color(&INK))
            .margin(14)
            .x_label_area_size(if lower.is_some() { 0 } else { 42 })
            .y_label_area_size(56)
            .build_cartesian_2d(x_lo..x_hi, y_lo..y_hi)?;
        chart
            .configure_mesh()
            .light_line_style(GRID)
            .bold_line_style(GRID.mix(0.0))
            .axis_style(INK)
            .label_style((FONT, 13).into_font().color(&INK))
            .x_desc(format!("offset from {:.3} THz (GHz)", centre / 1e12))
            .y_desc("power (dBm)")
            .draw()?;
        chart.draw_series(LineSeries::new(
            reduced.iter().map(|&(f, p, _)| (to_x(f), p)),
            CURRENT.stroke_width(1),
        ))?;
        if model.is_some() {
            chart.draw_series(LineSeries::new(
                reduced
                    .iter()
                    .filter(|p| p.2.is_finite())
                    .map(|&(f, _, m)| (to_x(f), m)),
                FIT.stroke_width(1),
            ))?;
        }
        if let Some(floor) = floor {
            chart.draw_series(LineSeries::new(
                [(x_lo, floor), (x_hi, floor)],
                HISTORY[0].stroke_width(1),
            ))?;
        }
        let lines: Vec<&MarkedLine> = plot
            .lines
            .iter()
            .filter(|l| l.frequency_hz.is_finite() && marker_level(l).is_finite())
            .collect();
        chart.draw_series(lines.iter().map(|l| {
            let style = if l.above_floor || floor.is_none() {
                FIT.filled()
            } else {
                INK.stroke_width(1)
            };
            Circle::new((to_x(l.frequency_hz), marker_level(l)), 4, style)
        }))?;
        chart.draw_series(lines.iter().map(|l| {
            Text::new(
                format!("{:+}", l.order),
                (to_x(l.frequency_hz), marker_level(l) + 0.04 * (y_hi - y_lo)),
                (FONT, 11).into_font().color(&FIT),
            )
        }))?;
        // Legend, top right, in text glyphs and short paths (the markers stay the only circles).
        let entries: Vec<(&str, RGBColor, &str)> = [
            Some(("\u{2014}", CURRENT, "trace")),
            model.map(|_| ("\u{2014}", FIT, "fitted model")),
            floor.map(|_| ("\u{2014}", HISTORY[0], "fitted floor")),
            Some(("\u{25cf}", FIT, "line above the floor (measured)")),
            floor.map(|_| ("\u{25cb}", INK, "order below the floor (drawn on it)")),
        ]
        .into_iter()
        .flatten()
        .collect();
        for (row, (glyph, colour, label)) in entries.iter().enumerate() {
            let y = 40 + 15 * row as i32;
            let x = PLOT_SIZE.0 as i32 - 250;
            upper.draw(&Text::new(
                glyph.to_string(),
                (x, y),
                (FONT, 12).into_font().color(colour),
            ))?;
            upper.draw(&Text::new(
                label.to_string(),
                (x + 16, y),
                (FONT, 11).into_font().color(&INK),
            ))?;
        }
        if let Some(lower) = lower {
            let mut strip = ChartBuilder::on(&lower)
                .margin(14)
                .margin_top(0)
                .x_label_area_size(38)
                .y_label_area_size(56)
                .build_cartesian_2d(x_lo..x_hi, -r_span..r_span)?;
            strip
                .configure_mesh()
                .light_line_style(GRID)
                .bold_line_style(GRID.mix(0.0))
                .axis_style(INK)
                .y_labels(3)
                .label_style((FONT, 11).into_font().color(&INK))
                .x_desc(format!("offset from {:.3} THz (GHz)", centre / 1e12))
                .y_desc("residual (dB)")
                .draw()?;
            strip.draw_series(LineSeries::new(residual, CURRENT.stroke_width(1)))?;
        }
        root.present()?;
    }
    Ok(svg)
}

/// Reduces `points` to at most about `target` points by keeping the highest point of each
/// consecutive bucket.
fn reduce_keep_max(points: &[(f64, f64, f64)], target: usize) -> Vec<(f64, f64, f64)> {
    if points.len() <= target || target == 0 {
        return points.to_vec();
    }
    let bucket = points.len().div_ceil(target);
    points
        .chunks(bucket)
        .filter_map(|chunk| chunk.iter().copied().max_by(|a, b| a.1.total_cmp(&b.1)))
        .collect()
}

#[cfg(test)]
mod tests {
    use super::super::test_support::{count_elements, texts};
    use super::*;

    #[test]
    fn one_marker_per_fitted_line_and_orders_labelled() {
        let n = 4001;
        let centre = 193.4e12;
        let frequency_hz: Vec<f64> = (0..n)
            .map(|i| centre - 20e9 + 40e9 * i as f64 / (n - 1) as f64)
            .collect();
        let lines: Vec<MarkedLine> = (-3..=3)
            .map(|order| MarkedLine {
                order,
                frequency_hz: centre + f64::from(order) * 5e9,
                power_dbm: -10.0 - 3.0 * f64::from(order.abs()),
                above_floor: order.abs() < 3,
            })
            .collect();
        let power_dbm: Vec<f64> = frequency_hz
            .iter()
            .map(|&f| {
                lines
                    .iter()
                    .map(|l| l.power_dbm - ((f - l.frequency_hz) / 0.2e9).powi(2))
                    .fold(-70.0, f64::max)
            })
            .collect();
        let model_dbm: Vec<f64> = power_dbm.iter().map(|p| p + 0.1).collect();
        let svg = spectrum_svg(&SpectrumPlot {
            title: "run 1, 5 GHz, 10 dBm".into(),
            frequency_hz: frequency_hz.clone(),
            power_dbm: power_dbm.clone(),
            lines: lines.clone(),
            model_dbm: Some(model_dbm),
            floor_dbm: Some(-70.0),
        })
        .unwrap();
        assert_eq!(count_elements(&svg, "circle"), 7);
        // The legend names the model and the orders below the floor; the residual has its axis.
        let labels = texts(&svg);
        assert!(labels.iter().any(|t| t == "fitted model"), "{labels:?}");
        assert!(labels
            .iter()
            .any(|t| t.starts_with("order below the floor")));
        assert!(labels.iter().any(|t| t == "residual (dB)"));
        // Without a model: no residual strip.
        let plain = spectrum_svg(&SpectrumPlot {
            title: "plain".into(),
            frequency_hz,
            power_dbm,
            lines,
            model_dbm: None,
            floor_dbm: None,
        })
        .unwrap();
        assert_eq!(count_elements(&plain, "circle"), 7);
        assert!(!texts(&plain).iter().any(|t| t == "residual (dB)"));
        let labels = texts(&svg);
        assert!(labels.iter().any(|t| t == "+0"));
        assert!(labels.iter().any(|t| t == "-3"));
    }

    #[test]
    fn reduction_keeps_peaks() {
        let points: Vec<(f64, f64, f64)> = (0..10_000)
            .map(|i| (i as f64, if i == 5_003 { 10.0 } else { 0.0 }, 0.0))
            .collect();
        let reduced = reduce_keep_max(&points, 100);
        assert!(reduced.len() <= 100);
        assert!(reduced.iter().any(|p| p.1 == 10.0));
    }

    #[test]
    fn empty_trace_is_an_error() {
        let plot = SpectrumPlot {
            title: "empty".into(),
            frequency_hz: vec![],
            power_dbm: vec![],
            lines: vec![],
            model_dbm: None,
            floor_dbm: None,
        };
        assert!(spectrum_svg(&plot).is_err());
    }
}

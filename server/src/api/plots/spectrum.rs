//! One analyzer spectrum (power in dBm against optical frequency offset), with the fitted comb
//! lines marked at their measured power and labelled with their order.

use super::style::{BACKGROUND, CURRENT, FIT, FONT, GRID, INK};
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
}

/// A trace and its marked lines.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct SpectrumPlot {
    pub title: String,
    pub frequency_hz: Vec<f64>,
    pub power_dbm: Vec<f64>,
    pub lines: Vec<MarkedLine>,
}

/// Most points drawn for the trace; longer traces are reduced by keeping each bucket's maximum
/// (peaks stay visible, which is what matters on a comb).
const MAX_DRAWN_POINTS: usize = 1500;

/// Draws the trace and one `<circle>` marker per line.
pub fn spectrum_svg(plot: &SpectrumPlot) -> Result<String, PlotError> {
    let trace: Vec<(f64, f64)> = plot
        .frequency_hz
        .iter()
        .zip(plot.power_dbm.iter())
        .filter(|(f, p)| f.is_finite() && p.is_finite())
        .map(|(&f, &p)| (f, p))
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
    let (x_lo, x_hi) = padded_range(trace.iter().map(|p| to_x(p.0)), 0.01)
        .ok_or_else(|| PlotError::Empty("no frequencies".to_string()))?;
    let (y_lo, y_hi) = padded_range(
        trace
            .iter()
            .map(|p| p.1)
            .chain(plot.lines.iter().map(|l| l.power_dbm)),
        0.08,
    )
    .ok_or_else(|| PlotError::Empty("no powers".to_string()))?;

    let mut svg = String::new();
    {
        let root = SVGBackend::with_string(&mut svg, PLOT_SIZE).into_drawing_area();
        root.fill(&BACKGROUND)?;
        let mut chart = ChartBuilder::on(&root)
            .caption(plot.title.clone(), (FONT, 18).into_font().color(&INK))
            .margin(14)
            .x_label_area_size(42)
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
            reduced.iter().map(|&(f, p)| (to_x(f), p)),
            CURRENT.stroke_width(1),
        ))?;
        let lines: Vec<&MarkedLine> = plot
            .lines
            .iter()
            .filter(|l| l.frequency_hz.is_finite() && l.power_dbm.is_finite())
            .collect();
        chart.draw_series(
            lines
                .iter()
                .map(|l| Circle::new((to_x(l.frequency_hz), l.power_dbm), 4, FIT.filled())),
        )?;
        chart.draw_series(lines.iter().map(|l| {
            Text::new(
                format!("{:+}", l.order),
                (to_x(l.frequency_hz), l.power_dbm + 0.04 * (y_hi - y_lo)),
                (FONT, 11).into_font().color(&FIT),
            )
        }))?;
        root.present()?;
    }
    Ok(svg)
}

/// Reduces `points` to at most about `target` points by keeping the highest point of each
/// consecutive bucket.
fn reduce_keep_max(points: &[(f64, f64)], target: usize) -> Vec<(f64, f64)> {
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
        let svg = spectrum_svg(&SpectrumPlot {
            title: "run 1, 5 GHz, 10 dBm".into(),
            frequency_hz,
            power_dbm,
            lines,
        })
        .unwrap();
        assert_eq!(count_elements(&svg, "circle"), 7);
        let labels = texts(&svg);
        assert!(labels.iter().any(|t| t == "+0"));
        assert!(labels.iter().any(|t| t == "-3"));
    }

    #[test]
    fn reduction_keeps_peaks() {
        let points: Vec<(f64, f64)> = (0..10_000)
            .map(|i| (i as f64, if i == 5_003 { 10.0 } else { 0.0 }))
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
        };
        assert!(spectrum_svg(&plot).is_err());
    }
}

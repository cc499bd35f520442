//! V_pi versus frequency, with standard-uncertainty bars, and earlier calibrations overlaid.

use super::style::{uncertainty_bar, BACKGROUND, CURRENT, FONT, GRID, HISTORY, INK};
use super::{padded_range, PlotError, PLOT_SIZE};
use plotters::prelude::*;
use serde::{Deserialize, Serialize};

/// V_pi at one frequency with its standard uncertainty.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct VpiPoint {
    pub frequency_hz: f64,
    pub v_pi_volts: f64,
    pub v_pi_uncertainty_volts: f64,
}

/// One calibration of a device: a label (run and date) and its points.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct VpiCurve {
    pub label: String,
    pub points: Vec<VpiPoint>,
}

/// Draws `current` with markers and uncertainty bars, and each of `earlier` as a thin line.
/// Markers: one `<circle>` per finite point of the current curve.
pub fn vpi_svg(current: &VpiCurve, earlier: &[VpiCurve]) -> Result<String, PlotError> {
    let finite = |p: &&VpiPoint| p.frequency_hz.is_finite() && p.v_pi_volts.is_finite();
    let all = || {
        std::iter::once(current)
            .chain(earlier.iter())
            .flat_map(|c| c.points.iter())
            .filter(finite)
    };
    let (f_lo, f_hi) = padded_range(all().map(|p| p.frequency_hz / 1e9), 0.04)
        .ok_or_else(|| PlotError::Empty("no V_pi values".to_string()))?;
    let (v_lo, v_hi) = padded_range(
        all().flat_map(|p| {
            let u = if p.v_pi_uncertainty_volts.is_finite() {
                p.v_pi_uncertainty_volts.abs()
            } else {
                0.0
            };
            [p.v_pi_volts - u, p.v_pi_volts + u]
        }),
        0.08,
    )
    .ok_or_else(|| PlotError::Empty("no V_pi values".to_string()))?;

    let mut svg = String::new();
    {
        let root = SVGBackend::with_string(&mut svg, PLOT_SIZE).into_drawing_area();
        root.fill(&BACKGROUND)?;
        let mut chart = ChartBuilder::on(&root)
            .caption(
                format!("V\u{3c0} versus frequency \u{2014} {}", current.label),
                (FONT, 18).into_font().color(&INK),
            )
            .margin(14)
            .x_label_area_size(42)
            .y_label_area_size(56)
            .build_cartesian_2d(f_lo..f_hi, v_lo..v_hi)?;
        chart
            .configure_mesh()
            .light_line_style(GRID)
            .bold_line_style(GRID.mix(0.0))
            .axis_style(INK)
            .label_style((FONT, 13).into_font().color(&INK))
            .x_desc("RF frequency (GHz)")
            .y_desc("V\u{3c0} (V)")
            .draw()?;

        for (i, curve) in earlier.iter().enumerate() {
            let colour = HISTORY[i % HISTORY.len()];
            chart.draw_series(LineSeries::new(
                sorted(curve).map(|p| (p.frequency_hz / 1e9, p.v_pi_volts)),
                colour.stroke_width(1),
            ))?;
        }
        chart.draw_series(LineSeries::new(
            sorted(current).map(|p| (p.frequency_hz / 1e9, p.v_pi_volts)),
            CURRENT.stroke_width(2),
        ))?;
        chart.draw_series(sorted(current).filter_map(|p| {
            let u = p.v_pi_uncertainty_volts;
            (u.is_finite() && u > 0.0).then(|| {
                uncertainty_bar(
                    p.frequency_hz / 1e9,
                    p.v_pi_volts - u,
                    p.v_pi_volts + u,
                    0.006 * (f_hi - f_lo),
                    CURRENT.stroke_width(1),
                )
            })
        }))?;
        chart.draw_series(
            sorted(current)
                .map(|p| Circle::new((p.frequency_hz / 1e9, p.v_pi_volts), 4, CURRENT.filled())),
        )?;

        // Legend as plain text, one line per curve, in the curve's colour.
        let legend = std::iter::once((current.label.as_str(), CURRENT))
            .chain(
                earlier
                    .iter()
                    .enumerate()
                    .map(|(i, c)| (c.label.as_str(), HISTORY[i % HISTORY.len()])),
            )
            .take(6);
        for (row, (label, colour)) in legend.enumerate() {
            let y = 44 + 16 * i32::try_from(row).unwrap_or(0);
            root.draw(&Text::new(
                format!("\u{2014} {label}"),
                (PLOT_SIZE.0 as i32 - 250, y),
                (FONT, 12).into_font().color(&colour),
            ))?;
        }
        root.present()?;
    }
    Ok(svg)
}

fn sorted(curve: &VpiCurve) -> impl Iterator<Item = VpiPoint> {
    let mut points: Vec<VpiPoint> = curve
        .points
        .iter()
        .copied()
        .filter(|p| p.frequency_hz.is_finite() && p.v_pi_volts.is_finite())
        .collect();
    points.sort_by(|a, b| a.frequency_hz.total_cmp(&b.frequency_hz));
    points.into_iter()
}

#[cfg(test)]
mod tests {
    use super::super::test_support::{count_elements, polylines_in, texts};
    use super::*;

    fn curve(label: &str, scale: f64) -> VpiCurve {
        // Invented demo-like values: V_pi rising with frequency (shape only; common practice).
        VpiCurve {
            label: label.to_string(),
            points: [1e9, 5e9, 10e9, 20e9, 30e9]
                .iter()
                .map(|&f| VpiPoint {
                    frequency_hz: f,
                    v_pi_volts: scale * (3.0 + 0.4 * (f / 1e9).sqrt()),
                    v_pi_uncertainty_volts: 0.05,
                })
                .collect(),
        }
    }

    #[test]
    fn one_marker_per_current_point_and_history_overlaid() {
        let svg = vpi_svg(
            &curve("run 7", 1.0),
            &[curve("run 3", 1.02), curve("run 1", 0.97)],
        )
        .unwrap();
        assert_eq!(count_elements(&svg, "circle"), 5);
        // Each earlier curve is one line in its own history colour; the current curve is one
        // line plus one path per uncertainty bar in the current colour.
        assert_eq!(polylines_in(&svg, "#7c869a"), 1);
        assert_eq!(polylines_in(&svg, "#9f8fb5"), 1);
        assert_eq!(polylines_in(&svg, "#0b6e69"), 1 + 5);
        let all_text = texts(&svg).join("|");
        assert!(all_text.contains("RF frequency (GHz)"));
        assert!(all_text.contains("run 3"));
    }

    #[test]
    fn empty_curve_is_an_error_not_a_panic() {
        let empty = VpiCurve {
            label: "none".into(),
            points: vec![],
        };
        assert!(matches!(vpi_svg(&empty, &[]), Err(PlotError::Empty(_))));
    }
}

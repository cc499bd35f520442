//! V_pi versus frequency, with standard-uncertainty bars, and the device's other calibrations
//! overlaid; the frequency axis is logarithmic when the shown run's points are log-spaced
//! ([`super::axis`]).

use super::axis::FrequencyAxis;
use super::style::{uncertainty_bar, BACKGROUND, CURRENT, FONT, GRID, HISTORY, INK};
use super::{heading, padded_range, PlotError, PLOT_SIZE};
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

/// Draws `current` with markers and uncertainty bars, and each of `earlier` as a thin line;
/// `subtitle` (which run is shown and why) goes under the title. Markers: one `<circle>` per
/// finite point of the current curve.
pub fn vpi_svg(
    current: &VpiCurve,
    earlier: &[VpiCurve],
    subtitle: &str,
) -> Result<String, PlotError> {
    let finite = |p: &&VpiPoint| p.frequency_hz.is_finite() && p.v_pi_volts.is_finite();
    let all = || {
        std::iter::once(current)
            .chain(earlier.iter())
            .flat_map(|c| c.points.iter())
            .filter(finite)
    };
    let current_hz: Vec<f64> = current.points.iter().map(|p| p.frequency_hz).collect();
    let all_hz: Vec<f64> = all().map(|p| p.frequency_hz).collect();
    let axis = FrequencyAxis::new(&current_hz, &all_hz)
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
        let body = heading(
            &root,
            &format!("V\u{3c0} versus frequency \u{2014} {}", current.label),
            subtitle,
        )?;
        let mut chart = ChartBuilder::on(&body)
            .margin(14)
            .margin_top(4)
            .x_label_area_size(42)
            .y_label_area_size(56)
            .build_cartesian_2d(axis.coord(), v_lo..v_hi)?;
        let label = |x: &f64| axis.label(x);
        chart
            .configure_mesh()
            .light_line_style(GRID)
            .bold_line_style(GRID.mix(0.0))
            .axis_style(INK)
            .label_style((FONT, 13).into_font().color(&INK))
            .x_label_formatter(&label)
            .x_desc(axis.description())
            .y_desc("V\u{3c0} (V)")
            .draw()?;

        for (i, curve) in earlier.iter().enumerate() {
            let colour = HISTORY[i % HISTORY.len()];
            chart.draw_series(LineSeries::new(
                sorted(curve).map(|p| (axis.x(p.frequency_hz), p.v_pi_volts)),
                colour.stroke_width(1),
            ))?;
        }
        chart.draw_series(LineSeries::new(
            sorted(current).map(|p| (axis.x(p.frequency_hz), p.v_pi_volts)),
            CURRENT.stroke_width(2),
        ))?;
        chart.draw_series(sorted(current).filter_map(|p| {
            let u = p.v_pi_uncertainty_volts;
            (u.is_finite() && u > 0.0).then(|| {
                uncertainty_bar(
                    axis.x(p.frequency_hz),
                    p.v_pi_volts - u,
                    p.v_pi_volts + u,
                    axis.cap_half_width(),
                    CURRENT.stroke_width(1),
                )
            })
        }))?;
        chart
            .draw_series(sorted(current).map(|p| {
                Circle::new((axis.x(p.frequency_hz), p.v_pi_volts), 4, CURRENT.filled())
            }))?;

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
            let y = 70 + 16 * i32::try_from(row).unwrap_or(0);
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
            "run 7, pinned reference calibration",
        )
        .unwrap();
        assert_eq!(count_elements(&svg, "circle"), 5);
        // Each earlier curve is one line in its own history colour; the current curve is one
        // line plus one path per uncertainty bar in the current colour.
        assert_eq!(polylines_in(&svg, "#7c869a"), 1);
        assert_eq!(polylines_in(&svg, "#9f8fb5"), 1);
        assert_eq!(polylines_in(&svg, "#0b6e69"), 1 + 5);
        let all_text = texts(&svg).join("|");
        assert!(all_text.contains("RF frequency (GHz"));
        assert!(all_text.contains("run 3"));
        assert!(all_text.contains("run 7, pinned reference calibration"));
    }

    /// The x positions of the markers, left to right.
    fn marker_x(svg: &str) -> Vec<f64> {
        let document = roxmltree::Document::parse(svg).unwrap();
        let mut x: Vec<f64> = document
            .descendants()
            .filter(|n| n.has_tag_name("circle"))
            .map(|n| n.attribute("cx").unwrap().parse().unwrap())
            .collect();
        x.sort_by(f64::total_cmp);
        x
    }

    fn spaced(frequencies_hz: &[f64]) -> VpiCurve {
        VpiCurve {
            label: "run 1".into(),
            points: frequencies_hz
                .iter()
                .map(|&f| VpiPoint {
                    frequency_hz: f,
                    v_pi_volts: 3.0 + 0.1 * (f / 1e9).sqrt(),
                    v_pi_uncertainty_volts: 0.01,
                })
                .collect(),
        }
    }

    #[test]
    fn log_spaced_points_spread_evenly_on_a_logarithmic_axis() {
        // The demo's grid: 21 frequencies log-spaced from 0.2 to 20 GHz. On a linear axis the
        // first 11 (0.2 to 2 GHz) would share the leftmost tenth of the width.
        let grid: Vec<f64> = (0..21)
            .map(|i| 0.2e9 * 100f64.powf(f64::from(i) / 20.0))
            .collect();
        let svg = vpi_svg(&spaced(&grid), &[], "").unwrap();
        let x = marker_x(&svg);
        assert_eq!(x.len(), 21);
        let steps: Vec<f64> = x.windows(2).map(|w| w[1] - w[0]).collect();
        let (min, max) = steps.iter().fold((f64::INFINITY, 0.0f64), |(lo, hi), s| {
            (lo.min(*s), hi.max(*s))
        });
        assert!(
            min > 20.0 && max - min <= 1.5,
            "even steps in pixels: {steps:?}"
        );
        let labels = texts(&svg);
        for tick in ["0.2", "0.5", "1", "2", "5", "10", "20"] {
            assert!(
                labels.iter().any(|l| l == tick),
                "tick {tick} in {labels:?}"
            );
        }
        assert!(labels.iter().any(|l| l.contains("logarithmic")));

        // A linear grid keeps a linear axis: equal steps in frequency, equal steps on the page.
        let linear: Vec<f64> = (0..5).map(|i| 1e9 + f64::from(i) * 4.75e9).collect();
        let svg = vpi_svg(&spaced(&linear), &[], "").unwrap();
        let x = marker_x(&svg);
        let steps: Vec<f64> = x.windows(2).map(|w| w[1] - w[0]).collect();
        assert!(
            steps.iter().all(|s| (s - steps[0]).abs() <= 1.5),
            "{steps:?}"
        );
        assert!(!texts(&svg).iter().any(|l| l.contains("logarithmic")));
    }

    #[test]
    fn empty_curve_is_an_error_not_a_panic() {
        let empty = VpiCurve {
            label: "none".into(),
            points: vec![],
        };
        assert!(matches!(vpi_svg(&empty, &[], ""), Err(PlotError::Empty(_))));
    }
}

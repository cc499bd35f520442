//! The electro-optic response in dB, 20 log10(V_pi(f_ref) / V_pi(f)) referred to the lowest
//! calibrated frequency, drawn with its uncertainty bars and the -3 dB and -6 dB levels as guides,
//! on a logarithmic frequency axis when the points are log-spaced ([`super::axis`]).
//!
//! The numbers come from [`crate::analysis::response_curve`], the one place that defines the
//! response, its uncertainty and the -3 dB / -6 dB frequencies; this module only prepares its
//! input and draws. Preparing means two things the analysis refuses on purpose: points with a
//! non-finite frequency or a non-positive V_pi are left out, and two values at the same frequency
//! (a calibration stored with a repeated frequency) are combined into one by their
//! inverse-variance weighted mean, as the analysis asks its caller to do.

use super::axis::FrequencyAxis;
use super::style::{uncertainty_bar, BACKGROUND, CURRENT, FIT, FONT, GRID, INK};
use super::vpi::VpiCurve;
use super::{heading, padded_range, PlotError, PLOT_SIZE};
use crate::analysis::{response_curve, ResponseCurve, VpiAtFrequency};
use halfwave_units::{Hz, VoltsPeak};
use plotters::prelude::*;

/// The response of `curve`: usable points only, one per frequency (see the module documentation).
pub fn response_of(curve: &VpiCurve) -> Result<ResponseCurve, PlotError> {
    let mut points: Vec<VpiAtFrequency> = curve
        .points
        .iter()
        .filter(|p| {
            p.frequency_hz.is_finite()
                && p.frequency_hz >= 0.0
                && p.v_pi_volts.is_finite()
                && p.v_pi_volts > 0.0
        })
        .map(|p| VpiAtFrequency {
            frequency: Hz(p.frequency_hz),
            v_pi: VoltsPeak(p.v_pi_volts),
            uncertainty: VoltsPeak(if p.v_pi_uncertainty_volts.is_finite() {
                p.v_pi_uncertainty_volts.abs()
            } else {
                0.0
            }),
        })
        .collect();
    if points.is_empty() {
        return Err(PlotError::Empty("no positive V_pi values".to_string()));
    }
    points.sort_by(|a, b| a.frequency.0.total_cmp(&b.frequency.0));
    let merged = merge_equal_frequencies(&points);
    response_curve(&merged).map_err(|e| PlotError::BadData(e.to_string()))
}

/// Combines runs of values at the same frequency (the input is sorted by frequency) into their
/// inverse-variance weighted mean with uncertainty 1 / sqrt(sum of weights). Values given without
/// uncertainty (0) count as exact: their plain mean is used, with uncertainty 0.
fn merge_equal_frequencies(sorted: &[VpiAtFrequency]) -> Vec<VpiAtFrequency> {
    sorted
        .chunk_by(|a, b| a.frequency == b.frequency)
        .map(|group| match group {
            [single] => *single,
            _ => {
                let exact: Vec<f64> = group
                    .iter()
                    .filter(|p| p.uncertainty.0 == 0.0)
                    .map(|p| p.v_pi.0)
                    .collect();
                let (v_pi, uncertainty) = if exact.is_empty() {
                    let weights = group
                        .iter()
                        .map(|p| 1.0 / (p.uncertainty.0 * p.uncertainty.0));
                    let sum_w: f64 = weights.clone().sum();
                    let sum_wv: f64 = weights.zip(group).map(|(w, p)| w * p.v_pi.0).sum();
                    (sum_wv / sum_w, 1.0 / sum_w.sqrt())
                } else {
                    (exact.iter().sum::<f64>() / exact.len() as f64, 0.0)
                };
                VpiAtFrequency {
                    frequency: group[0].frequency,
                    v_pi: VoltsPeak(v_pi),
                    uncertainty: VoltsPeak(uncertainty),
                }
            }
        })
        .collect()
}

/// Draws the response with one `<circle>` marker per (merged) point, uncertainty bars as paths,
/// the -3 dB and -6 dB guides, and the frequencies where the response crosses them; `subtitle`
/// (which run is shown and why) goes under the title.
pub fn response_svg(curve: &VpiCurve, subtitle: &str) -> Result<String, PlotError> {
    let response = response_of(curve)?;
    let ghz = |f: Hz| f.0 / 1e9;
    let frequencies_hz: Vec<f64> = response.points.iter().map(|p| p.frequency_hz.0).collect();
    let axis = FrequencyAxis::new(&frequencies_hz, &frequencies_hz)
        .ok_or_else(|| PlotError::Empty("no frequencies".to_string()))?;
    let (f_lo, f_hi) = axis.bounds();
    let (r_lo, r_hi) = padded_range(
        response
            .points
            .iter()
            .flat_map(|p| {
                [
                    p.response_db - p.response_uncertainty_db,
                    p.response_db + p.response_uncertainty_db,
                ]
            })
            .chain([0.0, -6.5]),
        0.05,
    )
    .ok_or_else(|| PlotError::Empty("no response values".to_string()))?;

    let mut svg = String::new();
    {
        let root = SVGBackend::with_string(&mut svg, PLOT_SIZE).into_drawing_area();
        root.fill(&BACKGROUND)?;
        let body = heading(
            &root,
            &format!("Electro-optic response \u{2014} {}", curve.label),
            subtitle,
        )?;
        let mut chart = ChartBuilder::on(&body)
            .margin(14)
            .margin_top(4)
            .x_label_area_size(42)
            .y_label_area_size(56)
            .build_cartesian_2d(axis.coord(), r_lo..r_hi)?;
        let label = |x: &f64| axis.label(x);
        chart
            .configure_mesh()
            .light_line_style(GRID)
            .bold_line_style(GRID.mix(0.0))
            .axis_style(INK)
            .label_style((FONT, 13).into_font().color(&INK))
            .x_label_formatter(&label)
            .x_desc(axis.description())
            .y_desc("response (dB)")
            .draw()?;
        for (level, crossing) in [(-3.0, response.f_3db_hz), (-6.0, response.f_6db_hz)] {
            chart.draw_series(LineSeries::new(
                [(f_lo, level), (f_hi, level)],
                FIT.mix(0.7).stroke_width(1),
            ))?;
            let label = match crossing {
                Some(f) => format!("{level} dB at {:.3} GHz", ghz(f)),
                None => format!("{level} dB"),
            };
            chart.draw_series(std::iter::once(Text::new(
                label,
                (f_lo + 0.01 * (f_hi - f_lo), level + 0.02 * (r_hi - r_lo)),
                (FONT, 11).into_font().color(&FIT),
            )))?;
        }
        chart.draw_series(LineSeries::new(
            response
                .points
                .iter()
                .map(|p| (axis.x(p.frequency_hz.0), p.response_db)),
            CURRENT.stroke_width(2),
        ))?;
        chart.draw_series(
            response
                .points
                .iter()
                .filter(|p| p.response_uncertainty_db > 0.0)
                .map(|p| {
                    uncertainty_bar(
                        axis.x(p.frequency_hz.0),
                        p.response_db - p.response_uncertainty_db,
                        p.response_db + p.response_uncertainty_db,
                        axis.cap_half_width(),
                        CURRENT.stroke_width(1),
                    )
                }),
        )?;
        chart.draw_series(response.points.iter().map(|p| {
            Circle::new(
                (axis.x(p.frequency_hz.0), p.response_db),
                4,
                CURRENT.filled(),
            )
        }))?;
        root.present()?;
    }
    Ok(svg)
}

#[cfg(test)]
mod tests {
    use super::super::test_support::{count_elements, texts};
    use super::super::vpi::VpiPoint;
    use super::*;

    fn drawn(curve: &VpiCurve) -> Result<String, PlotError> {
        response_svg(curve, "run 1, as requested")
    }

    fn curve(values: &[(f64, f64, f64)]) -> VpiCurve {
        VpiCurve {
            label: "run 1".into(),
            points: values
                .iter()
                .map(|&(f, v, u)| VpiPoint {
                    frequency_hz: f,
                    v_pi_volts: v,
                    v_pi_uncertainty_volts: u,
                })
                .collect(),
        }
    }

    #[test]
    fn doubling_v_pi_is_minus_six_db() {
        // 20 log10(2) = 6.0206 dB and 20 log10(sqrt 2) = 3.0103 dB: the decibel of a field
        // quantity (a mathematical identity, log10 2 = 0.30103).
        let r = response_of(&curve(&[
            (10e9, 8.0, 0.0),
            (1e9, 4.0, 0.0),
            (5e9, 4.0 * 2f64.sqrt(), 0.0),
        ]))
        .unwrap();
        let db: Vec<f64> = r.points.iter().map(|p| p.response_db).collect();
        assert_eq!(r.reference_frequency_hz, Hz(1e9));
        assert!(db[0].abs() < 1e-12);
        assert!((db[1] + 3.0103).abs() < 1e-4);
        assert!((db[2] + 6.0206).abs() < 1e-4);
        // Linear interpolation puts -3 dB between (1 GHz, 0 dB) and (5 GHz, -3.0103 dB), at
        // 1 + 4 * (3 / 3.0103) GHz, and -6 dB between (5 GHz, -3.0103 dB) and (10 GHz, -6.0206 dB),
        // at 5 + 5 * (2.9897 / 3.0103) GHz (worked by hand).
        let f3 = r.f_3db_hz.unwrap().0 / 1e9;
        let f6 = r.f_6db_hz.unwrap().0 / 1e9;
        assert!((f3 - (1.0 + 4.0 * 3.0 / 3.0103)).abs() < 1e-3, "{f3}");
        assert!((f6 - (5.0 + 5.0 * 2.9897 / 3.0103)).abs() < 1e-3, "{f6}");
    }

    #[test]
    fn values_at_the_same_frequency_are_combined_by_weighted_mean() {
        // Two values at 1 GHz, 4.0 +- 0.1 V and 4.4 +- 0.2 V: weights 100 and 25 give
        // (400 + 110) / 125 = 4.08 V with uncertainty 1 / sqrt(125) = 0.08944 V (inverse-variance
        // weighting, worked by hand). 8.16 V at 10 GHz is then exactly twice the reference:
        // -6.0206 dB, i.e. 20 log10(1/2).
        let r = response_of(&curve(&[
            (1e9, 4.0, 0.1),
            (10e9, 8.16, 0.0),
            (1e9, 4.4, 0.2),
        ]))
        .unwrap();
        assert_eq!(r.points.len(), 2);
        assert!((r.points[0].v_pi_volts.0 - 4.08).abs() < 1e-12);
        assert!((r.points[1].response_db + 6.0206).abs() < 1e-4);
        // Relative uncertainty of the reference, 0.08944 / 4.08, times 20 / ln 10 = 0.19041 dB.
        assert!((r.points[1].response_uncertainty_db - 0.19041).abs() < 1e-4);
        // Exact values (no uncertainty) at one frequency: their plain mean.
        let exact =
            response_of(&curve(&[(1e9, 3.0, 0.0), (1e9, 5.0, 0.0), (2e9, 8.0, 0.3)])).unwrap();
        assert_eq!(exact.points[0].v_pi_volts, VoltsPeak(4.0));
        assert!((exact.points[1].response_db + 6.0206).abs() < 1e-4);
        // Drawn: one marker per distinct frequency.
        let svg = drawn(&curve(&[
            (1e9, 4.0, 0.1),
            (10e9, 8.16, 0.0),
            (1e9, 4.4, 0.2),
        ]))
        .unwrap();
        assert_eq!(count_elements(&svg, "circle"), 2);
    }

    #[test]
    fn svg_has_one_marker_per_point_and_names_the_crossings() {
        let svg = drawn(&curve(&[
            (1e9, 4.0, 0.04),
            (5e9, 4.5, 0.05),
            (10e9, 5.5, 0.05),
            (20e9, 9.0, 0.1),
        ]))
        .unwrap();
        assert_eq!(count_elements(&svg, "circle"), 4);
        // 20 log10(4 / 5.5) = -2.77 dB, 20 log10(4 / 9) = -7.04 dB: both guides are crossed
        // between 10 and 20 GHz.
        let labels = texts(&svg).join("|");
        assert!(labels.contains("-3 dB at 1"), "{labels}");
        assert!(labels.contains("-6 dB at 1"), "{labels}");
    }

    #[test]
    fn non_positive_v_pi_is_left_out() {
        assert!(matches!(
            response_of(&curve(&[(1e9, 0.0, 0.0), (2e9, f64::NAN, 0.0)])),
            Err(PlotError::Empty(_))
        ));
        assert!(drawn(&curve(&[(1e9, -1.0, 0.0)])).is_err());
        let kept = response_of(&curve(&[
            (1e9, 4.0, 0.0),
            (2e9, -1.0, 0.0),
            (3e9, 8.0, 0.0),
        ]))
        .unwrap();
        assert_eq!(kept.points.len(), 2);
    }
}

//! The electro-optic response in dB: 20 log10(V_pi(f_ref) / V_pi(f)), referred to the lowest
//! calibrated frequency, with the -3 dB and -6 dB levels drawn as guides.

use super::style::{BACKGROUND, CURRENT, FIT, FONT, GRID, INK};
use super::vpi::VpiCurve;
use super::{padded_range, PlotError, PLOT_SIZE};
use plotters::prelude::*;

/// The response points (frequency in Hz, response in dB), sorted by frequency, referred to the
/// lowest frequency. Points with a non-positive or non-finite V_pi are left out.
pub fn response_db(curve: &VpiCurve) -> Vec<(f64, f64)> {
    let mut points: Vec<(f64, f64)> = curve
        .points
        .iter()
        .filter(|p| p.frequency_hz.is_finite() && p.v_pi_volts.is_finite() && p.v_pi_volts > 0.0)
        .map(|p| (p.frequency_hz, p.v_pi_volts))
        .collect();
    points.sort_by(|a, b| a.0.total_cmp(&b.0));
    let Some(&(_, v_ref)) = points.first() else {
        return Vec::new();
    };
    points
        .into_iter()
        .map(|(f, v)| (f, 20.0 * (v_ref / v).log10()))
        .collect()
}

/// Draws the response with one `<circle>` marker per point.
pub fn response_svg(curve: &VpiCurve) -> Result<String, PlotError> {
    let points = response_db(curve);
    if points.is_empty() {
        return Err(PlotError::Empty("no positive V_pi values".to_string()));
    }
    let (f_lo, f_hi) = padded_range(points.iter().map(|p| p.0 / 1e9), 0.04)
        .ok_or_else(|| PlotError::Empty("no frequencies".to_string()))?;
    let (r_lo, r_hi) = padded_range(points.iter().map(|p| p.1).chain([0.0, -6.5]), 0.05)
        .ok_or_else(|| PlotError::Empty("no response values".to_string()))?;

    let mut svg = String::new();
    {
        let root = SVGBackend::with_string(&mut svg, PLOT_SIZE).into_drawing_area();
        root.fill(&BACKGROUND)?;
        let mut chart = ChartBuilder::on(&root)
            .caption(
                format!("Electro-optic response \u{2014} {}", curve.label),
                (FONT, 18).into_font().color(&INK),
            )
            .margin(14)
            .x_label_area_size(42)
            .y_label_area_size(56)
            .build_cartesian_2d(f_lo..f_hi, r_lo..r_hi)?;
        chart
            .configure_mesh()
            .light_line_style(GRID)
            .bold_line_style(GRID.mix(0.0))
            .axis_style(INK)
            .label_style((FONT, 13).into_font().color(&INK))
            .x_desc("RF frequency (GHz)")
            .y_desc("response (dB)")
            .draw()?;
        for level in [-3.0, -6.0] {
            chart.draw_series(LineSeries::new(
                [(f_lo, level), (f_hi, level)],
                FIT.mix(0.7).stroke_width(1),
            ))?;
            chart.draw_series(std::iter::once(Text::new(
                format!("{level} dB"),
                (f_lo + 0.01 * (f_hi - f_lo), level + 0.02 * (r_hi - r_lo)),
                (FONT, 11).into_font().color(&FIT),
            )))?;
        }
        chart.draw_series(LineSeries::new(
            points.iter().map(|&(f, r)| (f / 1e9, r)),
            CURRENT.stroke_width(2),
        ))?;
        chart.draw_series(
            points
                .iter()
                .map(|&(f, r)| Circle::new((f / 1e9, r), 4, CURRENT.filled())),
        )?;
        root.present()?;
    }
    Ok(svg)
}

#[cfg(test)]
mod tests {
    use super::super::test_support::count_elements;
    use super::super::vpi::VpiPoint;
    use super::*;

    fn curve(values: &[(f64, f64)]) -> VpiCurve {
        VpiCurve {
            label: "run 1".into(),
            points: values
                .iter()
                .map(|&(f, v)| VpiPoint {
                    frequency_hz: f,
                    v_pi_volts: v,
                    v_pi_uncertainty_volts: 0.0,
                })
                .collect(),
        }
    }

    #[test]
    fn doubling_v_pi_is_minus_six_db() {
        // 20 log10(1/2) = -6.0206 dB (definition of the decibel for a field quantity).
        let r = response_db(&curve(&[(10e9, 8.0), (1e9, 4.0), (5e9, 4.0 * 2f64.sqrt())]));
        assert_eq!(r.len(), 3);
        assert!((r[0].1).abs() < 1e-12);
        assert!((r[1].1 + 3.0103).abs() < 1e-4);
        assert!((r[2].1 + 6.0206).abs() < 1e-4);
    }

    #[test]
    fn svg_has_one_marker_per_point() {
        let svg =
            response_svg(&curve(&[(1e9, 4.0), (5e9, 4.5), (10e9, 5.5), (20e9, 7.0)])).unwrap();
        assert_eq!(count_elements(&svg, "circle"), 4);
    }

    #[test]
    fn non_positive_v_pi_is_left_out() {
        assert!(response_db(&curve(&[(1e9, 0.0), (2e9, f64::NAN)])).is_empty());
        assert!(response_svg(&curve(&[(1e9, -1.0)])).is_err());
    }
}

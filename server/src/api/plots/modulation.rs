//! Modulation index versus peak drive voltage at one frequency, with the fitted line
//! beta = (pi / V_pi) * V_pk through the origin. Points the fit excluded are drawn hollow.

use super::style::{uncertainty_bar, BACKGROUND, CURRENT, FIT, FONT, GRID, INK};
use super::{padded_range, PlotError, PLOT_SIZE};
use plotters::prelude::*;
use serde::{Deserialize, Serialize};

/// One drive level's result.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct ModulationPoint {
    pub v_peak_volts: f64,
    pub modulation_index: f64,
    pub modulation_index_uncertainty: f64,
    /// True when the V_pi fit left this point out (compression, a lost line).
    pub excluded: bool,
}

/// The points at one frequency and the fitted V_pi, if any.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ModulationPlot {
    pub title: String,
    pub points: Vec<ModulationPoint>,
    pub v_pi_volts: Option<f64>,
}

/// Draws one `<circle>` per finite point, uncertainty bars and the fitted line.
pub fn modulation_index_svg(plot: &ModulationPlot) -> Result<String, PlotError> {
    let points: Vec<ModulationPoint> = plot
        .points
        .iter()
        .copied()
        .filter(|p| p.v_peak_volts.is_finite() && p.modulation_index.is_finite())
        .collect();
    if points.is_empty() {
        return Err(PlotError::Empty("no measured modulation index".to_string()));
    }
    let (_, x_hi) = padded_range(points.iter().map(|p| p.v_peak_volts).chain([0.0]), 0.05)
        .ok_or_else(|| PlotError::Empty("no drive voltages".to_string()))?;
    let (_, y_hi) = padded_range(
        points
            .iter()
            .map(|p| p.modulation_index + p.modulation_index_uncertainty.abs().min(10.0))
            .chain([0.0]),
        0.08,
    )
    .ok_or_else(|| PlotError::Empty("no modulation index".to_string()))?;

    let mut svg = String::new();
    {
        let root = SVGBackend::with_string(&mut svg, PLOT_SIZE).into_drawing_area();
        root.fill(&BACKGROUND)?;
        let mut chart = ChartBuilder::on(&root)
            .caption(plot.title.clone(), (FONT, 18).into_font().color(&INK))
            .margin(14)
            .x_label_area_size(42)
            .y_label_area_size(56)
            .build_cartesian_2d(0.0..x_hi, 0.0..y_hi)?;
        chart
            .configure_mesh()
            .light_line_style(GRID)
            .bold_line_style(GRID.mix(0.0))
            .axis_style(INK)
            .label_style((FONT, 13).into_font().color(&INK))
            .x_desc("peak drive voltage at the modulator (V)")
            .y_desc("modulation index \u{3b2} (rad)")
            .draw()?;
        if let Some(v_pi) = plot.v_pi_volts.filter(|v| v.is_finite() && *v > 0.0) {
            let slope = std::f64::consts::PI / v_pi;
            chart.draw_series(LineSeries::new(
                [(0.0, 0.0), (x_hi, slope * x_hi)],
                FIT.stroke_width(2),
            ))?;
            chart.draw_series(std::iter::once(Text::new(
                format!("V\u{3c0} = {v_pi:.3} V"),
                (0.05 * x_hi, 0.92 * y_hi),
                (FONT, 13).into_font().color(&FIT),
            )))?;
        }
        chart.draw_series(points.iter().filter_map(|p| {
            let u = p.modulation_index_uncertainty;
            (u.is_finite() && u > 0.0).then(|| {
                uncertainty_bar(
                    p.v_peak_volts,
                    p.modulation_index - u,
                    p.modulation_index + u,
                    0.006 * x_hi,
                    CURRENT.stroke_width(1),
                )
            })
        }))?;
        chart.draw_series(points.iter().map(|p| {
            let style = if p.excluded {
                CURRENT.stroke_width(2)
            } else {
                CURRENT.filled()
            };
            Circle::new((p.v_peak_volts, p.modulation_index), 4, style)
        }))?;
        root.present()?;
    }
    Ok(svg)
}

#[cfg(test)]
mod tests {
    use super::super::test_support::{count_elements, texts};
    use super::*;

    #[test]
    fn one_marker_per_level_and_fit_labelled() {
        let v_pi = 4.2;
        let points: Vec<ModulationPoint> = (1..=6)
            .map(|i| {
                let v = 0.4 * f64::from(i);
                ModulationPoint {
                    v_peak_volts: v,
                    // beta = pi V_pk / V_pi (the definition in the domain primer).
                    modulation_index: std::f64::consts::PI * v / v_pi,
                    modulation_index_uncertainty: 0.01,
                    excluded: i == 6,
                }
            })
            .collect();
        let svg = modulation_index_svg(&ModulationPlot {
            title: "run 1 at 10 GHz".into(),
            points,
            v_pi_volts: Some(v_pi),
        })
        .unwrap();
        assert_eq!(count_elements(&svg, "circle"), 6);
        assert!(texts(&svg).iter().any(|t| t.contains("4.200 V")));
    }

    #[test]
    fn no_points_is_an_error() {
        let plot = ModulationPlot {
            title: "none".into(),
            points: vec![],
            v_pi_volts: None,
        };
        assert!(modulation_index_svg(&plot).is_err());
    }
}

//! The frequency axis of the device plots (V_pi and response versus frequency): logarithmic when
//! the points are log-spaced, linear otherwise, with its ticks.
//!
//! The rule ([`choose_scale`]): the axis is logarithmic when the plotted run has at least three
//! distinct positive frequencies, the highest is at least [`MIN_LOG_SPAN`] times the lowest, and
//! the steps between neighbouring frequencies are more even in log f than in f (a smaller
//! coefficient of variation, standard deviation over mean, of the ratios' logarithms than of the
//! differences). A logarithmic grid (0.2 to 20 GHz in 21 points: every ratio the same) gives the
//! log-steps a spread of zero, a linear grid gives the differences one, so each gets its own
//! axis; a hand-picked list goes to whichever it is closer to. On a logarithmic axis the ticks sit
//! at 1, 2 and 5 times the powers of ten (1, 2, 3, ... 9 when the range holds fewer than three of
//! those), with light grid lines at every integer multiple; on a linear one at 1, 2 or 5 times a
//! power of ten apart.
//!
//! Both scales are drawn on one plain `f64` coordinate: x is the frequency in GHz (linear) or its
//! decimal logarithm (logarithmic), with the tick positions bound to it and labels written back in
//! GHz, so the plot code is the same for both.

use plotters::coord::ranged1d::{DefaultFormatting, KeyPointHint, Ranged};
use plotters::coord::types::RangedCoordf64;
use std::ops::Range;

/// The smallest ratio of highest to lowest frequency drawn on a logarithmic axis: below it a log
/// axis looks linear and has too few ticks.
pub const MIN_LOG_SPAN: f64 = 4.0;

/// How frequencies are spaced on the axis.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Scale {
    Linear,
    Logarithmic,
}

/// A frequency axis: its scale, its range in plot coordinates and its ticks.
#[derive(Debug, Clone, PartialEq)]
pub struct FrequencyAxis {
    pub scale: Scale,
    /// Plot coordinates (GHz, or log10 of GHz), padded.
    lo: f64,
    hi: f64,
    /// Labelled ticks, GHz.
    ticks_ghz: Vec<f64>,
    /// Light grid lines, GHz.
    grid_ghz: Vec<f64>,
}

fn spread(values: &[f64]) -> f64 {
    let n = values.len() as f64;
    let mean = values.iter().sum::<f64>() / n;
    if mean.abs() <= f64::MIN_POSITIVE {
        return f64::INFINITY;
    }
    let variance = values.iter().map(|v| (v - mean) * (v - mean)).sum::<f64>() / n;
    variance.sqrt() / mean.abs()
}

/// The scale for these frequencies (hertz, any order), by the rule in the module documentation.
pub fn choose_scale(frequencies_hz: &[f64]) -> Scale {
    let mut f: Vec<f64> = frequencies_hz
        .iter()
        .copied()
        .filter(|f| f.is_finite() && *f > 0.0)
        .collect();
    f.sort_by(f64::total_cmp);
    f.dedup();
    if f.len() < 3 || f[f.len() - 1] < MIN_LOG_SPAN * f[0] {
        return Scale::Linear;
    }
    let differences: Vec<f64> = f.windows(2).map(|w| w[1] - w[0]).collect();
    let log_steps: Vec<f64> = f.windows(2).map(|w| (w[1] / w[0]).ln()).collect();
    if spread(&log_steps) < spread(&differences) {
        Scale::Logarithmic
    } else {
        Scale::Linear
    }
}

/// Ticks at 1, 2 and 5 times the powers of ten within `lo..=hi` (GHz, positive); 1 to 9 times
/// when that gives fewer than three. Also returns the light grid (every integer multiple).
pub fn log_ticks(lo: f64, hi: f64) -> (Vec<f64>, Vec<f64>) {
    let inside = |v: &f64| *v >= lo * (1.0 - 1e-9) && *v <= hi * (1.0 + 1e-9);
    let decades = (lo.log10().floor() as i32)..=(hi.log10().ceil() as i32);
    let multiples = |set: &[f64]| -> Vec<f64> {
        decades
            .clone()
            .flat_map(|d| set.iter().map(move |m| m * 10f64.powi(d)))
            .map(|v| (v * 1e9).round() / 1e9)
            .filter(inside)
            .collect()
    };
    let all: Vec<f64> = multiples(&[1.0, 2.0, 3.0, 4.0, 5.0, 6.0, 7.0, 8.0, 9.0]);
    let one_two_five = multiples(&[1.0, 2.0, 5.0]);
    let ticks = if one_two_five.len() >= 3 {
        one_two_five
    } else {
        all.clone()
    };
    (ticks, all)
}

/// Ticks 1, 2 or 5 times a power of ten apart within `lo..=hi`, at most about twelve of them.
pub fn linear_ticks(lo: f64, hi: f64) -> Vec<f64> {
    let width = hi - lo;
    if !(width.is_finite() && width > 0.0) {
        return vec![lo];
    }
    let raw = width / 8.0;
    let power = 10f64.powf(raw.log10().floor());
    let step = [1.0, 2.0, 5.0, 10.0]
        .iter()
        .map(|m| m * power)
        .find(|s| width / s <= 12.0)
        .unwrap_or(10.0 * power);
    let first = (lo / step).ceil() as i64;
    let last = (hi / step).floor() as i64;
    (first..=last)
        .map(|k| (k as f64 * step * 1e9).round() / 1e9)
        .collect()
}

/// A GHz value as a tick label: as few decimals as it needs (0.2, 1, 12.5, 0.05).
pub fn ghz_label(ghz: f64) -> String {
    let text = format!("{ghz:.6}");
    let text = text.trim_end_matches('0').trim_end_matches('.');
    if text == "-0" {
        "0".to_string()
    } else {
        text.to_string()
    }
}

impl FrequencyAxis {
    /// The axis for a plot whose main run has the frequencies `deciding_hz` (which choose the
    /// scale; when fewer than three, `all_hz` decide) and whose drawn points span `all_hz`
    /// (which set the range). `None` when no frequency is finite and positive.
    pub fn new(deciding_hz: &[f64], all_hz: &[f64]) -> Option<FrequencyAxis> {
        let positive: Vec<f64> = all_hz
            .iter()
            .copied()
            .filter(|f| f.is_finite() && *f > 0.0)
            .collect();
        let lowest = positive.iter().copied().reduce(f64::min)? / 1e9;
        let highest = positive.iter().copied().reduce(f64::max)? / 1e9;
        let distinct = |hz: &[f64]| {
            let mut f: Vec<f64> = hz.iter().copied().filter(|f| f.is_finite()).collect();
            f.sort_by(f64::total_cmp);
            f.dedup();
            f.len()
        };
        let scale = if distinct(deciding_hz) >= 3 {
            choose_scale(deciding_hz)
        } else {
            choose_scale(&positive)
        };
        Some(match scale {
            Scale::Logarithmic => {
                let (a, b) = (lowest.log10(), highest.log10());
                let pad = 0.04 * (b - a);
                let (lo, hi) = (a - pad, b + pad);
                let (ticks_ghz, grid_ghz) = log_ticks(10f64.powf(lo), 10f64.powf(hi));
                FrequencyAxis {
                    scale,
                    lo,
                    hi,
                    ticks_ghz,
                    grid_ghz,
                }
            }
            Scale::Linear => {
                let (lo, hi) =
                    super::padded_range([lowest, highest].into_iter(), 0.04).unwrap_or((0.0, 1.0));
                let ticks_ghz = linear_ticks(lo, hi);
                FrequencyAxis {
                    scale,
                    lo,
                    hi,
                    grid_ghz: ticks_ghz.clone(),
                    ticks_ghz,
                }
            }
        })
    }

    /// The plot coordinate of a frequency in hertz.
    pub fn x(&self, frequency_hz: f64) -> f64 {
        let ghz = frequency_hz / 1e9;
        match self.scale {
            Scale::Linear => ghz,
            Scale::Logarithmic => ghz.log10(),
        }
    }

    /// The frequency in GHz at a plot coordinate.
    pub fn ghz_at(&self, x: f64) -> f64 {
        match self.scale {
            Scale::Linear => x,
            Scale::Logarithmic => 10f64.powf(x),
        }
    }

    /// Lowest and highest plot coordinate.
    pub fn bounds(&self) -> (f64, f64) {
        (self.lo, self.hi)
    }

    /// The labelled ticks, GHz.
    pub fn ticks_ghz(&self) -> &[f64] {
        &self.ticks_ghz
    }

    /// The coordinate to build the chart on, with the ticks bound to it.
    pub fn coord(&self) -> FrequencyCoord {
        let at = |ghz: &Vec<f64>| -> Vec<f64> {
            ghz.iter()
                .map(|g| self.x(g * 1e9))
                .filter(|x| *x >= self.lo && *x <= self.hi)
                .collect()
        };
        FrequencyCoord {
            inner: (self.lo..self.hi).into(),
            ticks: at(&self.ticks_ghz),
            grid: at(&self.grid_ghz),
        }
    }

    /// The label of a tick at plot coordinate `x`.
    pub fn label(&self, x: &f64) -> String {
        let ghz = self.ghz_at(*x);
        // Undo the rounding of the logarithm so 10^log10(0.2) prints as 0.2.
        ghz_label((ghz * 1e9).round() / 1e9)
    }

    /// The axis title.
    pub fn description(&self) -> &'static str {
        match self.scale {
            Scale::Linear => "RF frequency (GHz)",
            Scale::Logarithmic => "RF frequency (GHz, logarithmic)",
        }
    }

    /// Half the width of an uncertainty bar's cap, in plot coordinates.
    pub fn cap_half_width(&self) -> f64 {
        0.006 * (self.hi - self.lo)
    }
}

/// A plain `f64` chart coordinate whose tick marks (labelled) and light grid lines are the ones
/// [`FrequencyAxis`] chose. (plotters' own `WithKeyPoints` over an `f64` range cannot be given to
/// `configure_mesh`, as it has no value formatter; labels come from [`FrequencyAxis::label`].)
pub struct FrequencyCoord {
    inner: RangedCoordf64,
    ticks: Vec<f64>,
    grid: Vec<f64>,
}

impl Ranged for FrequencyCoord {
    type FormatOption = DefaultFormatting;
    type ValueType = f64;

    fn map(&self, value: &f64, limit: (i32, i32)) -> i32 {
        self.inner.map(value, limit)
    }

    fn key_points<Hint: KeyPointHint>(&self, hint: Hint) -> Vec<f64> {
        if hint.weight().allow_light_points() {
            self.grid.clone()
        } else {
            self.ticks.clone()
        }
    }

    fn range(&self) -> Range<f64> {
        self.inner.range()
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn log_grid(start: f64, stop: f64, count: usize) -> Vec<f64> {
        (0..count)
            .map(|i| start * (stop / start).powf(i as f64 / (count - 1) as f64))
            .collect()
    }

    #[test]
    fn the_spacing_decides_the_scale() {
        // The demo's grid: 21 frequencies log-spaced from 0.2 to 20 GHz.
        assert_eq!(choose_scale(&log_grid(0.2e9, 20e9, 21)), Scale::Logarithmic);
        // A linear grid from 1 to 20 GHz in 5 points (the dashboard's form).
        let linear: Vec<f64> = (0..5).map(|i| 1e9 + i as f64 * 4.75e9).collect();
        assert_eq!(choose_scale(&linear), Scale::Linear);
        // The engine tests' hand-picked list, closer to log spacing: steps 0.3, 1, 2.5, 6, 10 GHz
        // against ratios 2.5, 3, 2.67, 2.5, 2.
        assert_eq!(
            choose_scale(&[0.5e9, 0.2e9, 1.5e9, 4e9, 10e9, 20e9]),
            Scale::Logarithmic
        );
        // Too few points, or a span under MIN_LOG_SPAN: linear.
        assert_eq!(choose_scale(&[0.2e9, 20e9]), Scale::Linear);
        assert_eq!(choose_scale(&log_grid(1e9, 3e9, 6)), Scale::Linear);
        assert_eq!(choose_scale(&[]), Scale::Linear);
    }

    #[test]
    fn log_ticks_are_one_two_five_per_decade() {
        let (ticks, grid) = log_ticks(0.18, 22.0);
        assert_eq!(ticks, [0.2, 0.5, 1.0, 2.0, 5.0, 10.0, 20.0]);
        assert_eq!(grid.first(), Some(&0.2));
        assert_eq!(grid.last(), Some(&20.0));
        assert_eq!(grid.len(), 8 + 9 + 2, "0.2-0.9, 1-9, 10 and 20");
        // A range with fewer than three 1-2-5 values gets every integer multiple.
        let (ticks, _) = log_ticks(0.3, 1.3);
        assert_eq!(ticks, [0.3, 0.4, 0.5, 0.6, 0.7, 0.8, 0.9, 1.0]);
    }

    #[test]
    fn linear_ticks_are_round_steps() {
        assert_eq!(
            linear_ticks(0.2, 20.8),
            [2.0, 4.0, 6.0, 8.0, 10.0, 12.0, 14.0, 16.0, 18.0, 20.0]
        );
        assert_eq!(
            linear_ticks(1.0, 5.0),
            [1.0, 1.5, 2.0, 2.5, 3.0, 3.5, 4.0, 4.5, 5.0]
        );
    }

    #[test]
    fn labels_read_back_in_ghz() {
        let axis = FrequencyAxis::new(&log_grid(0.2e9, 20e9, 21), &[0.2e9, 20e9]).unwrap();
        assert_eq!(axis.scale, Scale::Logarithmic);
        let labels: Vec<String> = axis
            .ticks_ghz()
            .iter()
            .map(|g| axis.label(&axis.x(g * 1e9)))
            .collect();
        assert_eq!(labels, ["0.2", "0.5", "1", "2", "5", "10", "20"]);
        assert_eq!(ghz_label(12.5), "12.5");
        assert_eq!(ghz_label(0.05), "0.05");
    }
}

//! Locating the comb on a trace and measuring its lines.
//!
//! The carrier is not always the strongest line (past beta of about 1.43 the first sidebands beat
//! it, at 2.405 it vanishes) and the laser drifts, so the comb is found by its spacing, not by its
//! biggest line: the strongest point of the trace belongs to *some* line, which fixes the comb's
//! phase modulo the spacing; the phase is refined from the power centroids of all lines; and which
//! line is order 0 is decided by the symmetry P_n = P_-n (or by an RF-off reference trace).
//!
//! Each line's power is the integral of the trace above the noise floor over +-0.75 resolution
//! bandwidth, divided by the equivalent bandwidth of the line shape measured on the strongest line.
//! Integrating averages the point-to-point noise over dozens of points (the peak value alone would
//! carry the full noise of one point), and dividing by the measured shape makes the result a line
//! power in dBm whatever the analyzer's filter shape. Only points inside line windows are
//! converted from dB to linear power, which keeps a 10,001-point trace to a few thousand `exp`
//! calls.

use super::{AnalysisError, AnalysisOptions};
use halfwave_units::{Hz, Trace};
use std::ops::Range;

/// ln(10) / 10: a level in dB times this is the natural log of the power ratio.
const DB_TO_LN: f64 = std::f64::consts::LN_10 / 10.0;

/// log2(10) / 10: a level in dB times this is the base-2 log of the power ratio.
const DB_TO_LOG2: f64 = std::f64::consts::LOG2_10 / 10.0;

/// A level in dBm as milliwatts, 10^(L / 10), to a relative accuracy of about 1e-8.
///
/// This conversion runs for every point inside a line window, thousands of times per trace, and
/// the library `exp` was the largest single cost of the analysis. Here 10^(L/10) = 2^n 2^f with
/// n the nearest integer to L log2(10) / 10 and |f| <= 1/2; 2^f = e^t (t = f ln 2, |t| <= 0.35) is a
/// degree-8 Taylor polynomial (truncation below 1e-9), and 2^n is put straight into the exponent
/// bits. Rounding uses the 1.5 * 2^52 trick (adding it leaves n in the low mantissa bits), so the
/// function has no branch and no library call. Levels are clamped to +-3000 dB, far beyond any
/// trace (10^-300 mW is zero for every purpose here).
#[inline]
pub(crate) fn milliwatts(dbm: f64) -> f64 {
    const ROUNDING: f64 = 6_755_399_441_055_744.0; // 1.5 * 2^52
    let y = dbm.clamp(-3000.0, 3000.0) * DB_TO_LOG2;
    let shifted = y + ROUNDING;
    let n = shifted - ROUNDING;
    let t = (y - n) * std::f64::consts::LN_2;
    // Estrin's scheme: the pairs, then the pairs of pairs, are independent, so the polynomial
    // takes four multiply-add steps one after the other instead of Horner's eight (on the
    // baseline x86-64 target, without fused multiply-add, each step waits for the one before).
    let t2 = t * t;
    let t4 = t2 * t2;
    let p01 = 1.0 + t;
    let p23 = 0.5 + t * (1.0 / 6.0);
    let p45 = 1.0 / 24.0 + t * (1.0 / 120.0);
    let p67 = 1.0 / 720.0 + t * (1.0 / 5040.0);
    let p03 = p01 + t2 * p23;
    let p47 = p45 + t2 * p67;
    let p = p03 + t4 * (p47 + t4 * (1.0 / 40320.0));
    // The low bits of `shifted` hold n; n + 1023 (between 26 and 2020 here) becomes the
    // exponent field of 2^n, and everything above it is shifted out.
    let scale = f64::from_bits(shifted.to_bits().wrapping_add(1023) << 52);
    p * scale
}

/// Largest number of floor samples kept for the median (more adds time, not accuracy).
const FLOOR_SAMPLES: usize = 512;

/// Half-width of the integration window around each line, in resolution bandwidths: wide enough
/// to hold the bulk of the line shape (92 % of a Gaussian filter's power), narrow enough that weak
/// lines do not collect floor noise from the tails.
const WINDOW_IN_RBW: f64 = 0.75;

/// Lines whose centroids refine the comb position (the strongest ones).
const CENTROID_LINES: usize = 6;

/// Lines must be at least this many resolution bandwidths apart to be resolved (common practice).
pub const MIN_SPACING_IN_RBW: f64 = 3.0;

/// The same for a width estimated from a few points of the strongest line.
const MIN_SPACING_IN_RBW_ESTIMATED: f64 = 2.0;

/// One measured line before and after the order is known.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct MeasuredLine {
    /// Order n relative to the carrier.
    pub order: i32,
    /// Centre of the line on the trace axis.
    pub frequency_hz: f64,
    /// Line power above the noise floor, milliwatts (may be slightly negative for a line lost in
    /// the floor).
    pub power_mw: f64,
    /// Standard uncertainty of `power_mw` from the trace noise.
    pub uncertainty_mw: f64,
    /// Whether the line rises above the floor by the detection threshold.
    pub above_floor: bool,
}

/// The comb as found on one trace.
#[derive(Debug, Clone, PartialEq)]
pub struct MeasuredComb {
    pub carrier_frequency_hz: f64,
    pub resolution_bandwidth_hz: f64,
    pub resolution_estimated: bool,
    /// Noise floor level (median of the points between lines), milliwatts.
    pub floor_mw: f64,
    /// Standard uncertainty of `floor_mw` (standard error of a median: 1.2533 sigma / sqrt(n)).
    pub floor_uncertainty_mw: f64,
    /// Point-to-point noise of the trace in dB (robust standard deviation of the floor).
    pub noise_sigma_db: f64,
    /// Equivalent bandwidth of the line shape (integral over peak), used to turn integrals into
    /// line powers.
    pub equivalent_bandwidth_hz: f64,
    /// Half-width of the integration window around each line.
    pub window_half_width_hz: f64,
    /// Lines sorted by order.
    pub lines: Vec<MeasuredLine>,
}

/// The carrier of an RF-off reference trace.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct ReferenceCarrier {
    pub frequency_hz: f64,
    /// Integrated power above the floor (milliwatt-hertz; divide by the equivalent bandwidth).
    pub integral: f64,
    pub integral_uncertainty: f64,
}

/// Checks the modulation frequency against the span and the point spacing.
pub fn check_span(trace: &Trace, modulation: Hz) -> Result<(), AnalysisError> {
    if !(modulation.0.is_finite() && modulation.0 > 0.0) {
        return Err(AnalysisError::BadModulationFrequency(modulation));
    }
    let (start, stop) = trace.span();
    let span = stop.0 - start.0;
    if span < 2.0 * modulation.0 {
        return Err(AnalysisError::SpanTooNarrow {
            span: Hz(span),
            modulation,
            needed: Hz(2.0 * modulation.0),
        });
    }
    let step = span / (trace.len() - 1) as f64;
    if modulation.0 < 6.0 * step {
        return Err(AnalysisError::TooCoarse(format!(
            "the points are {} apart but the lines only {} (at least 6 points per spacing are needed)",
            Hz(step),
            modulation
        )));
    }
    Ok(())
}

/// Finds the comb and measures every order that fits in the span.
pub fn measure_comb(
    trace: &Trace,
    modulation: Hz,
    reference_carrier_hz: Option<f64>,
    options: &AnalysisOptions,
) -> Result<MeasuredComb, AnalysisError> {
    check_span(trace, modulation)?;
    let freq = trace.frequency_hz();
    let power = trace.power_dbm();
    let fm = modulation.0;
    let peak = argmax(power);
    let (rough_floor, rough_sigma) = rough_floor(power);
    if power[peak] < rough_floor + options.detection_threshold_db + 5.0 * rough_sigma {
        return Err(AnalysisError::NoComb {
            floor_dbm: rough_floor,
        });
    }

    let step = (freq[freq.len() - 1] - freq[0]) / (freq.len() - 1) as f64;
    let (rbw, estimated) = match options
        .resolution_bandwidth
        .or(trace.resolution_bandwidth())
    {
        Some(given) if given.0.is_finite() && given.0 > 0.0 => (given.0, false),
        Some(bad) => return Err(AnalysisError::BadResolutionBandwidth(bad)),
        None => {
            // Three-point averages steady the estimate on a finely sampled line but widen a line
            // only a few points wide: there the levels are read as they are.
            let smoothed = estimate_resolution(freq, power, peak, fm, true);
            let width = match smoothed {
                Some(w) if w < 4.0 * step => estimate_resolution(freq, power, peak, fm, false),
                other => other,
            };
            match width {
                Some(width) => (width, true),
                None => return Err(AnalysisError::LinesNotResolved { modulation }),
            }
        }
    };
    // An estimated width is only a start (the whole-trace fit measures the line shape), so it
    // refuses only lines that plainly merge.
    let needed = if estimated {
        MIN_SPACING_IN_RBW_ESTIMATED
    } else {
        MIN_SPACING_IN_RBW
    };
    if fm < needed * rbw {
        return Err(AnalysisError::SpacingBelowResolution {
            modulation,
            resolution: Hz(rbw),
            how: if estimated {
                "estimated from the line shape"
            } else {
                "as given"
            },
        });
    }
    // Windows narrower than the point spacing would miss lines between points.
    let rbw = rbw.max(1.5 * step);

    // The strongest point lies on some line: that fixes the comb phase; refine it from centroids.
    let exclusion = (1.5 * rbw).min(0.4 * fm);
    let (floor_db, noise_sigma_db, floor_samples) = floor_level(freq, power, |f| {
        let x = (f - freq[peak]) / fm;
        (x - x.round()).abs() * fm > exclusion
    });
    let floor_mw = milliwatts(floor_db);
    let mut phase = freq[peak];
    for _ in 0..2 {
        phase += centroid_offset(freq, power, phase, fm, 0.5 * rbw, floor_mw);
    }

    // Measure every line whose window fits in the span.
    let half = (WINDOW_IN_RBW * rbw).min(fm / 2.5);
    let sigma_eps = noise_sigma_db * DB_TO_LN;
    let (first, last) = (freq[0], freq[freq.len() - 1]);
    let k_min = ((first + half - phase) / fm).ceil() as i64;
    let k_max = ((last - half - phase) / fm).floor() as i64;
    let mut raw: Vec<(i64, f64, LineIntegral)> =
        Vec::with_capacity((k_max - k_min + 1).max(0) as usize);
    for k in k_min..=k_max {
        let centre = phase + k as f64 * fm;
        let integral = integrate(freq, power, window(freq, centre, half), floor_mw, sigma_eps);
        raw.push((k, centre, integral));
    }
    let strongest = raw
        .iter()
        .max_by(|a, b| a.2.integral.total_cmp(&b.2.integral))
        .ok_or(AnalysisError::TooFewLines {
            found: 0,
            needed: 3,
        })?;
    let peak_excess = parabolic_peak(freq, power, strongest.1, 0.3 * rbw)
        .map_or(strongest.2.peak_mw, milliwatts)
        - floor_mw;
    let threshold_mw = floor_mw * (10f64.powf(options.detection_threshold_db / 10.0) - 1.0);
    // The strongest line must stand clear of the floor in its peak and well beyond the noise in
    // its integral, or what was found is a noise spike.
    if !(peak_excess > threshold_mw && strongest.2.integral > 5.0 * strongest.2.uncertainty) {
        return Err(AnalysisError::NoComb {
            floor_dbm: floor_db,
        });
    }
    let equivalent_bandwidth = strongest.2.integral / peak_excess;
    let measured: Vec<(i64, MeasuredLine)> = raw
        .iter()
        .map(|(k, centre, integral)| {
            let power_mw = integral.integral / equivalent_bandwidth;
            (
                *k,
                MeasuredLine {
                    order: 0,
                    frequency_hz: *centre,
                    power_mw,
                    uncertainty_mw: integral.uncertainty / equivalent_bandwidth,
                    above_floor: power_mw > threshold_mw,
                },
            )
        })
        .collect();
    if !measured.iter().any(|(_, l)| l.above_floor) {
        return Err(AnalysisError::NoComb {
            floor_dbm: floor_db,
        });
    }

    let reference_k = match reference_carrier_hz {
        Some(reference) => {
            let k = ((reference - phase) / fm).round() as i64;
            if !(k_min..=k_max).contains(&k) {
                return Err(AnalysisError::BadReference(format!(
                    "its carrier at {} lies outside the lines measured on the modulated trace; \
                     take both traces with the same span",
                    Hz(reference)
                )));
            }
            Some(k)
        }
        None => None,
    };
    let carrier_k = carrier_order(&measured, floor_mw, reference_k);
    let max_order = i64::from(options.max_order);
    let lines = measured
        .into_iter()
        .filter(|(k, _)| (k - carrier_k).abs() <= max_order)
        .map(|(k, line)| MeasuredLine {
            order: (k - carrier_k) as i32,
            ..line
        })
        .collect();
    Ok(MeasuredComb {
        carrier_frequency_hz: phase + carrier_k as f64 * fm,
        resolution_bandwidth_hz: rbw,
        resolution_estimated: estimated,
        floor_mw,
        floor_uncertainty_mw: 1.2533 * noise_sigma_db * DB_TO_LN * floor_mw
            / (floor_samples.max(1) as f64).sqrt(),
        noise_sigma_db,
        equivalent_bandwidth_hz: equivalent_bandwidth,
        window_half_width_hz: half,
        lines,
    })
}

/// Measures the single carrier of an RF-off trace with the same window as the modulated trace.
pub fn measure_reference(
    trace: &Trace,
    resolution_bandwidth_hz: f64,
    window_half_width_hz: f64,
    detection_threshold_db: f64,
) -> Result<ReferenceCarrier, AnalysisError> {
    let freq = trace.frequency_hz();
    let power = trace.power_dbm();
    let peak = argmax(power);
    let exclusion = 3.0 * resolution_bandwidth_hz;
    let (floor_db, sigma_db, _) = floor_level(freq, power, |f| (f - freq[peak]).abs() > exclusion);
    let floor_mw = milliwatts(floor_db);
    let mut centre = freq[peak];
    for _ in 0..2 {
        let range = window(freq, centre, 0.5 * resolution_bandwidth_hz);
        if let Some(c) = centroid(freq, power, range, floor_mw) {
            centre = c;
        }
    }
    let line = integrate(
        freq,
        power,
        window(freq, centre, window_half_width_hz),
        floor_mw,
        sigma_db * DB_TO_LN,
    );
    let threshold = milliwatts(floor_db + detection_threshold_db);
    if line.peak_mw <= threshold || line.integral <= 0.0 {
        return Err(AnalysisError::BadReference(format!(
            "no carrier rises above its noise floor ({floor_db:.1} dBm); take the RF-off trace with the laser on"
        )));
    }
    Ok(ReferenceCarrier {
        frequency_hz: centre,
        integral: line.integral,
        integral_uncertainty: line.uncertainty,
    })
}

/// Top of a line in dBm from a least-squares parabola through the levels within `half` of
/// `centre` (a Gaussian filter shape is exactly a parabola in dB), so that the peak averages the
/// noise of many points instead of taking the highest one; `None` when the points do not form a
/// peak.
fn parabolic_peak(freq: &[f64], power: &[f64], centre: f64, half: f64) -> Option<f64> {
    let range = window(freq, centre, half);
    if range.len() < 5 {
        return None;
    }
    // Normal equations of y = a + b x + c x^2 with x scaled to [-1, 1].
    let mut sums = [0.0f64; 7]; // sum x^0..x^4, then y, x y, x^2 y share slots below
    let (mut sy, mut sxy, mut sxxy) = (0.0, 0.0, 0.0);
    for i in range {
        let x = (freq[i] - centre) / half;
        let y = power[i];
        let mut xp = 1.0;
        for slot in sums.iter_mut().take(5) {
            *slot += xp;
            xp *= x;
        }
        sy += y;
        sxy += x * y;
        sxxy += x * x * y;
    }
    let [n, s1, s2, s3, s4, _, _] = sums;
    let m = [[n, s1, s2], [s1, s2, s3], [s2, s3, s4]];
    let det3 = |m: [[f64; 3]; 3]| {
        m[0][0] * (m[1][1] * m[2][2] - m[1][2] * m[2][1])
            - m[0][1] * (m[1][0] * m[2][2] - m[1][2] * m[2][0])
            + m[0][2] * (m[1][0] * m[2][1] - m[1][1] * m[2][0])
    };
    let det = det3(m);
    if det.abs() < 1e-12 {
        return None;
    }
    let rhs = [sy, sxy, sxxy];
    let solve = |col: usize| {
        let mut mc = m;
        for (row, value) in rhs.iter().enumerate() {
            mc[row][col] = *value;
        }
        det3(mc) / det
    };
    let (a, b, c) = (solve(0), solve(1), solve(2));
    if c >= 0.0 {
        return None;
    }
    let top = -b / (2.0 * c);
    (top.abs() <= 1.0).then(|| a - b * b / (4.0 * c))
}

/// Index of the largest value (the first, if several are equal). The maximum of each block of
/// 64 points is taken with four independent running maxima (which the compiler turns into
/// vector instructions), and only the winning block is searched for the index.
fn argmax(values: &[f64]) -> usize {
    const BLOCK: usize = 64;
    let mut best = (f64::NEG_INFINITY, 0);
    for (b, block) in values.chunks(BLOCK).enumerate() {
        let mut lanes = [f64::NEG_INFINITY; 4];
        let quads = block.chunks_exact(4);
        let rest = quads.remainder();
        for quad in quads {
            for (lane, v) in lanes.iter_mut().zip(quad) {
                *lane = if *v > *lane { *v } else { *lane };
            }
        }
        let mut top = lanes[0].max(lanes[1]).max(lanes[2].max(lanes[3]));
        for v in rest {
            top = top.max(*v);
        }
        if top > best.0 {
            best = (top, b);
        }
    }
    let start = best.1 * BLOCK;
    values
        .get(start..)
        .and_then(|tail| tail.iter().position(|v| *v == best.0))
        .map_or(0, |i| start + i)
}

/// Points of `freq` within `half` of `centre`.
fn window(freq: &[f64], centre: f64, half: f64) -> Range<usize> {
    let start = freq.partition_point(|f| *f < centre - half);
    let end = freq.partition_point(|f| *f <= centre + half);
    start..end.max(start)
}

/// Width on the axis that point `i` stands for (half the distance between its neighbours).
#[inline]
fn point_width(freq: &[f64], i: usize) -> f64 {
    match (i.checked_sub(1).and_then(|l| freq.get(l)), freq.get(i + 1)) {
        (Some(lo), Some(hi)) => 0.5 * (hi - lo),
        (Some(lo), None) => freq[i] - lo,
        (None, Some(hi)) => hi - freq[i],
        (None, None) => 0.0,
    }
}

/// The noise floor: median level (dB) of a sample of the points that `keep` accepts, and the
/// point-to-point noise of those points: the median absolute difference of each sampled point and
/// its neighbour, over 0.6745 sqrt 2 (one standard deviation for normal noise; common practice).
///
/// The noise is taken from neighbour differences, not from the spread of the levels, because the
/// space between lines is not flat: the Lorentzian wings of a laser line (and the skirts of the
/// analyzer's filter) make the background between strong, closely spaced lines rise and fall by
/// tens of dB. That smooth background is not noise; counting it as noise inflated the uncertainty
/// of every line until a clearly resolved comb was rejected. When too few neighbour pairs are
/// found, the robust spread of the levels (1.4826 times the median absolute deviation) is used.
fn floor_level(freq: &[f64], power: &[f64], keep: impl Fn(f64) -> bool) -> (f64, f64, usize) {
    let stride = (freq.len() / FLOOR_SAMPLES).max(1);
    let mut sample: Vec<f64> = Vec::with_capacity(FLOOR_SAMPLES + 1);
    let mut steps: Vec<f64> = Vec::with_capacity(FLOOR_SAMPLES + 1);
    for i in (0..freq.len().min(power.len())).step_by(stride) {
        if !keep(freq[i]) {
            continue;
        }
        sample.push(power[i]);
        if let (Some(f), Some(p)) = (freq.get(i + 1), power.get(i + 1)) {
            if keep(*f) {
                steps.push((p - power[i]).abs());
            }
        }
    }
    if sample.len() < 8 {
        sample = power.iter().step_by(stride).copied().collect();
        steps.clear();
    }
    let median = median_in_place(&mut sample);
    let spread = if steps.len() >= 8 {
        median_in_place(&mut steps) / (0.6745 * std::f64::consts::SQRT_2)
    } else {
        for v in sample.iter_mut() {
            *v = (*v - median).abs();
        }
        1.4826 * median_in_place(&mut sample)
    };
    (median, spread.max(1e-3), sample.len())
}

/// Median level of the whole trace and its point-to-point noise (the median absolute
/// difference of neighbours over 0.6745 sqrt 2, one standard deviation for normal noise, blind to
/// smooth features): a first look that needs no line positions, enough to tell a trace with lines
/// from one with only noise.
fn rough_floor(power: &[f64]) -> (f64, f64) {
    let stride = (power.len() / FLOOR_SAMPLES).max(1);
    let mut sample: Vec<f64> = power.iter().step_by(stride).copied().collect();
    let median = median_in_place(&mut sample);
    let mut steps: Vec<f64> = power
        .windows(2)
        .step_by(stride)
        .map(|w| (w[1] - w[0]).abs())
        .collect();
    let spread = median_in_place(&mut steps) / (0.6745 * std::f64::consts::SQRT_2);
    (median, spread)
}

pub(crate) fn median_in_place(values: &mut [f64]) -> f64 {
    if values.is_empty() {
        return 0.0;
    }
    let mid = values.len() / 2;
    let (_, m, _) = values.select_nth_unstable_by(mid, f64::total_cmp);
    *m
}

/// Power-weighted centroid of the points in `range` above the floor.
fn centroid(freq: &[f64], power: &[f64], range: Range<usize>, floor_mw: f64) -> Option<f64> {
    let (mut num, mut den) = (0.0, 0.0);
    for i in range {
        let excess = milliwatts(power[i]) - floor_mw;
        if excess > 0.0 {
            let w = excess * point_width(freq, i);
            num += w * freq[i];
            den += w;
        }
    }
    (den > 0.0).then(|| num / den)
}

/// Shift of the comb phase that brings it onto the power centroids of all lines, each weighted
/// by the square of its power so that the strong lines decide.
fn centroid_offset(
    freq: &[f64],
    power: &[f64],
    phase: f64,
    fm: f64,
    half: f64,
    floor_mw: f64,
) -> f64 {
    let (first, last) = (freq[0], freq[freq.len() - 1]);
    let k_min = ((first - phase) / fm).ceil() as i64;
    let k_max = ((last - phase) / fm).floor() as i64;
    // The strongest few lines, whose top stands 10 dB over the floor, carry the position
    // information; choosing them is done in dB, before any conversion.
    let floor_db = 10.0 * floor_mw.log10();
    let mut strong: Vec<(f64, Range<usize>, f64)> = (k_min..=k_max)
        .filter_map(|k| {
            let centre = phase + k as f64 * fm;
            let range = window(freq, centre, half);
            let top = power[range.clone()]
                .iter()
                .fold(f64::NEG_INFINITY, |a, b| a.max(*b));
            (top >= floor_db + 10.0).then_some((top, range, centre))
        })
        .collect();
    strong.sort_by(|a, b| b.0.total_cmp(&a.0));
    strong.truncate(CENTROID_LINES);
    let (mut num, mut den) = (0.0, 0.0);
    for (_, range, centre) in strong {
        let (mut moment, mut mass) = (0.0, 0.0);
        for i in range {
            let excess = milliwatts(power[i]) - floor_mw;
            if excess > 0.0 {
                let w = excess * point_width(freq, i);
                moment += w * (freq[i] - centre);
                mass += w;
            }
        }
        if mass > 0.0 {
            num += mass * moment;
            den += mass * mass;
        }
    }
    if den > 0.0 {
        (num / den).clamp(-half, half)
    } else {
        0.0
    }
}

/// The integral of one line above the floor.
#[derive(Debug, Clone, Copy)]
struct LineIntegral {
    integral: f64,
    uncertainty: f64,
    /// Highest point in the window (milliwatts, floor included).
    peak_mw: f64,
}

fn integrate(
    freq: &[f64],
    power: &[f64],
    range: Range<usize>,
    floor_mw: f64,
    sigma_eps: f64,
) -> LineIntegral {
    let (mut integral, mut square, mut peak) = (0.0, 0.0, 0.0f64);
    let mut add = |mw: f64, width: f64| {
        integral += (mw - floor_mw) * width;
        let x = mw * width;
        square += x * x;
        peak = if mw > peak { mw } else { peak };
    };
    // Interior points (both neighbours exist) without per-point bounds checks; the trace ends,
    // if the window reaches them, separately.
    let inner = range.start.max(1)..range.end.min(freq.len().saturating_sub(1));
    if inner.start < inner.end {
        let levels = &power[inner.clone()];
        let below = &freq[inner.start - 1..inner.end - 1];
        let above = &freq[inner.start + 1..inner.end + 1];
        for ((p, lo), hi) in levels.iter().zip(below).zip(above) {
            add(milliwatts(*p), 0.5 * (hi - lo));
        }
    }
    for i in range.filter(|i| !inner.contains(i)) {
        add(milliwatts(power[i]), point_width(freq, i));
    }
    LineIntegral {
        integral,
        uncertainty: sigma_eps * square.sqrt(),
        peak_mw: peak,
    }
}

/// Full width at half maximum of the line at `peak`, in hertz, from three-point averages of the
/// levels; `None` when the line does not fall by 3 dB within half a spacing on either side.
fn estimate_resolution(
    freq: &[f64],
    power: &[f64],
    peak: usize,
    fm: f64,
    average: bool,
) -> Option<f64> {
    let smooth = |i: usize| -> f64 {
        if !average {
            return power[i];
        }
        let lo = i.saturating_sub(1);
        let hi = (i + 1).min(power.len() - 1);
        let slice = &power[lo..=hi];
        slice.iter().sum::<f64>() / slice.len() as f64
    };
    let top = smooth(peak);
    let half = top - 10.0 * 2f64.log10();
    let reach = 0.5 * fm;
    let crossing = |step: isize| -> Option<f64> {
        let mut i = peak;
        let mut before = top;
        loop {
            let next = i.checked_add_signed(step).filter(|n| *n < power.len())?;
            if (freq[next] - freq[peak]).abs() > reach {
                return None;
            }
            let level = smooth(next);
            if level < half {
                let t = (before - half) / (before - level);
                return Some((freq[i] + t * (freq[next] - freq[i]) - freq[peak]).abs());
            }
            before = level;
            i = next;
        }
    };
    match (crossing(-1), crossing(1)) {
        (Some(a), Some(b)) => Some(a + b),
        (Some(a), None) | (None, Some(a)) => Some(2.0 * a),
        (None, None) => None,
    }
}

/// The order of the carrier among the measured lines: the centre about which the line levels
/// are most nearly symmetric (a pure phase modulation has |J_-n| = |J_n|, DLMF 10.4.1, so its
/// comb is symmetric about the carrier), searched within two lines of the power centroid.
///
/// With an RF-off reference, its carrier names the line nearest to it, unless the laser drifted
/// between the two sweeps by close to half a spacing or more: the reference is then taken only
/// when the symmetry does not clearly prefer another line (a mean squared level difference over
/// four times smaller and below 1 dB^2 is clear). A wrong carrier order would shift every order
/// by one and give a wrong modulation index without any other sign.
fn carrier_order(measured: &[(i64, MeasuredLine)], floor_mw: f64, reference_k: Option<i64>) -> i64 {
    let (mut moment, mut mass) = (0.0, 0.0);
    for (k, line) in measured {
        let p = line.power_mw.max(0.0);
        moment += *k as f64 * p;
        mass += p;
    }
    let Some(first_k) = measured.first().map(|(k, _)| *k) else {
        return reference_k.unwrap_or(0);
    };
    let centre = if mass > 0.0 {
        (moment / mass).round() as i64
    } else {
        first_k
    };
    let level = |k: i64| -> Option<(f64, bool)> {
        let index = usize::try_from(k - first_k).ok()?;
        measured.get(index).map(|(_, l)| {
            (
                10.0 * (l.power_mw.max(0.0) + floor_mw).log10(),
                l.above_floor,
            )
        })
    };
    let score = |candidate: i64| -> f64 {
        if level(candidate).is_none() {
            return f64::INFINITY;
        }
        let (mut sum, mut count) = (0.0, 0usize);
        for n in 1.. {
            match (level(candidate + n), level(candidate - n)) {
                (Some((a, above_a)), Some((b, above_b))) => {
                    if above_a || above_b {
                        sum += (a - b).powi(2);
                        count += 1;
                    }
                }
                _ => break,
            }
        }
        if count > 0 {
            sum / count as f64
        } else {
            f64::INFINITY
        }
    };
    let mut best = (f64::INFINITY, centre);
    for candidate in centre - 2..=centre + 2 {
        let s = score(candidate);
        if s < best.0 {
            best = (s, candidate);
        }
    }
    match reference_k {
        Some(k) if k != best.1 => {
            let at_reference = score(k);
            if best.0 < 1.0 && best.0 * 4.0 < at_reference {
                best.1
            } else {
                k
            }
        }
        Some(k) => k,
        None => best.1,
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn fast_conversion_matches_the_definition() {
        // 10^(L/10) milliwatts for L in dBm (definition of the dBm), against the library powf.
        let mut level = -250.0;
        while level < 120.0 {
            let exact = 10f64.powf(level / 10.0);
            let fast = milliwatts(level);
            assert!(
                ((fast - exact) / exact).abs() < 1e-8,
                "{level} dBm: {fast} vs {exact}"
            );
            level += 0.0137;
        }
        assert_eq!(milliwatts(0.0), 1.0);
        assert!(milliwatts(-3100.0) < 1.1e-300);
        assert!((milliwatts(-3000.0) / 1e-300 - 1.0).abs() < 1e-8);
    }

    /// A noise-free trace written out here (not with the analysis): Gaussian filter lines
    /// (common practice for an analyzer's resolution filter: exp(-4 ln 2 (f - f_n)^2 / RBW^2) in
    /// linear power, peak P_n) on a flat floor, orders -3..=3 every `spacing` around `carrier`.
    fn gaussian_comb(
        carrier: f64,
        spacing: f64,
        rbw: f64,
        powers_mw: [f64; 4],
        floor_mw: f64,
    ) -> Trace {
        let points = 2201;
        let start = carrier - 5.5 * spacing;
        let step = 11.0 * spacing / (points - 1) as f64;
        let freq: Vec<f64> = (0..points).map(|i| start + i as f64 * step).collect();
        let power = freq
            .iter()
            .map(|f| {
                let lines: f64 = (-3i32..=3)
                    .map(|n| {
                        let d = f - (carrier + f64::from(n) * spacing);
                        powers_mw[n.unsigned_abs() as usize]
                            * (-4.0 * std::f64::consts::LN_2 * d * d / (rbw * rbw)).exp()
                    })
                    .sum();
                10.0 * (lines + floor_mw).log10()
            })
            .collect();
        Trace::new(freq, power, Some(Hz(rbw))).unwrap()
    }

    #[test]
    fn a_comb_written_by_hand_is_found_and_measured() {
        // Carrier 0.2 mW (hand-chosen), sidebands 1.0, 0.3, 0.05 mW: the carrier is not the
        // strongest line (as past beta = 1.43), so order 0 must come from the symmetry.
        let carrier = 193.414e12 + 1.234e9;
        let powers = [0.2, 1.0, 0.3, 0.05];
        let trace = gaussian_comb(carrier, 10e9, 1e9, powers, 1e-7);
        let comb = measure_comb(&trace, Hz(10e9), None, &AnalysisOptions::default()).unwrap();
        // Within a tenth of the point spacing (0.05 GHz).
        assert!(
            (comb.carrier_frequency_hz - carrier).abs() < 5e6,
            "carrier at {} Hz",
            comb.carrier_frequency_hz
        );
        for n in -3i32..=3 {
            let line = comb
                .lines
                .iter()
                .find(|l| l.order == n)
                .expect("order measured");
            let want = powers[n.unsigned_abs() as usize];
            // Every line has the strongest line's shape, so integral / equivalent bandwidth is
            // its peak power: within 1 % (0.04 dB).
            assert!(
                (line.power_mw / want - 1.0).abs() < 0.01,
                "order {n}: {} mW, written {want} mW",
                line.power_mw
            );
            assert!(line.above_floor, "order {n}");
            assert!(
                (line.frequency_hz - (carrier + f64::from(n) * 10e9)).abs() < 5e6,
                "order {n} at {}",
                line.frequency_hz
            );
        }
        // The floor between the lines is the written -70 dBm (1e-7 mW) within 1 %.
        assert!(
            (comb.floor_mw / 1e-7 - 1.0).abs() < 0.01,
            "{}",
            comb.floor_mw
        );
    }

    #[test]
    fn spans_and_spacings_that_cannot_hold_a_comb_are_named() {
        let trace = gaussian_comb(193.4e12, 10e9, 1e9, [1.0, 0.5, 0.1, 0.01], 1e-7);
        // The span is 110 GHz: a 60 GHz modulation needs 120 GHz (the carrier and one sideband
        // each side).
        assert!(matches!(
            check_span(&trace, Hz(60e9)),
            Err(AnalysisError::SpanTooNarrow { .. })
        ));
        // 2201 points over 110 GHz are 50 MHz apart: a 0.2 GHz spacing has 4 points per line
        // spacing, fewer than the 6 needed.
        assert!(matches!(
            check_span(&trace, Hz(0.2e9)),
            Err(AnalysisError::TooCoarse(_))
        ));
        for bad in [0.0, -1e9, f64::NAN] {
            assert!(matches!(
                check_span(&trace, Hz(bad)),
                Err(AnalysisError::BadModulationFrequency(_))
            ));
        }
        assert!(check_span(&trace, Hz(10e9)).is_ok());
    }

    #[test]
    fn median_and_window_follow_their_definitions() {
        // Hand-worked: the median of an odd count is the middle value (definition of the
        // median); of an even count this one takes the upper middle value (the floor sample
        // holds hundreds of points, where the two middle values barely differ).
        assert_eq!(median_in_place(&mut [5.0, 1.0, 3.0]), 3.0);
        assert_eq!(median_in_place(&mut [4.0, 1.0, 3.0, 2.0]), 3.0);
        assert_eq!(median_in_place(&mut []), 0.0);
        // The points within +-1.5 of 5.0 on the axis 0, 1, ..., 9 are 4, 5, 6.
        let axis: Vec<f64> = (0..10).map(f64::from).collect();
        assert_eq!(window(&axis, 5.0, 1.5), 4..7);
    }
}

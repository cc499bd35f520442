//! Measurement truth: a randomised, seeded study of the modulation index recovered by
//! `analyze_trace` from traces that do NOT come from the analysis' own forward model.
//!
//! Two generators, each written apart from `server/src/analysis`:
//! - the simulated bench's physics (`halfwave_drivers::sim::physics`: Jacobi-Anger line powers
//!   from `puruspe`, DLMF 10.12.1, residual AM mixing neighbouring orders, a Gaussian filter
//!   broadened by the laser's Lorentzian linewidth as a pseudo-Voigt, or a Lorentzian filter);
//! - a field synthesiser here: E(t) = (1 + m cos wt) exp(i beta sin wt) sampled over one period
//!   and transformed with `rustfft` (no Bessel function anywhere), each line then drawn through a
//!   Gaussian, a Lorentzian or a true Voigt filter (the Gaussian convolved with the Lorentzian by
//!   quadrature, not the pseudo-Voigt approximation).
//!
//! Conditions are drawn at random (seeded): resolution bandwidth 1-100 MHz, line spacing 4 to 1000
//! resolution widths, beta 0.05-6, floor 40-75 dB under the optical power, display noise
//! 0.01-0.2 dB, carrier anywhere within half a spacing of the centre, point spacing from a 30th of
//! the resolution width down to the resolution width itself, residual AM on a quarter of the
//! traces, an RF-off reference trace (drifted) on about half. Over the traces analysed, the median
//! |error| must be at most 0.1 %, the 95th percentile at most 0.3 %, and |error| <= 2 u (combined
//! standard uncertainty, GUM JCGM 100:2008 5.1.2) on at least 95 %, and no failure may be
//! silent: a trace off by more than 1 % must be refused or carry the named warning that its
//! uncertainty does not keep beta within 1 % (`analysis::precision`). The table by condition is
//! printed (`cargo test --test measurement_truth -- --nocapture`).

use halfwave::analysis::{analyze_trace, AnalysisError, AnalysisOptions};
use halfwave::units::{Hz, Trace};
use halfwave_drivers::sim::physics::{self, OpticalLine, Rendering};
use halfwave_drivers::sim::scenario::FilterShape;
use rand::rngs::StdRng;
use rand::{Rng, SeedableRng};
use rand_distr::{Distribution, Normal};
use rustfft::{num_complex::Complex, FftPlanner};
use std::collections::BTreeMap;

const TRACES: usize = 320;
const CENTRE_HZ: f64 = 193.4e12;
const MAX_POINTS: usize = 20_001;

#[derive(Debug, Clone, Copy, PartialEq)]
enum Generator {
    Simulator,
    Fft,
}

#[derive(Debug, Clone, Copy, PartialEq)]
enum Filter {
    Gaussian,
    Lorentzian,
    /// Gaussian filter with a Lorentzian laser line of this fraction of the RBW.
    Voigt(f64),
}

#[derive(Debug, Clone)]
struct Condition {
    generator: Generator,
    filter: Filter,
    rbw: f64,
    spacing: f64,
    beta: f64,
    floor_below_db: f64,
    noise_db: f64,
    drift: f64,
    points_per_rbw: f64,
    am_depth: f64,
    reference: bool,
}

/// Line powers |c_n|^2 of E(t) = (1 + m cos t) exp(i beta sin t) by FFT over one period.
fn fft_comb(beta: f64, am: f64) -> Vec<(i32, f64)> {
    const M: usize = 512;
    let mut buffer: Vec<Complex<f64>> = (0..M)
        .map(|k| {
            let t = 2.0 * std::f64::consts::PI * k as f64 / M as f64;
            let amplitude = 1.0 + am * t.cos();
            Complex::from_polar(amplitude, beta * t.sin())
        })
        .collect();
    FftPlanner::new().plan_fft_forward(M).process(&mut buffer);
    (-(M as i32) / 2 + 1..(M as i32) / 2)
        .map(|n| {
            let c = buffer[n.rem_euclid(M as i32) as usize] / M as f64;
            (n, c.norm_sqr())
        })
        .filter(|(_, p)| *p > 1e-16)
        .collect()
}

/// A unit-peak line shape for the FFT generator.
struct Shape {
    filter: Filter,
    /// Gaussian sigma and Lorentzian half width.
    sigma: f64,
    gamma: f64,
    /// Voigt: table over |x| (uniform core, then geometric), values normalised to the peak.
    core_step: f64,
    core: Vec<f64>,
    tail_start: f64,
    tail_ratio: f64,
    tail: Vec<f64>,
}

impl Shape {
    fn new(filter: Filter, rbw: f64) -> Shape {
        let sigma = rbw / (8.0 * std::f64::consts::LN_2).sqrt();
        let gamma = match filter {
            Filter::Lorentzian => 0.5 * rbw,
            Filter::Voigt(fraction) => 0.5 * fraction * rbw,
            Filter::Gaussian => 0.0,
        };
        let mut shape = Shape {
            filter,
            sigma,
            gamma,
            core_step: sigma / 25.0,
            core: Vec::new(),
            tail_start: 30.0 * sigma,
            tail_ratio: 1.01,
            tail: Vec::new(),
        };
        if let Filter::Voigt(_) = filter {
            shape.core = (0..=750)
                .map(|j| shape.voigt(j as f64 * shape.core_step))
                .collect();
            let mut x = shape.tail_start;
            while x < 1e7 * sigma {
                shape.tail.push(shape.voigt(x));
                x *= shape.tail_ratio;
            }
            let peak = shape.core[0];
            shape.core.iter_mut().for_each(|v| *v /= peak);
            shape.tail.iter_mut().for_each(|v| *v /= peak);
        }
        shape
    }

    /// Voigt profile (area-normalised): the product of the Gaussian's and the Lorentzian's
    /// characteristic functions transformed back, V(x) = (1/pi) int_0^inf exp(-gamma t -
    /// sigma^2 t^2 / 2) cos(x t) dt, by Simpson's rule up to t = 9 / sigma; beyond 30 sigma, where
    /// the Gaussian has no weight left, the Lorentzian smoothed by the Gaussian's second and
    /// fourth moments, V = L + sigma^2 L''/2 + sigma^4 L''''/8 (relative error ~ (sigma/x)^6).
    fn voigt(&self, x: f64) -> f64 {
        let (s, g) = (self.sigma, self.gamma);
        let pi = std::f64::consts::PI;
        if x.abs() >= 30.0 * s {
            let q = x * x + g * g;
            let l = g / pi / q;
            let l2 = g / pi * (6.0 * x * x - 2.0 * g * g) / q.powi(3);
            let l4 =
                g / pi * 24.0 * (5.0 * x.powi(4) - 10.0 * x * x * g * g + g.powi(4)) / q.powi(5);
            return l + 0.5 * s * s * l2 + s.powi(4) / 8.0 * l4;
        }
        let top = 9.0 / s;
        let n = 6000;
        let h = top / n as f64;
        let f = |t: f64| (-g * t - 0.5 * s * s * t * t).exp() * (x * t).cos();
        let mut sum = f(0.0) + f(top);
        for k in 1..n {
            sum += f(k as f64 * h) * if k % 2 == 1 { 4.0 } else { 2.0 };
        }
        sum * h / 3.0 / pi
    }

    fn at(&self, x: f64) -> f64 {
        let x = x.abs();
        match self.filter {
            Filter::Gaussian => (-0.5 * x * x / (self.sigma * self.sigma)).exp(),
            Filter::Lorentzian => 1.0 / (1.0 + (x / self.gamma).powi(2)),
            Filter::Voigt(_) => {
                if x < self.tail_start {
                    let t = x / self.core_step;
                    let j = t.floor() as usize;
                    let s = t - j as f64;
                    // Cubic (Catmull-Rom) between table points; the table is even in x.
                    let at = |i: isize| self.core[i.unsigned_abs().min(self.core.len() - 1)];
                    let j = j as isize;
                    let (p0, p1, p2, p3) = (at(j - 1), at(j), at(j + 1), at(j + 2));
                    p1 + 0.5
                        * s
                        * (p2 - p0
                            + s * (2.0 * p0 - 5.0 * p1 + 4.0 * p2 - p3
                                + s * (3.0 * (p1 - p2) + p3 - p0)))
                } else {
                    let t = (x / self.tail_start).ln() / self.tail_ratio.ln();
                    let j = t.floor() as usize;
                    if j + 1 >= self.tail.len() {
                        return 0.0;
                    }
                    let s = t - j as f64;
                    (self.tail[j].max(1e-300).ln() * (1.0 - s)
                        + self.tail[j + 1].max(1e-300).ln() * s)
                        .exp()
                }
            }
        }
    }
}

/// Renders the FFT generator's trace in dBm.
fn fft_trace(c: &Condition, beta: f64, carrier: f64, axis: &[f64], rng: &mut StdRng) -> Vec<f64> {
    let shape = Shape::new(c.filter, c.rbw);
    let lines = fft_comb(beta, if beta == 0.0 { 0.0 } else { c.am_depth });
    let floor = 10f64.powf(-c.floor_below_db / 10.0);
    let noise = Normal::new(0.0, c.noise_db).unwrap();
    let mut linear = vec![floor; axis.len()];
    for (n, p) in lines {
        if p < 1e-9 * floor {
            continue;
        }
        let centre = carrier + n as f64 * c.spacing;
        for (i, f) in axis.iter().enumerate() {
            linear[i] += p * shape.at(f - centre);
        }
    }
    linear
        .iter()
        .map(|m| 10.0 * m.log10() + noise.sample(rng))
        .collect()
}

/// Renders the simulator's trace in dBm.
fn sim_trace(c: &Condition, beta: f64, carrier: f64, axis: &[f64], rng: &mut StdRng) -> Vec<f64> {
    let (filter, linewidth) = match c.filter {
        Filter::Gaussian => (FilterShape::Gaussian, 0.0),
        Filter::Lorentzian => (FilterShape::Lorentzian, 0.0),
        Filter::Voigt(fraction) => (FilterShape::Gaussian, fraction * c.rbw),
    };
    let lines: Vec<OpticalLine> = physics::comb_lines(
        beta,
        if beta == 0.0 { 0.0 } else { c.am_depth },
        90f64.to_radians(),
    )
    .into_iter()
    .map(|l| OpticalLine {
        frequency_hz: carrier + l.order as f64 * c.spacing,
        power_mw: l.relative_power,
    })
    .collect();
    let rendering = Rendering {
        start_hz: axis[0],
        stop_hz: axis[axis.len() - 1],
        points: axis.len(),
        resolution_bandwidth_hz: c.rbw,
        filter,
        laser_linewidth_hz: linewidth,
        noise_floor_dbm: -c.floor_below_db,
        display_noise_db: c.noise_db,
    };
    physics::render_trace(&lines, &rendering, rng)
}

fn log_uniform(rng: &mut StdRng, lo: f64, hi: f64) -> f64 {
    (rng.random::<f64>() * (hi / lo).ln()).exp() * lo
}

fn draw_condition(rng: &mut StdRng, i: usize) -> Condition {
    let generator = if i.is_multiple_of(2) {
        Generator::Simulator
    } else {
        Generator::Fft
    };
    let filter = match (i / 2) % 3 {
        0 => Filter::Gaussian,
        1 => Filter::Lorentzian,
        _ => Filter::Voigt(log_uniform(rng, 0.002, 0.05)),
    };
    let rbw = log_uniform(rng, 1e6, 100e6);
    let spacing = rbw * log_uniform(rng, 4.0, 1000.0);
    // Half log-uniform (small indices), half uniform (the ramp's middle and the null).
    let beta = if rng.random::<bool>() {
        log_uniform(rng, 0.05, 6.0)
    } else {
        rng.random_range(0.05..6.0)
    };
    Condition {
        generator,
        filter,
        rbw,
        spacing,
        beta,
        floor_below_db: rng.random_range(40.0..75.0),
        noise_db: log_uniform(rng, 0.01, 0.2),
        drift: rng.random_range(-0.5..0.5),
        points_per_rbw: log_uniform(rng, 1.0, 30.0),
        am_depth: if rng.random::<f64>() < 0.25 {
            rng.random_range(0.005..0.03)
        } else {
            0.0
        },
        reference: rng.random::<bool>(),
    }
}

struct Outcome {
    condition: Condition,
    /// Points per RBW actually used (capped by MAX_POINTS).
    points_per_rbw: f64,
    result: Result<(f64, f64), AnalysisError>,
    chi2: f64,
    shape: String,
    /// The result came with a named warning (`analysis::precision`).
    warned: bool,
}

fn run_one(c: &Condition, rng: &mut StdRng) -> Outcome {
    // Span: the orders that carry power above the floor, as a plan's expected orders would.
    let orders = (c.beta + 3.0 * c.beta.sqrt() + 4.0).ceil();
    let span = (2.0 * orders + 2.0) * c.spacing;
    let step = (c.rbw / c.points_per_rbw).max(span / (MAX_POINTS - 1) as f64);
    let points = (span / step).round() as usize + 1;
    let start = CENTRE_HZ - 0.5 * span;
    let axis: Vec<f64> = (0..points)
        .map(|i| start + span * i as f64 / (points - 1) as f64)
        .collect();
    let carrier = CENTRE_HZ + c.drift * c.spacing + 0.1234 * step;
    let render = |beta: f64, carrier: f64, rng: &mut StdRng| match c.generator {
        Generator::Simulator => sim_trace(c, beta, carrier, &axis, rng),
        Generator::Fft => fft_trace(c, beta, carrier, &axis, rng),
    };
    let levels = render(c.beta, carrier, rng);
    let trace = Trace::new(axis.clone(), levels, None).unwrap_or_else(|e| panic!("{e:?} {c:?}"));
    let reference = c.reference.then(|| {
        // The laser drifts between the reference and the measurement (a few RBW).
        let drifted = carrier - rng.random_range(-3.0..3.0) * c.rbw;
        Trace::new(axis.clone(), render(0.0, drifted, rng), None).unwrap()
    });
    let analysis = analyze_trace(
        &trace,
        Hz(c.spacing),
        reference.as_ref(),
        &AnalysisOptions::default(),
    );
    let (chi2, shape) = analysis.as_ref().map_or((f64::NAN, String::new()), |a| {
        (
            a.fit.reduced_chi_squared,
            format!(
                "{:?} carrier {:+.3} pts, {} iterations, w {:.3e} eta {:.4} wl {:.3e} a {:.2e}",
                a.fit.line_shape,
                (a.fit.carrier_frequency_hz.0 - carrier) / step,
                a.fit.iterations,
                a.fit.line_width_hz,
                a.fit.line_shape_eta,
                a.fit.lorentzian_width_hz,
                a.fit.residual_am_depth
            ),
        )
    });
    let warned = analysis.as_ref().is_ok_and(|a| !a.warnings.is_empty());
    let result = analysis.map(|a| (a.modulation_index.value, a.modulation_index.uncertainty));
    Outcome {
        condition: c.clone(),
        points_per_rbw: c.rbw / step,
        result,
        chi2,
        shape,
        warned,
    }
}

fn percentile(sorted: &[f64], q: f64) -> f64 {
    if sorted.is_empty() {
        return f64::NAN;
    }
    let i = ((sorted.len() - 1) as f64 * q).round() as usize;
    sorted[i]
}

#[derive(Default)]
struct Row {
    errors: Vec<f64>,
    covered: usize,
    refused: usize,
}

impl Row {
    fn add(&mut self, o: &Outcome) {
        match &o.result {
            Ok((beta, u)) => {
                let err = (beta - o.condition.beta) / o.condition.beta;
                self.errors.push(err.abs());
                if (beta - o.condition.beta).abs() <= 2.0 * u {
                    self.covered += 1;
                }
            }
            Err(_) => self.refused += 1,
        }
    }

    fn line(&self, name: &str) -> String {
        let mut e = self.errors.clone();
        e.sort_by(f64::total_cmp);
        format!(
            "{name:<34} {:>4} {:>4} {:>9.4} {:>9.4} {:>9.4} {:>7.1}",
            e.len(),
            self.refused,
            100.0 * percentile(&e, 0.5),
            100.0 * percentile(&e, 0.95),
            100.0 * e.last().copied().unwrap_or(f64::NAN),
            100.0 * self.covered as f64 / e.len().max(1) as f64,
        )
    }
}

#[test]
fn randomised_study_of_beta_against_two_independent_generators() {
    let mut rng = StdRng::seed_from_u64(20_260_311);
    let outcomes: Vec<Outcome> = (0..TRACES)
        .map(|i| {
            let c = draw_condition(&mut rng, i);
            run_one(&c, &mut rng)
        })
        .collect();

    let mut table: BTreeMap<String, Row> = BTreeMap::new();
    let mut all = Row::default();
    for o in &outcomes {
        let c = &o.condition;
        let keys = [
            format!(
                "generator {:?} / {}",
                c.generator,
                match c.filter {
                    Filter::Gaussian => "gaussian",
                    Filter::Lorentzian => "lorentzian",
                    Filter::Voigt(_) => "voigt",
                }
            ),
            format!(
                "beta {}",
                match c.beta {
                    b if b < 0.3 => "0.05-0.3",
                    b if b < 1.0 => "0.3-1",
                    b if b < 2.2 => "1-2.2",
                    b if b < 2.6 => "2.2-2.6 (null)",
                    _ => "2.6-6",
                }
            ),
            format!(
                "spacing/RBW {}",
                match c.spacing / c.rbw {
                    r if r < 10.0 => "4-10",
                    r if r < 100.0 => "10-100",
                    _ => "100-1000",
                }
            ),
            format!(
                "points/RBW {}",
                match o.points_per_rbw {
                    r if r < 2.0 => "1-2",
                    r if r < 5.0 => "2-5",
                    _ => "5-30",
                }
            ),
            format!(
                "noise {}",
                if c.noise_db < 0.05 {
                    "0.01-0.05 dB"
                } else {
                    "0.05-0.2 dB"
                }
            ),
            format!("reference {}", if c.reference { "yes" } else { "no" }),
            format!(
                "residual AM {}",
                if c.am_depth > 0.0 { "yes" } else { "no" }
            ),
        ];
        for key in keys {
            table.entry(key).or_default().add(o);
        }
        all.add(o);
    }
    println!(
        "{:<34} {:>4} {:>4} {:>9} {:>9} {:>9} {:>7}",
        "condition", "n", "ref.", "med %", "p95 %", "max %", "<=2u %"
    );
    for (name, row) in &table {
        println!("{}", row.line(name));
    }
    println!("{}", all.line("all"));

    // No silent failure: every analysed trace within 1 %, every other one a named refusal.
    let mut silent = Vec::new();
    for o in &outcomes {
        match &o.result {
            Ok((beta, u)) => {
                let err = (beta - o.condition.beta) / o.condition.beta;
                if err.abs() > 0.003 {
                    println!(
                        "over 0.3 %: {:+.3} % u {:.3} % beta {:.3} {:?} {:?} {:.2} pts/RBW ref {} am {:.3} noise {:.3} spacing/RBW {:.0} chi2 {:.2} {}",
                        100.0 * err,
                        100.0 * u / beta,
                        o.condition.beta,
                        o.condition.generator,
                        o.condition.filter,
                        o.points_per_rbw,
                        o.condition.reference,
                        o.condition.am_depth,
                        o.condition.noise_db,
                        o.condition.spacing / o.condition.rbw,
                        o.chi2,
                        o.shape
                    );
                }
                if err.abs() > 0.01 && !o.warned {
                    silent.push(format!(
                        "{:?}: beta {beta} +- {u} ({:.3} %) chi2 {:.2} {}",
                        o.condition,
                        100.0 * err,
                        o.chi2,
                        o.shape
                    ));
                }
            }
            Err(e) => println!(
                "refused: {e} ({:?}, {:.2} points/RBW)",
                o.condition, o.points_per_rbw
            ),
        }
    }
    for s in &silent {
        println!("over 1 % without a refusal or a warning: {s}");
    }
    // What relative line-shape term would cover each analysed trace at k = 2 (for setting
    // SHAPE_SYSTEMATIC_*): sqrt((err / 2)^2 - u^2) / beta, quantiles by shape kind.
    for kind in ["Measured", "PseudoVoigt", "Voigt"] {
        let mut needed: Vec<f64> = outcomes
            .iter()
            .filter(|o| o.shape.starts_with(kind))
            .filter_map(|o| o.result.as_ref().ok().map(|r| (o, r)))
            .map(|(o, (beta, u))| {
                let half = 0.5 * (beta - o.condition.beta);
                (half * half - u * u).max(0.0).sqrt() / o.condition.beta
            })
            .collect();
        needed.sort_by(f64::total_cmp);
        println!(
            "{kind}: {} traces, relative shape term needed at 50/90/95 %: {:.2e} {:.2e} {:.2e}",
            needed.len(),
            percentile(&needed, 0.5),
            percentile(&needed, 0.9),
            percentile(&needed, 0.95)
        );
    }
    // A true Voigt filter (the FFT generator's) without a reference fine enough for the measured
    // shape: read with the parametric shapes, where the pseudo-Voigt alone left beta biased by
    // up to 1.7 % at small beta with a residual at the noise level. The Voigt profile must be
    // the one chosen and the error must be that of the other conditions.
    let true_voigt_parametric = |o: &Outcome| {
        o.condition.generator == Generator::Fft
            && matches!(o.condition.filter, Filter::Voigt(_))
            && o.result.is_ok()
            && !o.shape.starts_with("Measured")
    };
    let mut voigt_row = Row::default();
    let mut voigt_chosen = 0;
    for o in outcomes.iter().filter(|o| true_voigt_parametric(o)) {
        voigt_row.add(o);
        voigt_chosen += usize::from(o.shape.starts_with("Voigt"));
    }
    println!("{}", voigt_row.line("true Voigt, parametric shape"));
    println!(
        "true Voigt, parametric shape: read with the Voigt profile on {voigt_chosen} of {}",
        voigt_row.errors.len()
    );
    let stats = |row: &Row| {
        let mut e = row.errors.clone();
        e.sort_by(f64::total_cmp);
        (
            percentile(&e, 0.5),
            percentile(&e, 0.95),
            e.last().copied().unwrap_or(0.0),
            row.covered as f64 / e.len().max(1) as f64,
        )
    };
    let (median, p95, worst, coverage) = stats(&all);
    // The targets: median <= 0.1 %, 95th percentile <= 0.3 %, |error| <= 2u on >= 95 %.
    assert!(median <= 0.001, "median |error| {:.4} %", 100.0 * median);
    assert!(p95 <= 0.003, "95th percentile |error| {:.4} %", 100.0 * p95);
    assert!(
        coverage >= 0.95,
        "|error| <= 2u on {:.1} %",
        100.0 * coverage
    );
    assert!(all.refused <= TRACES / 10, "{} refusals", all.refused);
    // No silent failure: every trace off by more than 1 % carries the named warning (before the
    // warning, three did not: 1.03 and 1.43 points per resolution width under 0.09-0.1 dB of
    // display noise, and beta 0.108 on overlapping Lorentzian lines; their stated standard
    // uncertainties were 0.46-1.03 %). The warning must stay the exception: 18 of 311 analysed
    // traces carried it when it was set, 15 of them within 1 % all the same.
    let warned = outcomes.iter().filter(|o| o.warned).count();
    let warned_within = outcomes
        .iter()
        .filter(|o| o.warned)
        .filter(|o| {
            o.result
                .as_ref()
                .is_ok_and(|(b, _)| ((b - o.condition.beta) / o.condition.beta).abs() <= 0.01)
        })
        .count();
    println!(
        "named warning on {warned} analysed traces ({warned_within} of them within 1 % all the same)"
    );
    assert!(
        silent.is_empty(),
        "{} traces off by more than 1 % without a refusal or a warning",
        silent.len()
    );
    assert!(warned <= TRACES / 10, "{warned} traces warned");
    assert!(worst <= 0.015, "worst |error| {:.4} %", 100.0 * worst);
    let (_, voigt_p95, _, voigt_coverage) = stats(&voigt_row);
    assert!(
        voigt_chosen * 10 >= voigt_row.errors.len() * 8,
        "the Voigt profile read {voigt_chosen} of {} true-Voigt traces",
        voigt_row.errors.len()
    );
    assert!(
        voigt_p95 <= 0.003 && voigt_coverage >= 0.95,
        "true Voigt, parametric shape: p95 {:.4} %, |error| <= 2u on {:.1} %",
        100.0 * voigt_p95,
        100.0 * voigt_coverage
    );
}

#[test]
fn the_fft_generator_matches_the_jacobi_anger_expansion() {
    // The generator's own check: without AM the FFT line powers are J_n(beta)^2, A&S Table 9.1
    // values at beta = 1: J_0 = 0.7651976866, J_1 = 0.4400505857, J_2 = 0.1149034849.
    let lines = fft_comb(1.0, 0.0);
    let p = |n: i32| lines.iter().find(|l| l.0 == n).unwrap().1;
    for (n, j) in [
        (0, 0.765_197_686_6),
        (1, 0.440_050_585_7),
        (2, 0.114_903_484_9),
    ] {
        assert!((p(n) - j * j).abs() < 1e-9, "order {n}");
        assert!((p(-n) - j * j).abs() < 1e-9, "order -{n}");
    }
    // The Voigt table: a Lorentzian fraction going to zero gives the Gaussian back (half
    // maximum at half the RBW).
    let shape = Shape::new(Filter::Voigt(1e-4), 1e6);
    assert!((shape.at(0.5e6) - 0.5).abs() < 2e-3, "{}", shape.at(0.5e6));
}

/// Lines on each other's Lorentzian wings at a small index (4.4 resolution widths apart, beta
/// 0.108): the line-by-line start reads beta near 1.4 (each line's window holds its neighbours'
/// wings), and the fit's first step from there used to overshoot beta to its lower bound, where
/// its slope vanishes, and end in "did not converge". The trace is now fitted, within its stated
/// uncertainty at k = 2, with the carrier at four places from half a spacing below the span's
/// centre to a third of one above.
#[test]
fn a_small_index_on_lines_that_overlap_is_fitted_not_refused() {
    for (seed, drift) in [(1, -0.49), (2, -0.2), (3, 0.0), (4, 0.3)] {
        let c = Condition {
            generator: Generator::Fft,
            filter: Filter::Lorentzian,
            rbw: 1.5626e6,
            spacing: 6.8527e6,
            beta: 0.1076,
            floor_below_db: 44.5,
            noise_db: 0.098,
            drift,
            points_per_rbw: 27.2,
            am_depth: 0.0057,
            reference: false,
        };
        let o = run_one(&c, &mut StdRng::seed_from_u64(seed));
        let (beta, u) = o
            .result
            .unwrap_or_else(|e| panic!("drift {drift}: refused: {e}"));
        assert!(
            (beta - c.beta).abs() <= 2.0 * u,
            "drift {drift}: beta {beta} +- {u} against {}",
            c.beta
        );
    }
}

/// An index just above the first zero of J_1 (j_1,1 = 3.8317, A&S Table 9.5, from memory), on a
/// trace with under two points per resolution width: the first sidebands' power J_1^2 is nearly
/// the same at the mirror image of beta across that zero (3.821), and the fit, started from the
/// line-by-line estimate, settled there on some noise draws (on 6 of 40 seeds, 0.58 % low, six
/// times its stated uncertainty, with a 3 % narrower line and a larger residual). The mirror
/// image is now tried too and the smaller residual kept: every seed within 0.05 % of beta.
#[test]
fn an_index_near_a_bessel_zero_is_not_trapped_on_its_mirror_image() {
    let c = Condition {
        generator: Generator::Simulator,
        filter: Filter::Lorentzian,
        rbw: 3.6345e6,
        spacing: 1.68825e9,
        beta: 3.8431,
        floor_below_db: 65.3,
        noise_db: 0.0877,
        drift: 0.0675,
        points_per_rbw: 1.93,
        am_depth: 0.0,
        reference: false,
    };
    for seed in 1000..1016 {
        let o = run_one(&c, &mut StdRng::seed_from_u64(seed));
        let (beta, u) = o
            .result
            .unwrap_or_else(|e| panic!("seed {seed}: refused: {e}"));
        let error = (beta - c.beta) / c.beta;
        assert!(
            error.abs() < 5e-4 && (beta - c.beta).abs() <= 2.0 * u,
            "seed {seed}: beta {beta} +- {u} against {} ({:+.3} %, {})",
            c.beta,
            100.0 * error,
            o.shape
        );
    }
}

/// The randomised study draws each condition once; this draws 400 other conditions (seed 77) and
/// renders each eight times with other noise (seeds 5000-5007), so that a fit that settles on the
/// wrong minimum on some draws, or an uncertainty that covers one draw by luck, shows. It asserts
/// coverage at k = 2 over all draws (at least 95 %) and prints the conditions with a draw beyond
/// 3 standard uncertainties. About 3,100 fits: a minute and a half in release, so it is not part
/// of the default run; `cargo test --release --test measurement_truth -- --ignored --nocapture`.
#[test]
#[ignore]
fn coverage_holds_over_repeated_noise_draws() {
    let mut rng = StdRng::seed_from_u64(77);
    let (mut analysed, mut covered, mut beyond_3u) = (0, 0, 0);
    for i in 0..400 {
        let c = draw_condition(&mut rng, i);
        let mut worst: Option<(f64, String)> = None;
        for seed in 5000..5008 {
            let o = run_one(&c, &mut StdRng::seed_from_u64(seed));
            let Ok((beta, u)) = o.result else { continue };
            analysed += 1;
            let z = (beta - c.beta) / u;
            if z.abs() <= 2.0 {
                covered += 1;
            }
            if worst.as_ref().is_none_or(|(w, _)| z.abs() > w.abs()) {
                let error = 100.0 * (beta - c.beta) / c.beta;
                let line = format!("{error:+.3} % u {:.3} % {}", 100.0 * u / c.beta, o.shape);
                worst = Some((z, line));
            }
        }
        if let Some((z, line)) = worst.filter(|(z, _)| z.abs() > 3.0) {
            beyond_3u += 1;
            println!("{z:+.1} u: {line} | {c:?}");
        }
    }
    let coverage = covered as f64 / analysed as f64;
    println!(
        "{analysed} draws analysed, {:.1} % within 2u; {beyond_3u} of 400 conditions with a draw beyond 3u",
        100.0 * coverage
    );
    assert!(coverage >= 0.95, "coverage {coverage}");
}

/// A line shape measured point by point (about 9 points per resolution width: too few for the
/// smoothing) on a reference with 0.12-0.14 dB of display noise, at small indices where the weak
/// sidebands make beta lean on the shape's wings. The reference's noise is the same for every
/// line and does not show in the residual. Before it was propagated into the uncertainty
/// (`uncertainty_reference`), beta scattered 1.41 and 1.57 times its stated uncertainty over 30
/// noise draws of these two conditions in the probe that found them, and this test failed on the
/// first (spread 1.41, 26 of 30 within 2u). The spread of (beta - true) / u over 30 draws must
/// lie within 0.75-1.25 (measured 1.07 and 0.98), with at least 27 draws within 2u.
#[test]
fn the_reference_noise_of_a_point_by_point_shape_is_covered() {
    let conditions = [
        Condition {
            generator: Generator::Fft,
            filter: Filter::Lorentzian,
            rbw: 39.687e6,
            spacing: 351.566e6,
            beta: 0.66551,
            floor_below_db: 56.01,
            noise_db: 0.1158,
            drift: -0.4318,
            points_per_rbw: 8.896,
            am_depth: 0.0,
            reference: true,
        },
        Condition {
            generator: Generator::Simulator,
            filter: Filter::Voigt(0.02),
            rbw: 3.6705e6,
            spacing: 41.922e6,
            beta: 0.68635,
            floor_below_db: 62.57,
            noise_db: 0.1371,
            drift: -0.3503,
            points_per_rbw: 9.003,
            am_depth: 0.0,
            reference: true,
        },
    ];
    for c in &conditions {
        let mut z = Vec::new();
        for seed in 6000..6030 {
            let o = run_one(c, &mut StdRng::seed_from_u64(seed));
            let (beta, u) = o
                .result
                .unwrap_or_else(|e| panic!("seed {seed}: refused: {e} {c:?}"));
            assert!(o.shape.starts_with("Measured"), "seed {seed}: {}", o.shape);
            z.push((beta - c.beta) / u);
        }
        let n = z.len() as f64;
        let mean = z.iter().sum::<f64>() / n;
        let spread = (z.iter().map(|v| (v - mean).powi(2)).sum::<f64>() / (n - 1.0)).sqrt();
        let covered = z.iter().filter(|v| v.abs() <= 2.0).count();
        println!("{c:?}: mean z {mean:+.2}, spread {spread:.2}, {covered} of 30 within 2u");
        assert!(
            (0.75..=1.25).contains(&spread) && covered >= 27,
            "spread of z {spread:.2}, {covered} of 30 within 2u: {c:?}"
        );
    }
}

//! Pure measurement analysis: analyzer trace -> comb lines -> modulation index -> V_pi.
//!
//! No I/O, no clocks, no global state: every function takes typed values and returns a result with
//! its uncertainty, so the engine, the offline `analyze` command and the benchmarks share one code
//! path.
//!
//! - [`chain`]: generator level <-> level at the modulator <-> peak voltage.
//! - [`drive_plan`]: the generator level for a wanted modulation index (and back), with uncertainty.
//! - [`touchstone`]: Touchstone 1.x / 2.0 files read into S-parameters at 50 ohm.
//! - [`cascade`]: two-ports cascaded and terminated in the modulator: the chain's gain table.
//! - [`bessel`]: J_n tabulated once for fast fitting, with its reference checks.
//! - [`comb`]: finding the comb on a trace and measuring its lines and floor.
//! - [`faddeeva`]: the Faddeeva function w(z), whose real part is the Voigt line shape.
//! - [`fit`]: the whole displayed trace fitted with the instrument's line shape (the primary).
//! - `smooth_shape`: the measured line shape smoothed (ln K as a penalised cubic B-spline).
//! - `reference_noise`: the reference's display noise in a point-by-point measured shape, carried
//!   into the index's uncertainty.
//! - [`spacing`]: the line spacing read from the trace alone.
//! - [`modulation_index`]: the modulation index by least squares, sideband ratio and carrier depletion.
//! - [`trace_analysis`]: one trace in, every estimate and the line table out.
//! - [`vpi`]: V_pi from a drive-level sweep, with the points that break the line flagged.
//! - [`vpi_lookup`]: V_pi between a run's measured frequencies (and, when asked, beyond them).
//! - [`budget`]: V_pi's uncertainty budget (fit, chain, generator level) by the GUM.
//! - [`agreement`]: whether two V_pi agree within their uncertainties (E_n).
//! - [`response`]: V_pi versus frequency as a response in dB, with its 3 dB and 6 dB points.
//! - [`precision`]: whether beta can be promised within 1 %, and the named warning when not.
//! - [`prediction`]: the comb a periodic phase drive (several harmonics) makes, exactly.
//! - [`synthetic`]: traces computed from Bessel physics, for tests, benchmarks and demos.
//! - [`error`]: the one error type, with messages for the operator.
//! - [`ANALYSIS_METHOD`]: the method's name and version, recorded with every run.

pub mod agreement;
pub mod bessel;
pub mod budget;
pub mod cascade;
pub mod chain;
pub mod comb;
pub mod drive_plan;
pub mod error;
pub mod faddeeva;
pub mod fit;
pub mod modulation_index;
pub mod precision;
pub mod prediction;
mod reference_noise;
pub mod response;
#[cfg(test)]
mod robustness_tests;
pub mod sensor_chain;
mod smooth_shape;
pub mod spacing;
pub mod synthetic;
pub mod touchstone;
pub mod trace_analysis;
pub mod vpi;
pub mod vpi_lookup;

pub use chain::{pad_dissipated_fraction, ChainPoint, DriveChain};
pub use error::AnalysisError;
pub use modulation_index::{IndexEstimate, IndexMethod};
pub use precision::AnalysisWarning;
pub use response::{response_curve, ResponseCurve, ResponsePoint, VpiAtFrequency};
pub use trace_analysis::{
    analyze_trace, analyze_trace_with_model, AnalysisOptions, CrossCheck, LineMeasurement,
    OrderAsymmetry, TraceAnalysis,
};
pub use vpi::{fit_v_pi, CarrierNull, DrivePoint, ExcludedPoint, VpiFit};

/// The analysis method, named and versioned, that every run records with its results
/// (`runs.analysis_method`, migration 0011): the whole-trace Bessel comb fit ([`fit`]) for the
/// modulation index, then the weighted line through the origin ([`vpi`]) for V_pi.
///
/// Rule (DEVELOPERS.md, "Analysis"): raise the number after `v` in the same commit as any change
/// that can move a stored beta, V_pi or uncertainty for the same trace (the model, the weights,
/// the exclusion rule, a systematic term, a tolerance). Refactors that leave every number
/// unchanged keep it. A record read later then says which method judged it.
///
/// v2: the Voigt profile as a parametric shape and the measured shape tried against the
/// parametric ones (d2770f5), beta's steps bounded (f0a91ac), a fit near a zero of some J_n tried
/// again from its mirror image (a0e29f4), the smoothed measured shape's unsupported wings bounded
/// (1de37f7). The earlier of these moved stored numbers without raising the version; v2 is raised
/// for all four together.
///
/// v3: a measured shape read point by point carries the reference's display noise into beta's
/// uncertainty (`reference_noise`, `WholeTraceFit::uncertainty_reference`).
///
/// v4: a segment of the fit may reach the nearest line centre (it stopped at half the way):
/// fewer nodes, beta moved by a small fraction of its uncertainty on most traces.
///
/// v5: a trace whose fit leaves a residual far above the noise (reduced chi-squared over 3) and
/// whose line spacing contradicts the modulation frequency given (by more than five standard
/// uncertainties of the spacing read from the trace) is refused as a spacing mismatch; under v4
/// a spacing up to 2 % off was fitted and stored (0.5 % off gave beta 0.3 % off, no warning).
/// Every other trace keeps its numbers: the randomised study and the demo are unchanged.
///
/// v6: a fit with a measured shape starts from the reference's floor (when under the floor read
/// between the lines) and cuts its segments once, at the fine tolerance, from the start (no
/// coarse phase, no first pass of P0 and the floor alone); where the trace lies on the
/// reference's grid, the table is read without locating each point. About half the fit's time
/// on the simulated bench's traces; beta moves by small fractions of its uncertainty.
///
/// v7: a parametric shape's first steps run on segments cut 100 times looser than the fine
/// tolerance (10 times until v6), and on those a beta more than 5 % from its start re-cuts them
/// only when it stays there for a second step (3c680bc); 10^(L/10) is summed by Estrin's scheme
/// and the reference-noise term takes 1/M from it (440c559, 72b975c), which moves every fit in
/// its last digits; ln F moves by at most ln 10 per step (9fc4870: a Gauss-Newton step on a
/// trace whose lines' wings cover every point threw it tens of nepers away, and the fit refused
/// damped steps until one was small enough). A parametric trace's beta moves by small fractions
/// of its uncertainty; the randomised study prints the same coverage and maximum, the 95th
/// percentile 0.2821 % against 0.2825 %, and a few rows' medians and 95th percentiles moved
/// (README, "Measurement truth").
///
/// v8: a measured shape read point by point (its reference's display noise carried into the
/// model) cuts its segments to a tenth of that noise instead of 0.001 dB, when looser (at most
/// 0.1 dB): the benchmark's 1 GHz trace took 48 % fewer instructions and its beta moved by 0.003
/// of its uncertainty. The randomised study prints the same table but one 95th percentile
/// (points/RBW 5-30: 0.1315 % against 0.1314 %); the demo the same V_pi but at 7.96 GHz
/// (+0.141 % against +0.142 %).
///
/// v9: a Gauss-Newton step that asks the floor to fall by more than half (d < -0.5 in ln F) is
/// taken as ln(1 + d), at least -ln 10 (`fit::FLOOR_FALL`): under the lines' wings the level is
/// nearly linear in F, and the step d moved the floor by at most one neper per step. The
/// benchmark's 1 MHz-laser trace took 5 % fewer instructions; the randomised study prints the
/// same coverage, 95th percentile and maximum, and a median of 0.0104 % (0.0106 % under v8);
/// the demo the same V_pi but at 10.02 GHz (+0.090 % against +0.076 %, 0.79 u).
///
/// v10: a Voigt fit started from a pseudo-Voigt's optimum is given up on its coarse segments
/// too, when it stands near the minimum its Gauss-Newton model predicts and its residual and
/// that minimum both stand above 1.5 times the pseudo-Voigt's on the same segments
/// (`fit::ABANDON_FACTOR`, `fit::NEAR_MINIMUM`, `fit::rival_ssr`). It can drop a Voigt that would
/// have won only where no winner stood in the randomised study or in the 3,200 draws of
/// `coverage_holds_over_repeated_noise_draws`; both print v9's figures to the last digit, and the
/// benchmark's 1 MHz-laser trace took 47 % fewer instructions.
///
/// v11: a pseudo-Voigt's Lorentzian part is fitted by its mix and the level of its far wings,
/// ln(eta w_L^2), instead of its width (`fit::wing_level`), so that the valley along which a weak
/// Lorentzian part trades weight for width is straight; its mix falls by at most a factor of
/// four per step (`fit::ETA_FALL`), and a mix that would take the width out of its range moves
/// instead of the wing level; it starts from mix 0 unless the trace stands 3 dB above a
/// Gaussian start midway between its lines (`fit::wings_between_lines`). In the randomised
/// study the pseudo-Voigt fits' iterations fell by 19 % and those run to the 40-iteration limit
/// from 44 to 24; more of its table's figures moved worse than better, each by what one or two
/// of its 311 traces move (README, "Measurement truth"), the repeated draws' coverage rose to
/// 99.4 % (99.3 %), and the demo's V_pi at 10-20 GHz came within 0.031 % of the scenario's.
///
/// v12: a step that turns back along the last one by a share rho of it (in the metric J^T J) is
/// shortened to 1 / (1 + rho) of itself, rho at most 1 (`fit::damp_reversal`, Aitken's
/// extrapolation), so that a fit zig-zagging across a valley lands on its floor. In the
/// randomised study the pseudo-Voigt fits' iterations fell by 21 % (quartiles 6 / 10 / 15
/// against 6 / 10 / 22) and those run to the 40-iteration limit from 24 to 4; its table moved in
/// its last digits (95th percentile 0.2846 % against 0.2849 %, the rest the same), the repeated
/// draws the same (99.4 % within 2u), and every benchmark fit the same to the bit. The demo's
/// V_pi at 10.02 GHz moved from -0.008 % to -0.037 % of the scenario's (its pseudo-Voigt fits
/// crawl along a shallow valley there, see README).
///
/// v13: the pseudo-Voigt's wing level is ln(D w_L^2) with D = sqrt(eta^2 + 1e-4^2)
/// (`fit::wing_weight`, until v12 max(eta, 1e-3), whose corner put a kink in the model along the
/// mix), and a Lorentzian part's width is held only under a share of 1e-4 (`fit::LORENTZIAN_HELD`,
/// until v12 1e-3). The demo's lines at 10-16 GHz, drawn with a Lorentzian share of about 7e-4,
/// had their fits step across the corner and back for 24-41 iterations with the width held,
/// and their V_pi depend on where they stopped; they now settle in 14-19 iterations on average,
/// and every demo V_pi at 10-20 GHz lies within 0.03 % of the scenario's. The randomised study's
/// maximum error fell from 1.46 % to 1.36 % and most rows moved better (README, "Measurement
/// truth"); its pseudo-Voigt fits took 11 % more iterations than under v12 (still 12 % fewer
/// than under v11), 8 at the limit (4).
///
/// v14: a pseudo-Voigt's mix at or under `fit::LORENTZIAN_HELD` (its wing level held) whose
/// Lorentzian width stands at the narrowest end of its range is held in a step that would raise
/// it (its range in `fit::bounds` ends there, and `fit::solve_within_bounds` holds a parameter
/// that would step out of its range): the mix could not rise there (`fit::stepped` moved it back),
/// yet the step was solved as if it did, and the other parameters stepped by what they would take
/// with it, refused every other time, until the iteration limit. In the repeated draws the
/// pseudo-Voigt fits at the limit fell from 136 to 58 (79 had stood there) and their iterations
/// by 3.8 %, with the same coverage (3,119 draws, 99.4 % within 2u, 1 of 400 beyond 3u); in the
/// randomised study from 8 to 3, its table the same to the last printed digit; the demo and every
/// benchmark fit the same.
///
/// v15: a Voigt fit started from a pseudo-Voigt's optimum cuts its first coarse segments on the
/// pseudo-Voigt's model at that optimum (`fit::fit_once`), not on its own start: the two are
/// nearly the same function there, and the pseudo-Voigt costs a fraction of the Voigt's Faddeeva
/// function at every point the cut computes. The Voigt's path over its coarse segments, and so
/// where it stops, can move. The randomised study prints v14's table to the last digit (one
/// refused trace's fitted width moved in its eighth digit), the repeated draws v14's summary,
/// the demo v14's V_pi; every benchmark fit is the same to the bit, and the 1 MHz-laser trace's
/// Voigt attempt took 4.46 M instructions instead of 5.64 M (the fit 16.42 M instead of 17.60 M).
///
/// v16: on the fine segments, right after they are cut too, the next Gauss-Newton step is taken
/// without evaluating the model where it lands, and ends the fit, when it is under two standard
/// uncertainties, the contraction the fit has shown puts the step after it under 0.05 of them,
/// and beta is not near a zero of a fitted line's J_n (`fit::FINAL_STEP`; until v15 only a step
/// under 0.05 of them); the sum of squares there is taken as its quadratic model's. Five of the
/// six benchmark fits took one evaluation fewer (9-14 % fewer instructions), beta moved by at
/// most 5e-5 of its uncertainty. The randomised study moved in its last digits (median, 95th
/// percentile and coverage the same, maximum 1.3643 % against 1.3645 %; 18 traces warned, 17
/// under v15), the repeated draws print v15's summary, and the demo's V_pi at 15.9 and 20 GHz
/// moved by 0.002 % and 0.006 % of the scenario's (the other 19 the same).
pub const ANALYSIS_METHOD: &str = "bessel-comb-trace-fit+weighted-origin-line v16";

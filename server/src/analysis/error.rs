//! Why an analysis was refused.
//!
//! One error type for the whole analysis so that the engine, the API and the offline command can
//! show the operator a single message. Every message says what is wrong with the input and what
//! to do about it; nothing in the analysis panics on measured data.

use halfwave_units::Hz;

/// An analysis could not produce a result from the data it was given.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum AnalysisError {
    /// A drive-chain calibration table is unusable.
    #[error("drive-chain table: {0}")]
    BadChainTable(String),

    /// The modulation frequency is not a positive, finite number.
    #[error("the modulation frequency {0} is not a positive finite number; give the RF drive frequency in hertz")]
    BadModulationFrequency(Hz),

    /// The trace span cannot hold the carrier and both first sidebands.
    #[error(
        "the trace spans {span}, which cannot show lines {modulation} apart on both sides of the carrier; \
         widen the span to at least {needed} or check the modulation frequency"
    )]
    SpanTooNarrow {
        span: Hz,
        modulation: Hz,
        needed: Hz,
    },

    /// The comb spacing is too close to the resolution bandwidth for the lines to be resolved.
    #[error(
        "the line spacing {modulation} is below three resolution bandwidths ({resolution} {how}); the lines \
         are not resolved: use a finer resolution bandwidth or a higher modulation frequency"
    )]
    SpacingBelowResolution {
        modulation: Hz,
        resolution: Hz,
        how: &'static str,
    },

    /// The line shape shows that neighbouring lines merge (no resolution bandwidth was given).
    #[error(
        "the strongest line does not fall by 3 dB within half a line spacing ({modulation} / 2): the spacing is \
         below the resolution and the lines are not resolved; use a finer resolution bandwidth or a higher \
         modulation frequency"
    )]
    LinesNotResolved { modulation: Hz },

    /// The resolution bandwidth given is not a positive, finite number.
    #[error("the resolution bandwidth {0} is not a positive finite number; give it in hertz or leave it out to estimate it")]
    BadResolutionBandwidth(Hz),

    /// The trace has too few points per resolution bandwidth or per line spacing.
    #[error("the trace is too coarse: {0}; record more points over the span")]
    TooCoarse(String),

    /// No line of the comb rises above the noise floor.
    #[error("no comb line rises above the noise floor ({floor_dbm:.1} dBm); check the optical input, the RF drive and the span")]
    NoComb { floor_dbm: f64 },

    /// Not enough usable lines for any estimate of the modulation index.
    #[error("too few resolved lines ({found}) to fit the modulation index; at least {needed} are needed: widen the span or raise the optical power")]
    TooFewLines { found: usize, needed: usize },

    /// The reference (RF off) trace is unusable.
    #[error("reference trace: {0}")]
    BadReference(String),

    /// A drive-level sweep cannot give V_pi.
    #[error("V_pi fit: {0}")]
    BadSweep(String),

    /// The whole-trace fit could not be made.
    #[error("whole-trace fit: {0}")]
    FitFailed(String),

    /// The trace shows lines at another spacing than the modulation frequency given.
    #[error(
        "the trace shows lines {shown_hz:.0} Hz apart ({lines} lines), not the {given} given as the modulation frequency; \
         check the generator frequency and the drive chain, or give --modulation-frequency {shown_hz:.0}"
    )]
    SpacingMismatch {
        given: Hz,
        shown: Hz,
        shown_hz: f64,
        lines: usize,
    },

    /// No modulation frequency was given and the trace shows no regular comb to read it from.
    #[error("the trace shows no regular comb of lines to read the modulation frequency from; give it with --modulation-frequency <HZ>")]
    NoSpacing,

    /// A V_pi-versus-frequency set cannot give a response curve.
    #[error("response curve: {0}")]
    BadResponse(String),
}

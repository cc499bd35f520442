//! Pure measurement analysis: analyzer trace -> comb lines -> modulation index -> V_pi.
//!
//! No I/O, no clocks, no global state: every function takes typed values and returns a result with
//! its uncertainty, so the engine, the offline `analyze` command and the benchmarks share one code
//! path.
//!
//! - [`chain`]: generator level <-> level at the modulator <-> peak voltage.
//! - [`bessel`]: J_n tabulated once for fast fitting, with its reference checks.
//! - [`error`]: the one error type, with messages for the operator.

pub mod bessel;
pub mod chain;
pub mod error;

pub use chain::{
    level_for_peak_voltage, pad_dissipated_fraction, peak_voltage, ChainPoint, DriveChain,
};
pub use error::AnalysisError;

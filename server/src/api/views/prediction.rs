//! The spectrum prediction: the periodic drive asked about (checked as the route checks it) and the comb it makes.
//!
//! Shared by the route handlers (`api::routes::prediction`) and the CLI, which decodes the daemon's
//! answers into these types, so a changed response shape breaks the build, not the user.

use crate::analysis::prediction::{
    predict_spectrum, InvalidDrive, Tone, MAX_HARMONIC, MAX_MODULATION_INDEX, MAX_ORDERS,
    MAX_PHASE_DEG, MAX_TONES,
};
use crate::api::problem::{FieldProblem, Problem};
use serde::{Deserialize, Serialize};
use utoipa::ToSchema;

/// One component of the phase drive: modulation_index x sin(harmonic x 2 pi F t + phase_deg).
#[derive(Debug, Clone, Copy, Serialize, Deserialize, ToSchema)]
#[serde(deny_unknown_fields)]
pub struct ToneBody {
    /// Harmonic number of the modulation frequency (1 = the fundamental).
    #[schema(minimum = 1, maximum = 32)]
    pub harmonic: u32,
    /// Peak phase deviation, radians.
    #[schema(minimum = 0, maximum = 50)]
    pub modulation_index: f64,
    /// Phase of this tone, degrees (default 0).
    #[serde(default)]
    #[schema(minimum = -360, maximum = 360, default = 0)]
    pub phase_deg: f64,
}

/// A periodic phase drive and how many orders to list.
#[derive(Debug, Clone, Serialize, Deserialize, ToSchema)]
#[serde(deny_unknown_fields)]
pub struct DriveSpectrumRequest {
    /// F, the fundamental drive frequency: the line spacing.
    #[schema(exclusive_minimum = 0, maximum = 1e12)]
    pub modulation_frequency_hz: f64,
    /// 1 to 8 tones; tones on the same harmonic add as phasors.
    #[schema(min_items = 1, max_items = 8)]
    pub tones: Vec<ToneBody>,
    /// N: orders -N..N are listed.
    #[schema(minimum = 0, maximum = 1000)]
    pub orders: u32,
}

/// One predicted line.
#[derive(Debug, Clone, Copy, Serialize, Deserialize, ToSchema)]
pub struct PredictedLineView {
    /// n: the line at f_c + n F.
    pub order: i32,
    /// n F, Hz.
    pub frequency_offset_hz: f64,
    /// Power relative to the unmodulated carrier.
    pub relative_power: f64,
    /// 10 log10 of `relative_power`; null for a line no combination of the tones reaches
    /// (exactly zero).
    pub relative_power_db: Option<f64>,
}

/// The predicted comb.
#[derive(Debug, Clone, Serialize, Deserialize, ToSchema)]
pub struct SpectrumPrediction {
    pub modulation_frequency_hz: f64,
    /// Orders -N..N, ascending.
    pub lines: Vec<PredictedLineView>,
    /// Bound on each line's error in relative power from cutting the Bessel sums (rounding adds
    /// a few 1e-16).
    pub truncation_error_bound: f64,
    /// Relative powers below this (truncation bound plus a rounding allowance of 1e-15) are not
    /// resolved: such a line is weaker than this, its value says no more.
    pub resolution_floor: f64,
    /// Highest Bessel order kept for each tone, in the request's order.
    pub bessel_orders_kept: Vec<u32>,
}

impl DriveSpectrumRequest {
    fn tones(&self) -> Vec<Tone> {
        self.tones
            .iter()
            .map(|t| Tone {
                harmonic: t.harmonic,
                modulation_index: t.modulation_index,
                phase_deg: t.phase_deg,
            })
            .collect()
    }

    /// The prediction, or every invalid field.
    pub fn predict(&self) -> Result<SpectrumPrediction, Vec<InvalidDrive>> {
        let f = self.modulation_frequency_hz;
        let prediction = predict_spectrum(f, &self.tones(), self.orders)?;
        Ok(SpectrumPrediction {
            modulation_frequency_hz: f,
            lines: prediction
                .lines
                .iter()
                .map(|l| PredictedLineView {
                    order: l.order,
                    frequency_offset_hz: f64::from(l.order) * f,
                    relative_power: l.relative_power,
                    relative_power_db: l.relative_power_db(),
                })
                .collect(),
            truncation_error_bound: prediction.truncation_error_bound,
            resolution_floor: prediction.resolution_floor,
            bessel_orders_kept: prediction.bessel_orders_kept,
        })
    }
}

/// The 422 for invalid drive fields.
pub fn invalid_drive(problems: Vec<InvalidDrive>) -> Problem {
    let summary = problems
        .iter()
        .map(|p| format!("{}: {}", p.field, p.message))
        .collect::<Vec<_>>()
        .join("; ");
    Problem::invalid(
        format!("the drive cannot be predicted: {summary}"),
        problems
            .into_iter()
            .map(|p| FieldProblem::new(p.field, p.message))
            .collect(),
    )
}

// The schema's limits are the analysis' limits; a change to one must change the other.
const _: () = assert!(MAX_TONES == 8 && MAX_HARMONIC == 32 && MAX_ORDERS == 1000);

const _: () = assert!(MAX_MODULATION_INDEX == 50.0 && MAX_PHASE_DEG == 360.0);

//! Drive-chain calibrations as the API shows them, and the point and source records an upload is made of.
//!
//! Shared by the route handlers (`api::routes::chains`) and the CLI, which decodes the daemon's
//! answers into these types, so a changed response shape breaks the build, not the user.

use crate::store::{ChainCalibration, ChainCalibrationHeader, ChainCalibrationSource};
use serde::{Deserialize, Serialize};
use utoipa::ToSchema;

/// One row of a chain calibration.
#[derive(Debug, Clone, Copy, Serialize, Deserialize, ToSchema)]
#[serde(deny_unknown_fields)]
pub struct ChainPointBody {
    #[schema(exclusive_minimum = 0)]
    pub frequency_hz: f64,
    /// Net gain generator -> modulator, dB (negative for a loss).
    #[schema(minimum = -100, maximum = 100)]
    pub gain_db: f64,
    /// Standard uncertainty of the gain, dB (0 to 10), as the chain's calibration states it;
    /// V_pi's uncertainty budget uses it. Absent where the calibration states none.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    #[schema(minimum = 0, maximum = 10)]
    pub gain_uncertainty_db: Option<f64>,
}

/// How a source file enters the chain.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize, ToSchema)]
#[serde(rename_all = "snake_case")]
pub enum SourceRole {
    /// A two-port of the chain (cable, attenuator, amplifier), in cascade order.
    TwoPort,
    /// The modulator's one-port reflection that terminates the chain.
    Load,
}

impl SourceRole {
    pub fn as_str(self) -> &'static str {
        match self {
            SourceRole::TwoPort => "two_port",
            SourceRole::Load => "load",
        }
    }
}

/// A file a calibration was computed from.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize, ToSchema)]
#[serde(deny_unknown_fields)]
pub struct ChainSourceBody {
    pub role: SourceRole,
    /// The file's name (without its directory), 1 to 255 characters.
    #[schema(min_length = 1, max_length = 255, pattern = "[^ \\t\\r\\n]")]
    pub file_name: String,
    /// SHA-256 of the file's bytes, 64 lowercase hexadecimal digits.
    #[schema(min_length = 64, max_length = 64, pattern = "^[0-9a-f]{64}$")]
    pub sha256: String,
}

impl ChainSourceBody {
    pub(crate) fn from_stored(s: ChainCalibrationSource) -> Option<ChainSourceBody> {
        let role = match s.role.as_str() {
            "two_port" => SourceRole::TwoPort,
            "load" => SourceRole::Load,
            _ => return None,
        };
        Some(ChainSourceBody {
            role,
            file_name: s.file_name,
            sha256: s.sha256,
        })
    }
}

/// A stored calibration version.
#[derive(Debug, Serialize, Deserialize, ToSchema)]
pub struct ChainView {
    pub name: String,
    pub version: i64,
    pub created_at_unix_ms: i64,
    pub created_by: String,
    pub points: Vec<ChainPointBody>,
    /// The files the table was computed from, in cascade order (empty for a typed table).
    #[serde(default)]
    pub sources: Vec<ChainSourceBody>,
}

impl From<ChainCalibration> for ChainView {
    fn from(c: ChainCalibration) -> ChainView {
        ChainView {
            name: c.name,
            version: c.version,
            created_at_unix_ms: c.created_at_unix_ms,
            created_by: c.created_by,
            points: c
                .points
                .iter()
                .map(|p| ChainPointBody {
                    frequency_hz: p.frequency_hz,
                    gain_db: p.gain_db,
                    gain_uncertainty_db: p.gain_uncertainty_db,
                })
                .collect(),
            sources: c
                .sources
                .into_iter()
                .filter_map(ChainSourceBody::from_stored)
                .collect(),
        }
    }
}

/// A calibration version as listed (without points).
#[derive(Debug, Serialize, Deserialize, ToSchema)]
pub struct ChainHeaderView {
    pub name: String,
    pub version: i64,
    pub created_at_unix_ms: i64,
    pub created_by: String,
    /// The files the table was computed from, in cascade order (empty for a typed table).
    #[serde(default)]
    pub sources: Vec<ChainSourceBody>,
}

impl ChainHeaderView {
    pub(crate) fn new(
        h: ChainCalibrationHeader,
        sources: Vec<ChainCalibrationSource>,
    ) -> ChainHeaderView {
        ChainHeaderView {
            name: h.name,
            version: h.version,
            created_at_unix_ms: h.created_at_unix_ms,
            created_by: h.created_by,
            sources: sources
                .into_iter()
                .filter_map(ChainSourceBody::from_stored)
                .collect(),
        }
    }
}

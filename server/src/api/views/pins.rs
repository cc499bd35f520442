//! A device's pinned reference calibration.
//!
//! Shared by the route handlers (`api::routes::pins`) and the CLI, which decodes the daemon's
//! answers into these types, so a changed response shape breaks the build, not the user.

use crate::store::{PinChange, PinRecord};
use serde::{Deserialize, Serialize};
use utoipa::ToSchema;

/// A device's pinned run.
#[derive(Debug, Clone, Serialize, Deserialize, ToSchema)]
pub struct PinnedRun {
    pub run_id: i64,
    /// The token name that pinned it.
    pub pinned_by: String,
    pub pinned_at_unix_ms: i64,
    pub note: String,
}

impl From<PinRecord> for PinnedRun {
    fn from(pin: PinRecord) -> PinnedRun {
        PinnedRun {
            run_id: pin.run_id,
            pinned_by: pin.pinned_by,
            pinned_at_unix_ms: pin.pinned_at_unix_ms,
            note: pin.note,
        }
    }
}

/// A device's reference calibration: the pinned run, or none (then V_pi lookups use the newest
/// completed run covering each frequency).
#[derive(Debug, Clone, Serialize, Deserialize, ToSchema)]
pub struct DevicePin {
    pub serial: String,
    pub pinned: Option<PinnedRun>,
    /// In answers to a pin or unpin: the run pinned before the change, if any.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub previous_run_id: Option<i64>,
}

impl From<PinChange> for DevicePin {
    fn from(change: PinChange) -> DevicePin {
        DevicePin {
            serial: change.serial,
            pinned: change.pinned.map(PinnedRun::from),
            previous_run_id: change.previous_run_id,
        }
    }
}

//! How store errors become problem details: what the client did wrong maps to 4xx
//! with the field or identifier named, everything else to 500 with the store's own message.

use super::problem::{FieldProblem, Problem};
use crate::store::StoreError;

impl From<StoreError> for Problem {
    fn from(e: StoreError) -> Problem {
        match &e {
            StoreError::NotFound { .. } | StoreError::NoCompletedRun { .. } => {
                Problem::not_found(e.to_string())
            }
            StoreError::InvalidTransition { .. }
            | StoreError::NotPinnable { .. }
            | StoreError::NothingPinned { .. } => Problem::conflict(e.to_string()),
            StoreError::OutsideMeasuredRange { .. } | StoreError::NotCovered { .. } => {
                Problem::invalid_field("frequency_hz", e.to_string())
            }
            StoreError::NotACalibration { .. } | StoreError::RunOfAnotherDevice { .. } => {
                Problem::invalid_field("run_id", e.to_string())
            }
            StoreError::InvalidInput { what, .. } => {
                Problem::invalid(e.to_string(), vec![FieldProblem::new(*what, e.to_string())])
            }
            _ => {
                tracing::error!(error = %e, "store error in an API call");
                Problem::internal(e.to_string())
            }
        }
    }
}

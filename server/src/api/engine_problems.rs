//! How engine errors become problem details: an invalid plan is a 422 listing every field, an
//! unknown run 404, a run in the wrong state 409, the rest 500 with the engine's message.

use super::problem::{FieldProblem, Problem};
use crate::engine::rf_safety::AcknowledgeError;
use crate::engine::{EngineError, SubmitError};

impl From<SubmitError> for Problem {
    fn from(e: SubmitError) -> Problem {
        match e {
            SubmitError::Invalid(plan_errors) => {
                let errors: Vec<FieldProblem> = plan_errors
                    .errors
                    .into_iter()
                    .map(|f| FieldProblem::new(f.field, f.message))
                    .collect();
                let detail = match errors.len() {
                    1 => "1 field of the plan is invalid; nothing was sent to the instruments"
                        .to_string(),
                    n => format!(
                        "{n} fields of the plan are invalid; nothing was sent to the instruments"
                    ),
                };
                Problem::invalid(detail, errors)
            }
            SubmitError::Store(e) => e.into(),
        }
    }
}

impl From<EngineError> for Problem {
    fn from(e: EngineError) -> Problem {
        let message = e.to_string();
        match e {
            EngineError::RunNotFound(_) | EngineError::BenchNotFound(_) => {
                Problem::not_found(message)
            }
            EngineError::NotCancellable { .. }
            | EngineError::NotResumable { .. }
            | EngineError::OtherDaemon { .. }
            | EngineError::ResumeRefused { .. } => Problem::conflict(message),
            EngineError::Acknowledge(AcknowledgeError::Store(e)) => e.into(),
            EngineError::Acknowledge(_) => Problem::conflict(message),
            EngineError::Store(e) => e.into(),
            _ => {
                tracing::error!(error = %message, "engine error in an API call");
                Problem::internal(message)
            }
        }
    }
}

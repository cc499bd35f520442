//! The API's response (and shared request) types, one file per resource: what the route handlers
//! answer and what the CLI decodes, in one place both use, so neither imports the other and the
//! CLI never needs a route handler. The OpenAPI document takes its schemas from these types.

pub mod budget;
pub mod chain_runs;
pub mod chains;
pub mod devices;
pub mod drive;
pub mod pins;
pub mod prediction;
pub mod run_control;
pub mod runs;

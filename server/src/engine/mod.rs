//! The sweep engine: plans in, one queue per bench, runs out, RF off on every stop path.

pub mod acquire;
pub mod events;
pub mod plan;
pub mod safety;

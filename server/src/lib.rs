//! Halfwave: a daemon that calibrates electro-optic phase modulators unattended.
//!
//! The crate is split so that data flows one way, from instrument bytes to HTTP views:
//! - [`analysis`]: pure functions, trace -> comb lines -> modulation index -> V_pi; no I/O.
//! - [`store`]: the database (sqlx + SQLite): devices, calibrations, runs, points, traces, results.
//! - [`cli`]: the `halfwave` command line (each subcommand one file).
//! - [`config`]: the daemon's TOML configuration with environment overrides.
//! - [`data_claim`]: one daemon per data store (an OS file lock taken before anything starts).
//! - [`bench_lease`]: on a shared PostgreSQL database, one daemon per bench (leases in the
//!   database, taken before anything starts).
//! - [`engine`]: plans, the per-bench queue, the sweep executor and the RF-off interlocks.
//! - [`notify`]: signed webhooks when a run ends or a bench is held, with a persistent outbox.
//! - [`shutdown`]: waiting for SIGINT/SIGTERM.
//! - [`telemetry`]: tracing set-up, done once at start.
//! - [`version`]: the software version (crate version and git commit) runs record.

#![forbid(unsafe_code)]

pub mod analysis;
pub mod api;
pub mod bench_lease;
pub mod calendar;
pub mod cli;
pub mod config;
pub mod csv_table;
pub mod data_claim;
pub mod engine;
pub mod notify;
pub mod shutdown;
pub mod store;
pub mod telemetry;
pub mod version;

pub use halfwave_units as units;

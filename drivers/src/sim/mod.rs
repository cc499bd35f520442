//! The simulated bench: a laser, a phase modulator, a drive chain, an RF source, an optical
//! spectrum analyzer and an RF power sensor at the chain's end ([`sensor`]), described by a TOML [`Scenario`] and driven by a seed.
//!
//! It exists so that everything above the drivers (analysis, engine, API, end-to-end tests) can
//! run without a lab, and so that the SCPI client drivers are tested against a server that follows
//! the standard. One [`SimBench`] holds the state behind a mutex; it hands out
//! - in-process instruments ([`SimRfSource`], [`SimAnalyzer`], [`SimPowerSensor`]) implementing
//!   the instrument traits,
//! - the same instruments as SCPI over TCP through [`SimServer`], with fault injection
//!   ([`FaultHandle`]);
//! - the truth for tests: V_pi at any frequency, the overdrive flag, the laser's real position,
//!   and a command log per instrument.
//!
//! The same seed and the same sequence of commands give the same traces. Durations (sweep time,
//! settling time) are real `tokio` sleeps scaled by a time factor; 0 makes them instant for tests.
//!
//! Modules: [`scenario`] (what the bench is made of, the truth such as `v_pi_at`), [`physics`]
//! (Bessel comb and analyzer rendering), [`state`] (settings and operations shared by every way
//! in), [`bench`] (the shared handle), [`in_process`] (the trait implementations),
//! [`scpi_instruments`] (the SCPI command sets), [`server`] (TCP), [`faults`] (fault injection),
//! [`noise`] (the fast generator for display noise), [`scpi_parser`] (the instrument side of
//! SCPI: how an instrument parses program messages).

pub mod bench;
pub mod faults;
pub mod in_process;
pub mod noise;
pub mod physics;
pub mod scenario;
pub mod scpi_instruments;
pub mod scpi_parser;
pub mod sensor;
pub mod server;
pub mod state;

pub use bench::{Role, SimBench};
pub use faults::FaultHandle;
pub use in_process::{SimAnalyzer, SimRfSource};
pub use scenario::{Scenario, ScenarioError};
pub use sensor::SimPowerSensor;
pub use server::{SimServer, SimServerConfig};
pub use state::OverdriveEvent;

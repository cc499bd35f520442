//! Instrument drivers for Halfwave.
//!
//! Everything that talks to a bench instrument lives here, and nothing here knows about HTTP,
//! databases or the sweep engine:
//! - SCPI over raw TCP (LXI port 5025) with VISA-style resource strings;
//! - IEEE 488.2 common commands and SCPI response parsing (numbers, special values, arrays, blocks);
//! - the instrument traits the engine drives (an RF source, an optical spectrum analyzer and an RF
//!   power sensor for calibrating the drive chain);
//! - generic SCPI drivers with per-model command profiles (TOML);
//! - the simulated bench: the physics of laser, modulator, drive chain and analyzer, in-process and
//!   served over TCP as SCPI instruments.

#![forbid(unsafe_code)]

pub use halfwave_units as units;

pub mod generic;
pub mod ieee488;
pub mod instrument;
pub mod profile;
pub mod resource;
pub mod scpi;
pub mod sim;
pub mod transport;

pub use generic::{ScpiPowerSensor, ScpiRfSource, ScpiSpectrumAnalyzer};
pub use instrument::{
    AnalyzerCapabilities, AnalyzerSettings, ConnectionNote, Identity, InstrumentError, PowerSensor,
    RfSource, SensorLimits, SourceLimits, SpectrumAnalyzer,
};
pub use profile::{AnalyzerProfile, SensorProfile, SourceProfile};
pub use resource::Resource;
pub use transport::{ScpiTransport, TransportConfig};

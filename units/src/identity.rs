//! An instrument's identity: the shared vocabulary for "what measured this".
//!
//! Drivers learn it (IEEE 488.2 `*IDN?`), the store records it with every run, the API and the
//! exports show it. It lives here, beside the unit types, so that the store and the views need
//! not depend on the drivers crate for it.

use serde::{Deserialize, Serialize};

/// An instrument's identity as reported by IEEE 488.2 `*IDN?`
/// (manufacturer, model, serial number, firmware level).
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
pub struct Identity {
    pub manufacturer: String,
    pub model: String,
    pub serial: String,
    pub firmware: String,
}

//! A device's reference calibration: read, pin and unpin it.
//!
//! Pinning a completed run makes it the device's reference calibration: V_pi lookups and the
//! device's plots use it whatever runs come later, until it is unpinned (the rules are in
//! `store/history.rs`). Pin and unpin need an operator token, like the other everyday lab actions
//! (submit, cancel, acknowledge): a pin changes no measured data and is undone by an unpin. The
//! store writes one audit entry per pin or unpin (`device.pin` / `device.unpin`, with the token's
//! name, the run ids and the note) in the same transaction as the change.

use crate::api::auth::{Operator, Viewer};
use crate::api::json_body::parse_json;
use crate::api::params::ApiPath;
use crate::api::problem::Problem;
use crate::api::views::pins::{DevicePin, PinnedRun};
use crate::api::AppState;
use axum::body::Bytes;
use axum::extract::State;
use axum::Json;
use serde::{Deserialize, Serialize};
use utoipa::ToSchema;

/// What to pin.
#[derive(Debug, Serialize, Deserialize, ToSchema)]
#[serde(deny_unknown_fields)]
pub struct PinRequest {
    /// A completed run of this device with V_pi results.
    pub run_id: i64,
    /// Why this run is the reference (kept with the pin and in the audit log).
    #[serde(default)]
    pub note: String,
}

/// What may be said when unpinning.
#[derive(Debug, Default, Serialize, Deserialize, ToSchema)]
#[serde(deny_unknown_fields)]
pub struct UnpinRequest {
    /// Why (kept in the audit log).
    #[serde(default)]
    pub note: String,
}

/// The device's pinned reference calibration, if any.
#[utoipa::path(get, path = "/api/v1/devices/{serial}/pin", tag = "devices", security(("bearer" = [])),
    params(("serial" = String, Path, description = "Serial number")),
    responses((status = 200, body = DevicePin), (status = 401, body = Problem), (status = 404, body = Problem)))]
pub async fn get_pin(
    _caller: Viewer,
    State(state): State<AppState>,
    ApiPath(serial): ApiPath<String>,
) -> Result<Json<DevicePin>, Problem> {
    let pinned = state.store().device_pin(&serial).await?;
    Ok(Json(DevicePin {
        serial,
        pinned: pinned.map(PinnedRun::from),
        previous_run_id: None,
    }))
}

/// Pins a completed run as the device's reference calibration (replacing an earlier pin): V_pi
/// lookups and the device's plots use it until it is unpinned. Audited.
#[utoipa::path(post, path = "/api/v1/devices/{serial}/pin", tag = "devices", security(("bearer" = [])),
    params(("serial" = String, Path, description = "Serial number")),
    request_body(content = PinRequest, description = "{\"run_id\": 12, \"note\": \"why\"}"),
    responses((status = 200, body = DevicePin), (status = 401, body = Problem),
              (status = 403, body = Problem),
              (status = 404, description = "No such device or run", body = Problem),
              (status = 409, description = "The run is not completed, or has no V_pi results", body = Problem),
              (status = 422, description = "The run belongs to another device, or the body is invalid", body = Problem)))]
pub async fn pin_run(
    Operator(caller): Operator,
    State(state): State<AppState>,
    ApiPath(serial): ApiPath<String>,
    body: Bytes,
) -> Result<Json<DevicePin>, Problem> {
    let request: PinRequest = parse_json(&body)?;
    let change = state
        .store()
        .pin_run(&serial, request.run_id, &caller.name, &request.note)
        .await?;
    Ok(Json(change.into()))
}

/// Removes the device's pin: V_pi lookups go back to the newest completed run covering each
/// frequency. Audited. 409 when nothing is pinned.
#[utoipa::path(post, path = "/api/v1/devices/{serial}/unpin", tag = "devices", security(("bearer" = [])),
    params(("serial" = String, Path, description = "Serial number")),
    request_body(content = UnpinRequest, description = "Optional: {\"note\": \"why\"}"),
    responses((status = 200, body = DevicePin), (status = 401, body = Problem),
              (status = 403, body = Problem), (status = 404, body = Problem),
              (status = 409, description = "Nothing is pinned", body = Problem),
              (status = 422, body = Problem)))]
pub async fn unpin_device(
    Operator(caller): Operator,
    State(state): State<AppState>,
    ApiPath(serial): ApiPath<String>,
    body: Bytes,
) -> Result<Json<DevicePin>, Problem> {
    let request: UnpinRequest = if body.iter().all(u8::is_ascii_whitespace) {
        UnpinRequest::default()
    } else {
        parse_json(&body)?
    };
    let change = state
        .store()
        .unpin_device(&serial, &caller.name, &request.note)
        .await?;
    Ok(Json(change.into()))
}

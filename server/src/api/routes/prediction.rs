//! Spectrum prediction over HTTP: the comb a periodic phase drive makes, from
//! [`crate::analysis::prediction`]. A computation on the request alone (nothing stored is read or
//! changed), so any token may ask. `halfwave predict` reads the same JSON from a file and decodes
//! into the same types.

use crate::api::auth::Viewer;
use crate::api::json_body::JsonBody;
use crate::api::problem::Problem;
use crate::api::views::prediction::{invalid_drive, DriveSpectrumRequest, SpectrumPrediction};
use axum::Json;

/// The optical spectrum a periodic phase drive makes: relative line powers of orders -N..N for
/// the field exp(i(2 pi f_c t + phi(t))), phi(t) = sum of modulation_index x
/// sin(harmonic x 2 pi F t + phase_deg), order n at f_c + n F; exact sums of products of Bessel
/// functions (Jacobi-Anger per tone).
#[utoipa::path(post, path = "/api/v1/spectrum-prediction", tag = "planning", security(("bearer" = [])),
    request_body(content = DriveSpectrumRequest),
    responses((status = 200, body = SpectrumPrediction), (status = 401, body = Problem),
              (status = 413, body = Problem),
              (status = 422, description = "Invalid fields, each named in `errors`", body = Problem)))]
pub async fn predict(
    _caller: Viewer,
    JsonBody(request): JsonBody<DriveSpectrumRequest>,
) -> Result<Json<SpectrumPrediction>, Problem> {
    // The worst accepted drive (8 tones, harmonic 32, index 50) takes ~1e8 multiply-adds: off
    // the async workers.
    tokio::task::spawn_blocking(move || request.predict())
        .await
        .map_err(|e| Problem::internal(format!("the prediction stopped: {e}")))?
        .map(Json)
        .map_err(invalid_drive)
}

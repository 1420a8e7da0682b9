//! `GET /healthz`, `GET /readyz`, `GET /metrics`.

use std::collections::BTreeMap;

use axum::extract::State;
use axum::http::header;
use axum::response::IntoResponse;
use axum::Json;
use serde::Serialize;
use utoipa::ToSchema;

use crate::server::error::ApiError;
use crate::service::Service;

/// The process answers.
#[derive(Serialize, ToSchema)]
pub struct Alive {
    /// Always `ok`.
    pub status: &'static str,
}

/// Every route answers: bundles and the caption bank's indexes are loaded.
#[derive(Serialize, ToSchema)]
pub struct Ready {
    /// Always `ready`.
    pub status: &'static str,
    /// The loaded models' ids.
    pub models: Vec<String>,
    /// Saved reward maps whose files could not be read, each with the reason
    /// (the server serves, those maps do not).
    pub maps_unusable: BTreeMap<String, String>,
}

#[utoipa::path(get, path = "/healthz", operation_id = "alive", tag = "watch", security(()),
    responses((status = 200, body = Alive)))]
pub async fn healthz() -> Json<Alive> {
    Json(Alive { status: "ok" })
}

#[utoipa::path(get, path = "/readyz", operation_id = "ready", tag = "watch", security(()),
    responses((status = 200, body = Ready), super::Failure))]
pub async fn readyz(State(state): State<Service>) -> Result<Json<Ready>, ApiError> {
    let engine = state.engine()?;
    // Ready means every route answers: the caption bank's indexes are loaded too.
    state.bank()?;
    let models = engine.models().iter().map(|m| m.id.clone()).collect();
    // Maps whose files could not be read: the server serves, those maps do not.
    let unusable = state.maps().unusable();
    Ok(Json(Ready {
        status: "ready",
        models,
        maps_unusable: unusable,
    }))
}

#[utoipa::path(get, path = "/metrics", operation_id = "metrics", tag = "watch",
    responses((status = 200, description = "Prometheus text format 0.0.4", content_type = "text/plain", body = String)))]
pub async fn metrics(State(state): State<Service>) -> impl IntoResponse {
    (
        [(
            header::CONTENT_TYPE,
            "text/plain; version=0.0.4; charset=utf-8",
        )],
        state.metrics().render(),
    )
}

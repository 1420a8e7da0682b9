//! `GET /healthz`, `GET /readyz`, `GET /metrics`.

use axum::extract::State;
use axum::http::header;
use axum::response::IntoResponse;
use axum::Json;
use serde_json::{json, Value};

use crate::server::error::ApiError;
use crate::service::Service;

pub async fn healthz() -> Json<Value> {
    Json(json!({"status": "ok"}))
}

pub async fn readyz(State(state): State<Service>) -> Result<Json<Value>, ApiError> {
    let engine = state.engine()?;
    // Ready means every route answers: the caption bank's indexes are loaded too.
    state.bank()?;
    let models: Vec<&str> = engine.models().iter().map(|m| m.id.as_str()).collect();
    // Maps whose files could not be read: the server serves, those maps do not.
    let unusable = state.maps().unusable();
    Ok(Json(
        json!({"status": "ready", "models": models, "maps_unusable": unusable}),
    ))
}

pub async fn metrics(State(state): State<Service>) -> impl IntoResponse {
    (
        [(
            header::CONTENT_TYPE,
            "text/plain; version=0.0.4; charset=utf-8",
        )],
        state.metrics().render(),
    )
}

//! `GET /v1/models`: the loaded bundles and their metadata.

use axum::extract::State;
use axum::Json;
use serde_json::{json, Value};

use super::ModelRef;
use crate::server::error::ApiError;
use crate::service::Service;

pub async fn list(State(state): State<Service>) -> Result<Json<Value>, ApiError> {
    let engine = state.engine()?;
    let models: Vec<Value> = engine
        .models()
        .iter()
        .map(|m| {
            let manifest = &m.bundle.manifest;
            let identity = ModelRef::of(m);
            json!({
                "id": identity.id,
                "name": identity.name,
                "version": identity.version,
                "digest": identity.digest,
                "dimension": manifest.model.dimension,
                "image": {
                    "size": manifest.image.size,
                    "resize": manifest.image.resize,
                    "filter": manifest.image.filter,
                    "mean": manifest.image.mean,
                    "std": manifest.image.std,
                },
                "text": {
                    "max_tokens": manifest.text.max_tokens,
                    "padding": manifest.text.padding,
                    "prefix": manifest.text.prefix,
                },
                "card": m.bundle.card,
            })
        })
        .collect();
    Ok(Json(
        json!({"default": engine.models()[0].id, "models": models}),
    ))
}

//! `POST /v1/images`: registers images (raw body or JSON), idempotently.

use axum::body::Bytes;
use axum::extract::rejection::BytesRejection;
use axum::extract::State;
use axum::http::{header, HeaderMap, StatusCode};
use axum::Json;
use serde::{Deserialize, Serialize};
use std::sync::Arc;

use crate::encoders::{ImageSource, Registered};
use crate::server::error::ApiError;
use crate::server::image_ref::ImageRef;
use crate::server::json::{body_too_large, json_rejection};
use crate::server::state::AppState;

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct RegisterRequest {
    images: Vec<ImageRef>,
    model: Option<String>,
}

#[derive(Serialize)]
pub struct RegisterResponse {
    images: Vec<RegisteredOut>,
}

#[derive(Serialize)]
struct RegisteredOut {
    id: String,
    width: u32,
    height: u32,
    new: bool,
}

impl From<Registered> for RegisteredOut {
    fn from(r: Registered) -> Self {
        RegisteredOut {
            id: r.id,
            width: r.width,
            height: r.height,
            new: r.new,
        }
    }
}

pub async fn register(
    State(state): State<AppState>,
    headers: HeaderMap,
    body: Result<Bytes, BytesRejection>,
) -> Result<Json<RegisterResponse>, ApiError> {
    let body = body.map_err(|rejection| {
        if rejection.status() == StatusCode::PAYLOAD_TOO_LARGE {
            body_too_large()
        } else {
            ApiError::new(StatusCode::BAD_REQUEST, "bad_json", rejection.body_text())
        }
    })?;
    let engine = state.engine()?;
    let content_type = headers
        .get(header::CONTENT_TYPE)
        .and_then(|v| v.to_str().ok())
        .unwrap_or("");
    let mime = content_type
        .split(';')
        .next()
        .unwrap_or("")
        .trim()
        .to_ascii_lowercase();
    let (sources, model_name) = match mime.as_str() {
        "application/json" => {
            let request: RegisterRequest = parse_json(&headers, body).await?;
            if request.images.is_empty() {
                return Err(ApiError::invalid("images", "give at least one image"));
            }
            let limit = state.limits().max_images;
            if request.images.len() > limit {
                return Err(ApiError::over_limit("images", "number of images", limit, "--max-images"));
            }
            let sources = request
                .images
                .iter()
                .enumerate()
                .map(|(i, r)| r.source(&format!("images[{i}]")).map(|s| (format!("images[{i}]"), s)))
                .collect::<Result<Vec<_>, _>>()?;
            (sources, request.model)
        }
        "image/png" | "image/jpeg" | "image/webp" | "application/octet-stream" => {
            if body.is_empty() {
                return Err(ApiError::invalid("body", "the body is empty; send the image file's bytes"));
            }
            (vec![("body".to_string(), ImageSource::Bytes(Arc::new(body.to_vec())))], None)
        }
        _ => {
            return Err(ApiError::new(
                StatusCode::UNSUPPORTED_MEDIA_TYPE,
                "unsupported_media_type",
                format!(
                    "Content-Type {content_type:?} is not taken here: send application/json, or an image as \
                     image/png, image/jpeg, image/webp or application/octet-stream"
                ),
            ))
        }
    };
    let model = engine.model(model_name.as_deref())?;
    let registered =
        futures::future::try_join_all(sources.into_iter().map(|(field, source)| async move {
            engine
                .register(source, Some(model))
                .await
                .map_err(|e| ApiError::from(e).at(field))
        }))
        .await?;
    Ok(Json(RegisterResponse {
        images: registered.into_iter().map(RegisteredOut::from).collect(),
    }))
}

/// Parses an already-read body through the same rejections as `ApiJson`.
async fn parse_json<T: serde::de::DeserializeOwned>(
    headers: &HeaderMap,
    body: Bytes,
) -> Result<T, ApiError> {
    let mut request = axum::http::Request::new(axum::body::Body::from(body));
    *request.headers_mut() = headers.clone();
    match <axum::Json<T> as axum::extract::FromRequest<()>>::from_request(request, &()).await {
        Ok(axum::Json(value)) => Ok(value),
        Err(rejection) => Err(json_rejection(rejection)),
    }
}

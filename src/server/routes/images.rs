//! `POST /v1/images`: registers images (raw body or JSON), idempotently.

use std::sync::Arc;

use axum::body::Bytes;
use axum::extract::rejection::BytesRejection;
use axum::extract::State;
use axum::http::{header, HeaderMap};
use axum::Extension;
use axum::Json;
use serde::{Deserialize, Serialize};
use utoipa::ToSchema;

use crate::encoders::{ImageSource, Registered};
use crate::intake::image_source::{sources, ImageRef};
use crate::intake::limits::Limit;
use crate::intake::validation::{Invalid, Problem};
use crate::server::access::{self, Caller};
use crate::server::error::{ApiError, ErrorCode};
use crate::server::json::{body_rejection, is_json, parse_json};
use crate::service::Service;

/// Images to register, by content (`base64`) or by file (`path` under `--image-root`).
#[derive(Deserialize, ToSchema)]
#[serde(deny_unknown_fields)]
pub struct RegisterRequest {
    images: Vec<ImageRef>,
    model: Option<String>,
}

#[derive(Serialize, ToSchema)]
pub struct RegisterResponse {
    images: Vec<RegisteredOut>,
}

#[derive(Serialize, ToSchema)]
struct RegisteredOut {
    /// The image's content id (sha256 of its bytes), for `{"id": ...}` later.
    id: String,
    width: u32,
    height: u32,
    /// False when the image was registered before.
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

/// One image file as the whole body (for the API document: the handler reads raw bytes).
#[derive(ToSchema)]
#[schema(value_type = String, format = Binary)]
pub struct ImageFile(#[allow(dead_code)] Vec<u8>);

/// Media types taken as one raw image file.
const RAW_IMAGE_TYPES: [&str; 4] = [
    "image/png",
    "image/jpeg",
    "image/webp",
    "application/octet-stream",
];

#[utoipa::path(post, path = "/v1/images", operation_id = "register_images", tag = "scoring",
    request_body(content(
        (RegisterRequest = "application/json"),
        (ImageFile = "image/png"),
        (ImageFile = "image/jpeg"),
        (ImageFile = "image/webp"),
        (ImageFile = "application/octet-stream"),
    )),
    responses((status = 200, body = RegisterResponse), super::Failure))]
pub async fn register(
    State(service): State<Service>,
    caller: Option<Extension<Caller>>,
    headers: HeaderMap,
    body: Result<Bytes, BytesRejection>,
) -> Result<Json<RegisterResponse>, ApiError> {
    let body = body.map_err(body_rejection)?;
    let engine = service.engine()?;
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
    let (sources, fields, model_name) = if is_json(&headers) {
        let request: RegisterRequest = parse_json(&body)?;
        if request.images.is_empty() {
            return Err(Invalid::new("images", Problem::Missing("image")).into());
        }
        service
            .limits()
            .check(Limit::Images, request.images.len(), "images")?;
        let fields = (0..request.images.len())
            .map(|i| format!("images[{i}]"))
            .collect();
        (sources(&request.images, "images")?, fields, request.model)
    } else if RAW_IMAGE_TYPES.contains(&mime.as_str()) {
        if body.is_empty() {
            return Err(Invalid::new("body", Problem::Blank("the image body")).into());
        }
        let source = ImageSource::Bytes(Arc::new(body.to_vec()));
        (vec![source], vec!["body".to_string()], None)
    } else {
        return Err(ApiError::new(
            ErrorCode::UnsupportedMediaType,
            format!(
                "Content-Type {content_type:?} is not taken here: send application/json, or an image as \
                 image/png, image/jpeg, image/webp or application/octet-stream"
            ),
        ));
    };
    let model = engine.model(model_name.as_deref())?;
    let registered = futures::future::try_join_all(sources.into_iter().zip(fields).map(
        |(source, field)| async move {
            engine
                .register(source, Some(model))
                .await
                .map_err(|e| ApiError::from(e).at(field))
        },
    ))
    .await?;
    access::audit(caller.as_deref(), "images.register", registered.len());
    Ok(Json(RegisterResponse {
        images: registered.into_iter().map(RegisteredOut::from).collect(),
    }))
}

//! `ApiJson<T>`: axum's JSON extractor with its rejections turned into
//! [`ApiError`]s (400 for syntax and shape, 413 for size, 415 for type).

use axum::extract::rejection::JsonRejection;
use axum::extract::{FromRequest, Request};
use axum::http::StatusCode;
use serde::de::DeserializeOwned;

use super::error::ApiError;

/// A JSON request body of type `T`.
pub struct ApiJson<T>(pub T);

impl<T: DeserializeOwned, S: Send + Sync> FromRequest<S> for ApiJson<T> {
    type Rejection = ApiError;

    async fn from_request(req: Request, state: &S) -> Result<Self, ApiError> {
        match axum::Json::<T>::from_request(req, state).await {
            Ok(axum::Json(value)) => Ok(ApiJson(value)),
            Err(rejection) => Err(json_rejection(rejection)),
        }
    }
}

/// Maps axum's JSON rejection to our codes; shape errors name the field serde blamed.
pub fn json_rejection(rejection: JsonRejection) -> ApiError {
    match rejection {
        JsonRejection::JsonDataError(e) => {
            let text = e.body_text();
            let detail = text
                .strip_prefix("Failed to deserialize the JSON body into the target type: ")
                .unwrap_or(&text);
            let mut error = ApiError::new(
                StatusCode::BAD_REQUEST,
                "bad_json",
                format!("request shape: {detail}"),
            );
            if let Some((path, _)) = detail.split_once(": ") {
                if !path.contains(' ') && path != "." {
                    error = error.at(path);
                }
            }
            error
        }
        JsonRejection::JsonSyntaxError(e) => ApiError::new(
            StatusCode::BAD_REQUEST,
            "bad_json",
            format!("not valid JSON: {}", e.body_text()),
        ),
        JsonRejection::MissingJsonContentType(_) => ApiError::new(
            StatusCode::UNSUPPORTED_MEDIA_TYPE,
            "unsupported_media_type",
            "send the body with Content-Type: application/json",
        ),
        other if other.status() == StatusCode::PAYLOAD_TOO_LARGE => body_too_large(),
        other => ApiError::new(StatusCode::BAD_REQUEST, "bad_json", other.body_text()),
    }
}

/// 413, naming the flag.
pub fn body_too_large() -> ApiError {
    ApiError::new(
        StatusCode::PAYLOAD_TOO_LARGE,
        "body_too_large",
        "request body is over the server's limit (raise it with --max-body-bytes, or send fewer items per request)",
    )
}

//! The one error type of the HTTP API and its JSON form
//! `{"error": {"code", "message", "field"?}}`.
//!
//! Client errors are answered and not logged; server errors are logged once
//! with their details and answered with a generic message.

use axum::http::{header, HeaderValue, StatusCode};
use axum::response::{IntoResponse, Response};
use serde::Serialize;

use crate::encoders::{EncodeError, EngineError};
use crate::intake::image_decode::DecodeError;
use crate::intake::image_root::PathError;

/// Seconds a client is told to wait after a 503.
pub const RETRY_AFTER_SECONDS: u64 = 1;

/// An answer that is not a success.
#[derive(Debug, Clone)]
pub struct ApiError {
    pub status: StatusCode,
    pub code: &'static str,
    pub message: String,
    pub field: Option<String>,
}

#[derive(Serialize)]
struct Body<'a> {
    error: Inner<'a>,
}

#[derive(Serialize)]
struct Inner<'a> {
    code: &'a str,
    message: &'a str,
    #[serde(skip_serializing_if = "Option::is_none")]
    field: Option<&'a str>,
}

impl ApiError {
    pub fn new(status: StatusCode, code: &'static str, message: impl Into<String>) -> ApiError {
        ApiError {
            status,
            code,
            message: message.into(),
            field: None,
        }
    }

    /// 400 `invalid_field` blaming `field`.
    pub fn invalid(field: impl Into<String>, message: impl Into<String>) -> ApiError {
        ApiError::new(StatusCode::BAD_REQUEST, "invalid_field", message).at(field)
    }

    /// 400 `over_limit` blaming `field`, naming the flag that raises the limit.
    pub fn over_limit(field: impl Into<String>, what: &str, limit: usize, flag: &str) -> ApiError {
        let message =
            format!("{what} is over the server's limit of {limit} (raise it with {flag})");
        ApiError::new(StatusCode::BAD_REQUEST, "over_limit", message).at(field)
    }

    pub fn not_ready() -> ApiError {
        ApiError::new(
            StatusCode::SERVICE_UNAVAILABLE,
            "not_ready",
            "bundles are still loading; retry shortly",
        )
    }

    pub fn overloaded(message: impl Into<String>) -> ApiError {
        ApiError::new(StatusCode::SERVICE_UNAVAILABLE, "overloaded", message)
    }

    /// A fault of ours: logged here with its details, answered without them.
    pub fn internal(details: impl std::fmt::Display) -> ApiError {
        tracing::error!(error = %details, "internal error");
        ApiError::new(
            StatusCode::INTERNAL_SERVER_ERROR,
            "internal",
            "internal error; the server log has details",
        )
    }

    /// Sets the field to blame, unless one is already set.
    pub fn at(mut self, field: impl Into<String>) -> ApiError {
        if self.field.is_none() {
            self.field = Some(field.into());
        }
        self
    }
}

impl IntoResponse for ApiError {
    fn into_response(self) -> Response {
        let body = Body {
            error: Inner {
                code: self.code,
                message: &self.message,
                field: self.field.as_deref(),
            },
        };
        let mut response = (self.status, axum::Json(body)).into_response();
        if self.status == StatusCode::SERVICE_UNAVAILABLE {
            response
                .headers_mut()
                .insert(header::RETRY_AFTER, HeaderValue::from(RETRY_AFTER_SECONDS));
        }
        response
    }
}

impl From<EngineError> for ApiError {
    fn from(e: EngineError) -> ApiError {
        let message = e.to_string();
        match e {
            EngineError::UnknownModel { .. } => {
                ApiError::new(StatusCode::NOT_FOUND, "unknown_model", message).at("model")
            }
            EngineError::UnknownImage(_) => {
                ApiError::new(StatusCode::NOT_FOUND, "unknown_image", message)
            }
            EngineError::BadImageId(_) => {
                ApiError::new(StatusCode::BAD_REQUEST, "invalid_field", message)
            }
            EngineError::Decode(DecodeError::TooLarge { .. }) => {
                ApiError::new(StatusCode::UNPROCESSABLE_ENTITY, "image_too_large", message)
            }
            EngineError::Decode(_) => {
                ApiError::new(StatusCode::UNPROCESSABLE_ENTITY, "bad_image", message)
            }
            EngineError::Path(PathError::NoRoot | PathError::Escapes(_)) => {
                ApiError::new(StatusCode::FORBIDDEN, "path_refused", message)
            }
            EngineError::Path(_) => {
                ApiError::new(StatusCode::UNPROCESSABLE_ENTITY, "bad_image", message)
            }
            EngineError::Encode(EncodeError::Overloaded { .. }) => ApiError::overloaded(message),
            EngineError::Encode(EncodeError::Caption { .. }) => {
                ApiError::new(StatusCode::BAD_REQUEST, "invalid_field", message)
            }
            EngineError::Encode(EncodeError::Failed { .. })
            | EngineError::Store(_)
            | EngineError::Task(_) => ApiError::internal(message),
        }
    }
}

impl From<EncodeError> for ApiError {
    fn from(e: EncodeError) -> ApiError {
        ApiError::from(EngineError::Encode(e))
    }
}

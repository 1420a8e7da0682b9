//! `ApiJson<T>`: a JSON request body, parsed with the path of the field serde
//! blamed kept as data (`serde_path_to_error`), and every rejection turned into
//! an [`ApiError`] (400 for syntax and shape, 413 for size, 415 for type).

use axum::body::Bytes;
use axum::extract::rejection::BytesRejection;
use axum::extract::{FromRequest, Request};
use axum::http::{header, HeaderMap, StatusCode};
use serde::de::DeserializeOwned;

use super::error::{ApiError, ErrorCode};

/// A JSON request body of type `T`.
pub struct ApiJson<T>(pub T);

impl<T: DeserializeOwned, S: Send + Sync> FromRequest<S> for ApiJson<T> {
    type Rejection = ApiError;

    async fn from_request(req: Request, state: &S) -> Result<Self, ApiError> {
        if !is_json(req.headers()) {
            return Err(ApiError::new(
                ErrorCode::UnsupportedMediaType,
                "send the body with Content-Type: application/json",
            ));
        }
        let bytes = Bytes::from_request(req, state)
            .await
            .map_err(body_rejection)?;
        parse_json(&bytes).map(ApiJson)
    }
}

/// Whether the request says its body is JSON (`application/json` or `application/*+json`).
pub fn is_json(headers: &HeaderMap) -> bool {
    let Some(value) = headers
        .get(header::CONTENT_TYPE)
        .and_then(|v| v.to_str().ok())
    else {
        return false;
    };
    let mime = value
        .split(';')
        .next()
        .unwrap_or("")
        .trim()
        .to_ascii_lowercase();
    mime == "application/json" || (mime.starts_with("application/") && mime.ends_with("+json"))
}

/// A body that could not be read: over the limit, or cut off.
pub fn body_rejection(rejection: BytesRejection) -> ApiError {
    if rejection.status() == StatusCode::PAYLOAD_TOO_LARGE {
        ApiError::body_too_large()
    } else {
        ApiError::new(ErrorCode::BadJson, rejection.body_text())
    }
}

/// A query string or path segment the framework could not read into its
/// type: `invalid_field` blaming `field`, saying what it must be.
pub fn unreadable(field: &str, must_be: &str, rejection_text: String) -> ApiError {
    ApiError::new(
        ErrorCode::InvalidField,
        format!("{field} must be {must_be}: {rejection_text}"),
    )
    .at(field)
}

/// Parses a read body; shape errors blame the field serde was in.
pub fn parse_json<T: DeserializeOwned>(bytes: &[u8]) -> Result<T, ApiError> {
    let mut deserializer = serde_json::Deserializer::from_slice(bytes);
    let value: T = serde_path_to_error::deserialize(&mut deserializer).map_err(|e| {
        let path = e.path().to_string();
        shape_error(path, e.into_inner())
    })?;
    deserializer
        .end()
        .map_err(|e| shape_error(".".to_string(), e))?;
    Ok(value)
}

fn shape_error(path: String, inner: serde_json::Error) -> ApiError {
    {
        let error = match inner.classify() {
            serde_json::error::Category::Data => ApiError::new(
                ErrorCode::BadJson,
                format!("request shape: {path}: {inner}"),
            ),
            _ => ApiError::new(ErrorCode::BadJson, format!("not valid JSON: {inner}")),
        };
        if path == "." || inner.classify() != serde_json::error::Category::Data {
            error
        } else {
            error.at(path)
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[derive(Debug, serde::Deserialize)]
    #[allow(dead_code)]
    struct Outer {
        groups: Vec<Inner>,
    }

    #[derive(Debug, serde::Deserialize)]
    #[allow(dead_code)]
    struct Inner {
        captions: Vec<String>,
    }

    #[test]
    fn shape_errors_name_the_field_path() {
        let e = parse_json::<Outer>(br#"{"groups": [{"captions": ["a"]}, {"captions": [3]}]}"#)
            .unwrap_err();
        assert_eq!(e.code, ErrorCode::BadJson);
        assert_eq!(e.field.as_deref(), Some("groups[1].captions[0]"));
        let e = parse_json::<Outer>(br#"{"groups": [}"#).unwrap_err();
        assert_eq!((e.code, e.field), (ErrorCode::BadJson, None));
        assert!(e.message.starts_with("not valid JSON"), "{}", e.message);
        let e = parse_json::<Outer>(br#"{"groups": []} trailing"#).unwrap_err();
        assert_eq!(e.code, ErrorCode::BadJson);
    }
}

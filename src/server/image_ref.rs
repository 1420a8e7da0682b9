//! The `{"id" | "base64" | "path"}` object by which requests name an image.

use std::sync::Arc;

use base64::Engine as _;
use serde::Deserialize;

use super::error::ApiError;
use crate::encoders::ImageSource;

/// An image as the JSON of a request names it; exactly one field must be set.
#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct ImageRef {
    pub id: Option<String>,
    pub base64: Option<String>,
    pub path: Option<String>,
}

impl ImageRef {
    /// The engine's view of it; `field` names it in errors.
    pub fn source(&self, field: &str) -> Result<ImageSource, ApiError> {
        match (&self.id, &self.base64, &self.path) {
            (Some(id), None, None) => Ok(ImageSource::Id(id.clone())),
            (None, Some(b64), None) => {
                let bytes = base64::engine::general_purpose::STANDARD
                    .decode(b64.trim())
                    .map_err(|e| {
                        ApiError::invalid(
                            format!("{field}.base64"),
                            format!("not valid base64: {e}"),
                        )
                    })?;
                Ok(ImageSource::Bytes(Arc::new(bytes)))
            }
            (None, None, Some(path)) => Ok(ImageSource::Path(path.clone())),
            _ => Err(ApiError::invalid(
                field,
                "give exactly one of `id`, `base64` or `path`",
            )),
        }
    }
}

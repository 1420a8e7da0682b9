//! How a request, a probe row or a command names an image: the one
//! image-source type every stage shares, and its JSON form.

use std::path::PathBuf;
use std::sync::Arc;

use base64::Engine as _;
use serde::Deserialize;

use super::validation::{Invalid, Problem};
use crate::store::images::is_content_id;

/// An image, as named by whoever asks for its vector.
#[derive(Debug, Clone, PartialEq, Eq, Hash)]
pub enum ImageSource {
    /// Content id of a registered image (checked: 64 lower-case hex digits).
    Id(String),
    /// The file's bytes.
    Bytes(Arc<Vec<u8>>),
    /// A file: relative to the server's image root, or (offline) a path on disk.
    Path(PathBuf),
}

impl ImageSource {
    /// An id source, refusing what is not a content id.
    pub fn id(id: &str, field: &str) -> Result<ImageSource, Invalid> {
        if is_content_id(id) {
            Ok(ImageSource::Id(id.to_string()))
        } else {
            Err(Invalid::new(field, Problem::ImageId(id.to_string())))
        }
    }
}

impl std::fmt::Display for ImageSource {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        match self {
            ImageSource::Id(id) => write!(f, "id {id}"),
            ImageSource::Bytes(bytes) => write!(f, "{} bytes", bytes.len()),
            ImageSource::Path(p) => write!(f, "{}", p.display()),
        }
    }
}

/// The `{"id" | "base64" | "path"}` object by which JSON names an image;
/// exactly one field must be set.
#[derive(Debug, Clone, Deserialize, utoipa::ToSchema)]
#[serde(deny_unknown_fields)]
pub struct ImageRef {
    pub id: Option<String>,
    pub base64: Option<String>,
    pub path: Option<String>,
}

impl ImageRef {
    /// The source it names; `field` is blamed in errors.
    pub fn source(&self, field: &str) -> Result<ImageSource, Invalid> {
        match (&self.id, &self.base64, &self.path) {
            (Some(id), None, None) => ImageSource::id(id, &format!("{field}.id")),
            (None, Some(b64), None) => base64::engine::general_purpose::STANDARD
                .decode(b64.trim())
                .map(|bytes| ImageSource::Bytes(Arc::new(bytes)))
                .map_err(|e| Invalid::new(format!("{field}.base64"), Problem::Base64(e))),
            (None, None, Some(path)) => Ok(ImageSource::Path(PathBuf::from(path))),
            _ => Err(Invalid::new(
                field,
                Problem::OneOf("`id`, `base64` or `path`"),
            )),
        }
    }
}

/// Resolves a list of image objects, blaming `field[i]`.
pub fn sources(refs: &[ImageRef], field: &str) -> Result<Vec<ImageSource>, Invalid> {
    refs.iter()
        .enumerate()
        .map(|(i, r)| r.source(&format!("{field}[{i}]")))
        .collect()
}

#[cfg(test)]
mod tests {
    use super::*;

    fn parse(json: &str) -> ImageRef {
        serde_json::from_str(json).unwrap()
    }

    #[test]
    fn exactly_one_field_and_each_checked() {
        let id = "a".repeat(64);
        assert_eq!(
            parse(&format!(r#"{{"id": "{id}"}}"#))
                .source("image")
                .unwrap(),
            ImageSource::Id(id)
        );
        // "aGk=" is base64 of "hi" (RFC 4648, section 4 alphabet).
        assert_eq!(
            parse(r#"{"base64": "aGk="}"#).source("image").unwrap(),
            ImageSource::Bytes(Arc::new(b"hi".to_vec()))
        );
        let e = parse(r#"{"id": "ABC"}"#)
            .source("groups[2].image")
            .unwrap_err();
        assert_eq!(e.field, "groups[2].image.id");
        assert_eq!(e.problem, Problem::ImageId("ABC".into()));
        let e = parse(r#"{"base64": "!!"}"#).source("image").unwrap_err();
        assert_eq!(e.field, "image.base64");
        let e = parse(r#"{"path": "a.png", "base64": "aGk="}"#)
            .source("image")
            .unwrap_err();
        assert!(matches!(e.problem, Problem::OneOf(_)));
        assert!(matches!(
            parse("{}").source("image").unwrap_err().problem,
            Problem::OneOf(_)
        ));
    }
}

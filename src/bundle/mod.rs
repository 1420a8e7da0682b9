//! A model bundle on disk: `bundle.toml`, two ONNX graphs and a tokenizer.
//!
//! [`manifest`] parses and checks `bundle.toml` on its own; [`digest`] names
//! the bundle's exact files; [`graph_check`] holds the manifest against what
//! the ONNX graphs really declare. The format is documented in `docs/bundles.md`.

pub mod digest;
pub mod graph_check;
pub mod manifest;

use std::path::{Path, PathBuf};

pub use manifest::{
    Filter, FluencySpec, ImageSpec, Manifest, ModelSpec, Padding, ResizeRule, TextSpec,
};

/// Why a bundle could not be opened; every message names the file and field.
#[derive(Debug, thiserror::Error)]
pub enum BundleError {
    #[error("{path}: cannot read: {cause}")]
    Read {
        path: PathBuf,
        cause: std::io::Error,
    },
    #[error("{path}: {message}")]
    Manifest { path: PathBuf, message: String },
    #[error("{path}: field `{field}`: {message}")]
    Field {
        path: PathBuf,
        field: String,
        message: String,
    },
    #[error("{path}: {message}")]
    Card { path: PathBuf, message: String },
}

/// A bundle folder whose manifest has been read and checked, with its digest.
#[derive(Debug, Clone)]
pub struct Bundle {
    pub dir: PathBuf,
    pub manifest: Manifest,
    /// sha256 over the bundle's files, as 64 hex digits (see `docs/bundles.md`).
    pub digest: String,
    /// The bundle's `card.json`, when it has one.
    pub card: Option<serde_json::Value>,
}

impl Bundle {
    /// Reads `DIR/bundle.toml`, checks it, and digests the files it names.
    pub fn open(dir: &Path) -> Result<Bundle, BundleError> {
        let manifest_path = dir.join("bundle.toml");
        let text = std::fs::read_to_string(&manifest_path).map_err(|cause| BundleError::Read {
            path: manifest_path.clone(),
            cause,
        })?;
        let manifest = Manifest::parse(&text, &manifest_path)?;
        manifest.check_files(dir, &manifest_path)?;
        let digest = digest::bundle_digest(dir, &manifest)?;
        let card_path = dir.join("card.json");
        let card = match std::fs::read_to_string(&card_path) {
            Ok(text) => Some(serde_json::from_str(&text).map_err(|e| BundleError::Card {
                path: card_path.clone(),
                message: format!("not valid JSON: {e}"),
            })?),
            Err(e) if e.kind() == std::io::ErrorKind::NotFound => None,
            Err(cause) => {
                return Err(BundleError::Read {
                    path: card_path,
                    cause,
                })
            }
        };
        Ok(Bundle {
            dir: dir.to_path_buf(),
            manifest,
            digest,
            card,
        })
    }

    /// `NAME@VERSION`, the id requests use to pick this bundle.
    pub fn id(&self) -> String {
        format!(
            "{}@{}",
            self.manifest.model.name, self.manifest.model.version
        )
    }

    pub fn image_graph(&self) -> PathBuf {
        self.dir.join(&self.manifest.image.file)
    }

    pub fn text_graph(&self) -> PathBuf {
        self.dir.join(&self.manifest.text.file)
    }

    pub fn tokenizer_file(&self) -> PathBuf {
        self.dir.join(&self.manifest.text.tokenizer)
    }

    /// The first 12 hex digits of the digest, for logs.
    pub fn short_digest(&self) -> &str {
        &self.digest[..12]
    }
}

//! The shared-space math: L2 normalisation and cosine similarity, and the
//! [`Embedder`] seam through which offline work (bank import, calibration,
//! drift) asks for vectors without knowing how encoders are run.

use std::path::PathBuf;

use ndarray::Array2;

/// Why an [`Embedder`] could not produce vectors; the message is for people.
#[derive(Debug, thiserror::Error)]
#[error("{0}")]
pub struct EmbedError(pub String);

/// Something that maps captions and image files into one shared space.
///
/// Every returned row is L2-normalised, so a dot product is a cosine.
pub trait Embedder: Send + Sync {
    /// Length of every vector.
    fn dimension(&self) -> usize;
    /// One row per caption, in order.
    fn embed_texts(&self, texts: &[String]) -> Result<Array2<f32>, EmbedError>;
    /// One row per image file, in order.
    fn embed_image_files(&self, paths: &[PathBuf]) -> Result<Array2<f32>, EmbedError>;
}

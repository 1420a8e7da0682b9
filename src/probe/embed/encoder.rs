//! What embeds a probe set: the [`ProbeEncoder`] trait, and [`ImageFiles`]
//! for probe sets whose images are files.

use std::path::PathBuf;

use ndarray::Array2;

use crate::probe::set::ImageSource;
use crate::vectors::{EmbedError, Embedder};

/// Turns probe images and captions into vectors; every returned row is
/// L2-normalised.
///
/// Implemented by [`ImageFiles`] for an [`Embedder`] and image paths; a
/// caller with an image store implements it to resolve [`ImageSource::Id`].
pub trait ProbeEncoder {
    /// Length of every vector.
    fn dimension(&self) -> usize;
    /// One row per image, in order.
    fn embed_images(&self, images: &[&ImageSource]) -> Result<Array2<f32>, EmbedError>;
    /// One row per caption, in order.
    fn embed_texts(&self, texts: &[String]) -> Result<Array2<f32>, EmbedError>;
}

/// A [`ProbeEncoder`] for probe sets whose images are files.
pub struct ImageFiles<'a>(pub &'a dyn Embedder);

impl ProbeEncoder for ImageFiles<'_> {
    fn dimension(&self) -> usize {
        self.0.dimension()
    }

    fn embed_images(&self, images: &[&ImageSource]) -> Result<Array2<f32>, EmbedError> {
        let paths = images
            .iter()
            .map(|image| match image {
                ImageSource::Path(p) => Ok(p.clone()),
                ImageSource::Id(id) => Err(EmbedError::input(format!(
                    "image id {id} can only be resolved by a server's image store; name the image by path"
                ))),
                ImageSource::Bytes(_) => Err(EmbedError::input(
                    "probe rows name images by path or id".to_string(),
                )),
            })
            .collect::<Result<Vec<PathBuf>, _>>()?;
        self.0.embed_image_files(&paths)
    }

    fn embed_texts(&self, texts: &[String]) -> Result<Array2<f32>, EmbedError> {
        self.0.embed_texts(texts)
    }
}

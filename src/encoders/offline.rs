//! The [`Embedder`] that offline work (bank import, calibration, drift) uses:
//! one model, driven from plain threads by blocking on the engine's runtime.

use std::path::PathBuf;
use std::sync::Arc;

use ndarray::Array2;

use super::model::Model;
use crate::intake::image_decode::ImageLimits;
use crate::intake::image_tensor::tensor_from_bytes;
use crate::vectors::{EmbedError, Embedder};

/// Embeds through `model` by blocking on `runtime`; never call it from an async task.
pub struct ModelEmbedder {
    pub model: Arc<Model>,
    pub runtime: tokio::runtime::Handle,
    pub image_limits: ImageLimits,
}

fn rows(vectors: Vec<Vec<f32>>, dimension: usize) -> Result<Array2<f32>, EmbedError> {
    let n = vectors.len();
    let flat: Vec<f32> = vectors.into_iter().flatten().collect();
    Array2::from_shape_vec((n, dimension), flat)
        .map_err(|e| EmbedError::encoder(format!("vector shape: {e}")))
}

/// Caption vectors of `model` as rows, blocking on `runtime`.
fn caption_rows(
    model: &Model,
    runtime: &tokio::runtime::Handle,
    texts: &[String],
) -> Result<Array2<f32>, EmbedError> {
    let vectors = runtime
        .block_on(model.caption_vectors(texts))
        .map_err(|e| EmbedError::encoder(e.to_string()))?;
    rows(
        vectors.iter().map(|v| v.vector.clone()).collect(),
        model.dimension(),
    )
}

impl Embedder for ModelEmbedder {
    fn dimension(&self) -> usize {
        self.model.dimension()
    }

    fn embed_texts(&self, texts: &[String]) -> Result<Array2<f32>, EmbedError> {
        caption_rows(&self.model, &self.runtime, texts)
    }

    fn embed_image_files(&self, paths: &[PathBuf]) -> Result<Array2<f32>, EmbedError> {
        let spec = &self.model.bundle.manifest.image;
        let mut tensors = Vec::with_capacity(paths.len());
        for path in paths {
            let bytes = std::fs::read(path)
                .map_err(|e| EmbedError::input(format!("{}: {e}", path.display())))?;
            let tensor = tensor_from_bytes(&bytes, &self.image_limits, spec)
                .map_err(|e| EmbedError::input(format!("{}: {e}", path.display())))?;
            tensors.push(tensor.values);
        }
        let vectors = self
            .runtime
            .block_on(self.model.tensor_vectors(tensors))
            .map_err(|e| EmbedError::encoder(e.to_string()))?;
        rows(vectors, self.dimension())
    }
}

/// A probe encoder over a running engine: images named by id come from the
/// store, images named by path from the image root. For the HTTP statistics
/// routes; it blocks, so run it on a blocking thread.
pub struct EngineProbeEncoder {
    pub engine: Arc<super::Engine>,
    pub model: Arc<Model>,
    pub runtime: tokio::runtime::Handle,
}

impl crate::probe::ProbeEncoder for EngineProbeEncoder {
    fn dimension(&self) -> usize {
        self.model.dimension()
    }

    fn embed_images(
        &self,
        images: &[&crate::probe::ImageSource],
    ) -> Result<Array2<f32>, EmbedError> {
        let work = futures::future::try_join_all(
            images
                .iter()
                .map(|s| self.engine.image_vector(&self.model, s)),
        );
        let found = self.runtime.block_on(work).map_err(|e| {
            use super::EngineError as E;
            let message = e.to_string();
            match e {
                E::UnknownImage(_) | E::Decode(_) | E::Path(_) => EmbedError::input(message),
                _ => EmbedError::encoder(message),
            }
        })?;
        rows(
            found.into_iter().map(|(_, v)| v.to_vec()).collect(),
            self.dimension(),
        )
    }

    fn embed_texts(&self, texts: &[String]) -> Result<Array2<f32>, EmbedError> {
        caption_rows(&self.model, &self.runtime, texts)
    }
}

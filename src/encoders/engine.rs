//! Every loaded model plus the image store and the image root: the one place
//! that turns an image reference into a content id and a vector, registering
//! and caching on the way so no image is decoded or encoded twice.

use std::sync::Arc;

use super::model::{EncodeError, Model};
use crate::intake::image_decode::{decode_rgb, DecodeError};
use crate::intake::image_root::{ImageRoot, PathError};
use crate::intake::image_tensor::to_tensor;
use crate::metrics::Registry;
use crate::store::images::{content_id, is_content_id, ImageStore, StoreError};

/// An image as a request names it.
#[derive(Debug, Clone)]
pub enum ImageSource {
    /// Content id of a registered image.
    Id(String),
    /// The file's bytes.
    Bytes(Arc<Vec<u8>>),
    /// A path under the image root.
    Path(String),
}

/// What registering an image found.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Registered {
    pub id: String,
    pub width: u32,
    pub height: u32,
    pub new: bool,
}

/// Why the engine could not answer.
#[derive(Debug, thiserror::Error)]
pub enum EngineError {
    #[error("unknown model {asked:?}; loaded: {}", loaded.join(", "))]
    UnknownModel { asked: String, loaded: Vec<String> },
    #[error("unknown image id {0}; register it first with POST /v1/images")]
    UnknownImage(String),
    #[error("{0:?} is not an image id (64 lower-case hex digits)")]
    BadImageId(String),
    #[error("{0}")]
    Decode(#[from] DecodeError),
    #[error("{0}")]
    Path(#[from] PathError),
    #[error(transparent)]
    Encode(#[from] EncodeError),
    #[error(transparent)]
    Store(#[from] StoreError),
    #[error("internal task failed: {0}")]
    Task(String),
}

/// The models, the store and the limits on images.
pub struct Engine {
    models: Vec<Arc<Model>>,
    store: Arc<ImageStore>,
    root: Option<ImageRoot>,
    max_pixels: u64,
    metrics: Arc<Registry>,
}

/// Runs blocking work (SQLite, decoding) off the async runtime's threads.
async fn blocking<T: Send + 'static>(
    f: impl FnOnce() -> T + Send + 'static,
) -> Result<T, EngineError> {
    tokio::task::spawn_blocking(f)
        .await
        .map_err(|e| EngineError::Task(e.to_string()))
}

impl Engine {
    /// `models` must be non-empty; the first is the default.
    pub fn new(
        models: Vec<Arc<Model>>,
        store: Arc<ImageStore>,
        root: Option<ImageRoot>,
        max_pixels: u64,
        metrics: Arc<Registry>,
    ) -> Engine {
        assert!(!models.is_empty(), "an engine needs at least one model");
        Engine {
            models,
            store,
            root,
            max_pixels,
            metrics,
        }
    }

    pub fn models(&self) -> &[Arc<Model>] {
        &self.models
    }

    pub fn store(&self) -> &Arc<ImageStore> {
        &self.store
    }

    pub fn metrics(&self) -> &Arc<Registry> {
        &self.metrics
    }

    /// The model a request asks for: an id `NAME@VERSION`, a name that only one
    /// loaded bundle has, or (`None`) the default.
    pub fn model(&self, selector: Option<&str>) -> Result<&Arc<Model>, EngineError> {
        let Some(asked) = selector else {
            return Ok(&self.models[0]);
        };
        if let Some(m) = self.models.iter().find(|m| m.id == asked) {
            return Ok(m);
        }
        let by_name: Vec<&Arc<Model>> = self
            .models
            .iter()
            .filter(|m| m.bundle.manifest.model.name == asked)
            .collect();
        match by_name.as_slice() {
            [one] => Ok(one),
            _ => Err(EngineError::UnknownModel {
                asked: asked.to_string(),
                loaded: self.models.iter().map(|m| m.id.clone()).collect(),
            }),
        }
    }

    async fn bytes_of(&self, source: &ImageSource) -> Result<Arc<Vec<u8>>, EngineError> {
        match source {
            ImageSource::Bytes(bytes) => Ok(Arc::clone(bytes)),
            ImageSource::Path(path) => {
                let root = self.root.clone().ok_or(PathError::NoRoot)?;
                let path = path.clone();
                Ok(Arc::new(blocking(move || root.read(&path)).await??))
            }
            ImageSource::Id(id) => {
                let (store, id) = (Arc::clone(&self.store), id.clone());
                let found = blocking({
                    let id = id.clone();
                    move || store.image_bytes(&id)
                })
                .await??;
                found.map(Arc::new).ok_or(EngineError::UnknownImage(id))
            }
        }
    }

    /// Registers an image (idempotent) and, when `model` is given, embeds it.
    pub async fn register(
        &self,
        source: ImageSource,
        model: Option<&Arc<Model>>,
    ) -> Result<Registered, EngineError> {
        if let ImageSource::Id(id) = &source {
            check_id(id)?;
        }
        let bytes = self.bytes_of(&source).await?;
        let (store, max_pixels) = (Arc::clone(&self.store), self.max_pixels);
        let tensor_spec = model.map(|m| m.bundle.manifest.image.clone());
        let (registered, tensor) = blocking(move || -> Result<_, EngineError> {
            let id = content_id(&bytes);
            let rgb = decode_rgb(&bytes, max_pixels)?;
            let (width, height) = rgb.dimensions();
            let new = store.put_image(&id, &bytes, width, height)?;
            let tensor = tensor_spec.map(|spec| to_tensor(&rgb, &spec));
            Ok((
                Registered {
                    id,
                    width,
                    height,
                    new,
                },
                tensor,
            ))
        })
        .await??;
        if let (Some(model), Some(tensor)) = (model, tensor) {
            self.embed_and_keep(model, &registered.id, tensor).await?;
        }
        Ok(registered)
    }

    /// The content id and unit vector of an image under `model`, from the
    /// memory cache, the store, or (last) the encoder.
    pub async fn image_vector(
        &self,
        model: &Arc<Model>,
        source: &ImageSource,
    ) -> Result<(String, Arc<Vec<f32>>), EngineError> {
        let id = match source {
            ImageSource::Id(id) => {
                check_id(id)?;
                id.clone()
            }
            ImageSource::Bytes(bytes) => {
                let bytes = Arc::clone(bytes);
                blocking(move || content_id(&bytes)).await?
            }
            ImageSource::Path(_) => {
                let registered = self.register(source.clone(), Some(model)).await?;
                let vector = self.cached_vector(model, &registered.id).await?;
                return vector.map(|v| (registered.id.clone(), v)).ok_or_else(|| {
                    EngineError::Task(format!(
                        "image {} was embedded but its vector is gone",
                        registered.id
                    ))
                });
            }
        };
        if let Some(vector) = self.cached_vector(model, &id).await? {
            return Ok((id, vector));
        }
        // Not embedded under this model yet: (re)register from the bytes we have, which also embeds.
        let source = match source {
            ImageSource::Id(_) => ImageSource::Bytes(self.bytes_of(source).await?),
            other => other.clone(),
        };
        let registered = self.register(source, Some(model)).await?;
        let vector = self.cached_vector(model, &registered.id).await?;
        vector
            .map(|v| (registered.id.clone(), v))
            .ok_or(EngineError::UnknownImage(registered.id))
    }

    async fn cached_vector(
        &self,
        model: &Arc<Model>,
        id: &str,
    ) -> Result<Option<Arc<Vec<f32>>>, EngineError> {
        if let Some(v) = model.image_vectors.get(&id.to_string()) {
            self.metrics
                .add("befit_cache_hits_total", &[("cache", "image_memory")], 1);
            return Ok(Some(v));
        }
        self.metrics
            .add("befit_cache_misses_total", &[("cache", "image_memory")], 1);
        let (store, key, digest) = (
            Arc::clone(&self.store),
            id.to_string(),
            model.bundle.digest.clone(),
        );
        let stored = blocking(move || store.vector(&key, &digest)).await??;
        match stored {
            Some(vector) => {
                self.metrics
                    .add("befit_cache_hits_total", &[("cache", "image_store")], 1);
                let vector = Arc::new(vector);
                model.image_vectors.put(id.to_string(), Arc::clone(&vector));
                Ok(Some(vector))
            }
            None => {
                self.metrics
                    .add("befit_cache_misses_total", &[("cache", "image_store")], 1);
                Ok(None)
            }
        }
    }

    async fn embed_and_keep(
        &self,
        model: &Arc<Model>,
        id: &str,
        tensor: Vec<f32>,
    ) -> Result<Arc<Vec<f32>>, EngineError> {
        if let Some(v) = model.image_vectors.get(&id.to_string()) {
            return Ok(v);
        }
        let vector = model
            .tensor_vectors(vec![tensor])
            .await?
            .pop()
            .unwrap_or_default();
        let (store, key, digest, kept) = (
            Arc::clone(&self.store),
            id.to_string(),
            model.bundle.digest.clone(),
            vector.clone(),
        );
        blocking(move || store.put_vector(&key, &digest, &kept)).await??;
        let vector = Arc::new(vector);
        model.image_vectors.put(id.to_string(), Arc::clone(&vector));
        Ok(vector)
    }
}

fn check_id(id: &str) -> Result<(), EngineError> {
    if is_content_id(id) {
        Ok(())
    } else {
        Err(EngineError::BadImageId(id.to_string()))
    }
}

//! Every loaded model plus the image store and the image root: the one place
//! that turns an image reference into a content id and a vector, registering
//! and caching on the way so no image is decoded or encoded twice.

use std::collections::BTreeSet;
use std::sync::Arc;

use super::model::{EncodeError, Model};
use crate::intake::decode_budget::{peak_bytes, BudgetSpent, DecodeBudget, DECODE_BUDGET_WAIT};
use crate::intake::image_decode::{decode_rgb, read_header, DecodeError, ImageLimits};
use crate::intake::image_root::{ImageRoot, PathError};
pub use crate::intake::image_source::ImageSource;
use crate::intake::image_tensor::tensor_from_bytes;
use crate::intake::limits::Limits;
use crate::metrics::Registry;
use crate::probe::ProbeSet;
use crate::stats::Thumbnails;
use crate::store::image_index::{ImageHit, ImageIndex};
use crate::store::images::{content_id, ImageStore, StoreError};

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
    #[error("{0}")]
    Decode(#[from] DecodeError),
    #[error("{0}")]
    Path(#[from] PathError),
    #[error(transparent)]
    Busy(#[from] BudgetSpent),
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
    image_limits: ImageLimits,
    decode_budget: DecodeBudget,
    metrics: Arc<Registry>,
    image_index: ImageIndex,
}

/// An image source resolved to its content id, with its bytes when the
/// request carried them (an id-named image's bytes stay in the store until needed).
struct Resolved {
    id: String,
    bytes: Option<Arc<Vec<u8>>>,
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
        limits: &Limits,
        metrics: Arc<Registry>,
    ) -> Engine {
        assert!(!models.is_empty(), "an engine needs at least one model");
        Engine {
            models,
            store,
            root,
            image_limits: limits.image(),
            decode_budget: DecodeBudget::new(limits.decode_budget_bytes, DECODE_BUDGET_WAIT),
            metrics,
            image_index: ImageIndex::default(),
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

    /// Checks, without reading, that `source` could be read: a path needs an
    /// image root and must stay inside it. Lets a caller refuse a whole
    /// request before any encoder work.
    pub fn check_source(&self, source: &ImageSource) -> Result<(), EngineError> {
        if let ImageSource::Path(path) = source {
            let root = self.root.as_ref().ok_or(PathError::NoRoot)?;
            root.resolve(path)?;
        }
        Ok(())
    }

    /// Thumbnails of the rows of `set` at `lines` whose bytes the server has
    /// (sent in the request, or a file under the image root; an image known
    /// only by id has none), decoded under the server's image limits.
    /// Blocking: reads files.
    pub fn thumbnails(&self, set: &ProbeSet, lines: &BTreeSet<usize>) -> Thumbnails {
        let read = |source: &ImageSource| match source {
            ImageSource::Bytes(bytes) => Some(bytes.to_vec()),
            ImageSource::Path(path) => self.root.as_ref()?.read(path).ok(),
            ImageSource::Id(_) => None,
        };
        crate::probe::thumbnails(set, lines, &read, &self.image_limits)
    }

    /// [`Engine::check_source`] for a probe row: with `skip_bad`, a missing
    /// or unreadable file passes, so the row is skipped as bad when embedded;
    /// a path the server refuses (no root, leaving it) never passes.
    pub fn check_probe_source(
        &self,
        source: &ImageSource,
        skip_bad: bool,
    ) -> Result<(), EngineError> {
        match self.check_source(source) {
            Err(EngineError::Path(PathError::Missing(_) | PathError::Read { .. })) if skip_bad => {
                Ok(())
            }
            other => other,
        }
    }

    /// The content id of `source`, computed once, with the bytes read on the way.
    async fn resolve(&self, source: &ImageSource) -> Result<Resolved, EngineError> {
        match source {
            ImageSource::Id(id) => Ok(Resolved {
                id: id.clone(),
                bytes: None,
            }),
            ImageSource::Bytes(bytes) => {
                let bytes = Arc::clone(bytes);
                blocking(move || Resolved {
                    id: content_id(&bytes),
                    bytes: Some(bytes),
                })
                .await
            }
            ImageSource::Path(path) => {
                let root = self.root.clone().ok_or(PathError::NoRoot)?;
                let path = path.clone();
                blocking(move || -> Result<Resolved, EngineError> {
                    let bytes = root.read(&path)?;
                    Ok(Resolved {
                        id: content_id(&bytes),
                        bytes: Some(Arc::new(bytes)),
                    })
                })
                .await?
            }
        }
    }

    /// Registers an image (idempotent) and, when `model` is given, embeds it.
    pub async fn register(
        &self,
        source: ImageSource,
        model: Option<&Arc<Model>>,
    ) -> Result<Registered, EngineError> {
        let resolved = self.resolve(&source).await?;
        if let (Some(model), None) = (model, &resolved.bytes) {
            // Named by id: already stored; embed it under `model` if that is still to do.
            self.image_vector_of(model, resolved.id.clone()).await?;
        }
        match resolved.bytes {
            None => {
                let (store, id) = (Arc::clone(&self.store), resolved.id.clone());
                let size = blocking(move || store.image_size(&id)).await??;
                let (width, height) =
                    size.ok_or_else(|| EngineError::UnknownImage(resolved.id.clone()))?;
                Ok(Registered {
                    id: resolved.id,
                    width,
                    height,
                    new: false,
                })
            }
            Some(bytes) => {
                let cached = match model {
                    Some(m) => self.cached_vector(m, &resolved.id).await?.is_some(),
                    None => true,
                };
                let embed_with = if cached { None } else { model };
                let (registered, _) = self.ingest(embed_with, resolved.id, bytes, true).await?;
                Ok(registered)
            }
        }
    }

    /// The content id and unit vector of an image under `model`: the id is
    /// computed once, then the memory cache, the store, and last the encoder
    /// (which also registers the image).
    pub async fn image_vector(
        &self,
        model: &Arc<Model>,
        source: &ImageSource,
    ) -> Result<(String, Arc<Vec<f32>>), EngineError> {
        let resolved = self.resolve(source).await?;
        if let Some(vector) = self.cached_vector(model, &resolved.id).await? {
            return Ok((resolved.id, vector));
        }
        let id = resolved.id.clone();
        let vector = match resolved.bytes {
            Some(bytes) => self.ingest(Some(model), resolved.id, bytes, true).await?.1,
            None => self.image_vector_of(model, id.clone()).await?,
        };
        let vector =
            vector.ok_or_else(|| EngineError::Task(format!("image {id} was not embedded")))?;
        Ok((id, vector))
    }

    /// The vector of a stored image, embedding it from the store's bytes when
    /// `model` has not seen it.
    async fn image_vector_of(
        &self,
        model: &Arc<Model>,
        id: String,
    ) -> Result<Option<Arc<Vec<f32>>>, EngineError> {
        if let Some(vector) = self.cached_vector(model, &id).await? {
            return Ok(Some(vector));
        }
        let (store, key) = (Arc::clone(&self.store), id.clone());
        let bytes = blocking(move || store.image_bytes(&key))
            .await??
            .ok_or_else(|| EngineError::UnknownImage(id.clone()))?;
        Ok(self
            .ingest(Some(model), id, Arc::new(bytes), false)
            .await?
            .1)
    }

    /// Decodes once; keeps the bytes when they are new to the store
    /// (`from_request`), and embeds and keeps the vector when `model` is given.
    async fn ingest(
        &self,
        model: Option<&Arc<Model>>,
        id: String,
        bytes: Arc<Vec<u8>>,
        from_request: bool,
    ) -> Result<(Registered, Option<Arc<Vec<f32>>>), EngineError> {
        let (store, limits) = (Arc::clone(&self.store), self.image_limits);
        // The header is checked and the decode's memory reserved before any pixel is decoded.
        let header = read_header(&bytes)?;
        header.check(&limits)?;
        let _reserved = self
            .decode_budget
            .reserve(peak_bytes(
                header.width,
                header.height,
                header.decoded_bytes,
            ))
            .await?;
        let spec = model.map(|m| m.bundle.manifest.image.clone());
        let key = id.clone();
        let (width, height, new, tensor) = blocking(move || -> Result<_, EngineError> {
            let (width, height, tensor) = match &spec {
                Some(spec) => {
                    let t = tensor_from_bytes(&bytes, &limits, spec)?;
                    (t.width, t.height, Some(t.values))
                }
                None => {
                    let (w, h) = decode_rgb(&bytes, &limits)?.dimensions();
                    (w, h, None)
                }
            };
            let new = from_request && store.put_image(&key, &bytes, width, height)?;
            Ok((width, height, new, tensor))
        })
        .await??;
        let vector = match (model, tensor) {
            (Some(model), Some(tensor)) => Some(self.embed_and_keep(model, &id, tensor).await?),
            _ => None,
        };
        let registered = Registered {
            id,
            width,
            height,
            new,
        };
        Ok((registered, vector))
    }

    /// The `k` registered images nearest `query` under `model`, best first.
    pub async fn nearest_images(
        self: &Arc<Self>,
        model: &Arc<Model>,
        query: Vec<f32>,
        k: usize,
    ) -> Result<Vec<ImageHit>, EngineError> {
        let engine = Arc::clone(self);
        let digest = model.bundle.digest.clone();
        blocking(move || {
            engine
                .image_index
                .nearest(&engine.store, &digest, &query, k)
        })
        .await?
        .map_err(EngineError::from)
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

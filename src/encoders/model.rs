//! One loaded bundle: checked graphs, tokenizer, a batcher per tower, and the
//! in-memory caches of its caption and image embeddings.

use std::collections::HashMap;
use std::sync::Arc;

use ort::environment::Environment;

use super::fluency::FluencySession;
use super::towers::{open_session, ImageTower, TextTower};
use crate::batching::{BatchError, BatchObserver, BatchSettings, Batcher};
use crate::bundle::graph_check::{check_image_graph, check_text_graph};
use crate::bundle::{Bundle, BundleError};
use crate::intake::captions::{CaptionError, CaptionTokenizer, Tokens};
use crate::metrics::Registry;
use crate::scoring::FluencyHead;
use crate::store::memory::{SharedLru, DEFAULT_CAPTION_CACHE, DEFAULT_IMAGE_CACHE};

/// Captions tokenised on the async runtime's own thread when there are at
/// most this many; more go to a blocking thread so the runtime keeps answering.
const INLINE_TOKENISE_LIMIT: usize = 64;

/// Graph files at least this large run as one session with every core
/// inside it; smaller ones as one single-threaded session per core.
///
/// Measured by `bench/base_size.py` on 2 cores: the blocks toy (a few MB)
/// scores 5 to 15 % more captions/s as 2 workers x 1 thread than as 1 x 2;
/// a ViT-B/32-size CLIP (350 MB image graph, 250 MB text graph) scores 1.8x
/// the captions/s and 1.7x the images/s as 1 x 2, in half the memory, since
/// two sessions of a large graph contend for memory bandwidth and cache
/// where one session's threads share them. Between the two sizes the rule
/// is a guess (no model of that size was measured).
pub const LARGE_GRAPH_BYTES: u64 = 64 * 1024 * 1024;

/// Workers (sessions) and threads inside each, for a tower.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum ThreadLayout {
    /// As asked (`--workers`, `--intra-threads`).
    Fixed {
        workers: usize,
        intra_threads: usize,
    },
    /// By the tower's graph size over `cores` ([`LARGE_GRAPH_BYTES`]).
    BySize { cores: usize },
}

impl ThreadLayout {
    /// `(workers, intra_threads)` for a graph of `graph_bytes`.
    pub fn for_graph(self, graph_bytes: u64) -> (usize, usize) {
        match self {
            ThreadLayout::Fixed {
                workers,
                intra_threads,
            } => (workers.max(1), intra_threads.max(1)),
            ThreadLayout::BySize { cores } if graph_bytes >= LARGE_GRAPH_BYTES => (1, cores.max(1)),
            ThreadLayout::BySize { cores } => (cores.max(1), 1),
        }
    }
}

/// How a model's encoders are run.
#[derive(Debug, Clone)]
pub struct ModelSettings {
    /// Worker threads (each with its own session) and threads inside each
    /// session, per tower.
    pub layout: ThreadLayout,
    pub image_batch: BatchSettings,
    pub text_batch: BatchSettings,
    pub caption_cache: usize,
    pub image_cache: usize,
}

impl Default for ModelSettings {
    fn default() -> Self {
        ModelSettings {
            layout: ThreadLayout::Fixed {
                workers: 1,
                intra_threads: 1,
            },
            image_batch: BatchSettings {
                max_batch: 32,
                ..BatchSettings::default()
            },
            text_batch: BatchSettings {
                group_by_cost: true,
                ..BatchSettings::default()
            },
            caption_cache: DEFAULT_CAPTION_CACHE,
            image_cache: DEFAULT_IMAGE_CACHE,
        }
    }
}

/// Why a bundle could not be loaded.
#[derive(Debug, thiserror::Error)]
pub enum LoadError {
    #[error(transparent)]
    Bundle(#[from] BundleError),
    #[error("{0}")]
    Session(String),
    #[error("{path}: {cause}")]
    Tokenizer { path: String, cause: CaptionError },
}

/// Why vectors could not be produced for a request.
#[derive(Debug, thiserror::Error)]
pub enum EncodeError {
    #[error("the {tower} encoder queue is full; retry later")]
    Overloaded { tower: &'static str },
    #[error("caption {index}: {cause}")]
    Caption { index: usize, cause: CaptionError },
    #[error("the {tower} encoder failed: {message}")]
    Failed {
        tower: &'static str,
        message: String,
    },
}

/// A caption's embedding with what tokenisation said about it.
#[derive(Debug, Clone)]
pub struct CaptionVector {
    pub vector: Vec<f32>,
    pub tokens: usize,
    pub truncated: bool,
}

/// A loaded, checked bundle, ready to encode.
pub struct Model {
    pub bundle: Bundle,
    /// `NAME@VERSION`.
    pub id: String,
    tokenizer: Arc<CaptionTokenizer>,
    images: Batcher<Vec<f32>, Vec<f32>>,
    texts: Batcher<Vec<i64>, Vec<f32>>,
    /// The bundle's fluency head, when `bundle.toml` has `[fluency]`.
    fluency: Option<Arc<FluencySession>>,
    captions: SharedLru<String, CaptionVector>,
    /// Image embeddings by content id, in front of the SQLite store.
    pub image_vectors: SharedLru<String, Vec<f32>>,
    metrics: Arc<Registry>,
}

/// Reports one tower's runs and queue depth to the registry.
struct TowerMetrics {
    registry: Arc<Registry>,
    model: String,
    tower: &'static str,
}

impl BatchObserver for TowerMetrics {
    fn on_run(&self, size: usize, seconds: f64) {
        let labels = [("model", self.model.as_str()), ("tower", self.tower)];
        self.registry
            .observe("befit_encoder_batch_size", &labels, size as f64);
        self.registry
            .observe("befit_encoder_seconds", &labels, seconds);
    }
    fn on_depth(&self, depth: usize) {
        let labels = [("model", self.model.as_str()), ("tower", self.tower)];
        self.registry
            .set("befit_encoder_queue_depth", &labels, depth as f64);
    }
    fn on_abandoned(&self, jobs: usize) {
        let labels = [("model", self.model.as_str()), ("tower", self.tower)];
        self.registry
            .add("befit_encoder_abandoned_total", &labels, jobs as u64);
    }
}

impl Model {
    /// Opens the sessions, checks the graphs against `bundle.toml`, loads the
    /// tokenizer and starts the worker threads.
    pub fn load(
        bundle: Bundle,
        env: &Environment,
        settings: &ModelSettings,
        metrics: Arc<Registry>,
    ) -> Result<Model, LoadError> {
        let manifest_path = bundle.dir.join("bundle.toml");
        let m = &bundle.manifest;
        let dimension = m.model.dimension;
        let size_of = |path: &std::path::Path| std::fs::metadata(path).map_or(0, |m| m.len());
        let (image_workers, image_threads) =
            settings.layout.for_graph(size_of(&bundle.image_graph()));
        let (text_workers, text_threads) = settings.layout.for_graph(size_of(&bundle.text_graph()));
        let mut image_towers = Vec::with_capacity(image_workers);
        let mut text_towers = Vec::with_capacity(text_workers);
        for _ in 0..image_workers {
            let session = open_session(env, &bundle.image_graph(), image_threads)
                .map_err(LoadError::Session)?;
            check_image_graph(
                &manifest_path,
                &bundle.image_graph(),
                &session,
                &m.image,
                dimension,
            )?;
            image_towers.push(ImageTower {
                session,
                input: m.image.input.clone(),
                output: m.image.output.clone(),
                size: m.image.size as usize,
                dimension,
            });
        }
        for _ in 0..text_workers {
            let session = open_session(env, &bundle.text_graph(), text_threads)
                .map_err(LoadError::Session)?;
            check_text_graph(
                &manifest_path,
                &bundle.text_graph(),
                &session,
                &m.text,
                dimension,
            )?;
            text_towers.push(TextTower {
                session,
                ids_input: m.text.ids_input.clone(),
                mask_input: m.text.mask_input.clone(),
                output: m.text.output.clone(),
                pad_id: m.text.pad_id,
                padding: m.text.padding,
                max_tokens: m.text.max_tokens,
                dimension,
            });
        }
        // One session with one thread: the head is tiny and its runs short.
        let fluency = match &m.fluency {
            Some(spec) => Some(Arc::new(FluencySession::open(env, &bundle, spec, 1)?)),
            None => None,
        };
        let tokenizer =
            CaptionTokenizer::load(&bundle.tokenizer_file(), &m.text).map_err(|cause| {
                LoadError::Tokenizer {
                    path: bundle.tokenizer_file().display().to_string(),
                    cause,
                }
            })?;
        let id = bundle.id();
        let observer = |tower| -> Arc<dyn BatchObserver> {
            Arc::new(TowerMetrics {
                registry: Arc::clone(&metrics),
                model: id.clone(),
                tower,
            })
        };
        let text_batch = BatchSettings {
            group_by_cost: true,
            ..settings.text_batch
        };
        let images = Batcher::start(
            &format!("{}-image", m.model.name),
            image_towers,
            settings.image_batch,
            observer("image"),
        );
        let texts = Batcher::start(
            &format!("{}-text", m.model.name),
            text_towers,
            text_batch,
            observer("text"),
        );
        Ok(Model {
            id: id.clone(),
            bundle,
            tokenizer: Arc::new(tokenizer),
            images,
            texts,
            fluency,
            captions: SharedLru::new(settings.caption_cache),
            image_vectors: SharedLru::new(settings.image_cache),
            metrics,
        })
    }

    pub fn dimension(&self) -> usize {
        self.bundle.manifest.model.dimension
    }

    /// Tokenises one caption with this bundle's tokenizer and settings.
    pub fn tokenize(&self, caption: &str) -> Result<Tokens, CaptionError> {
        self.tokenizer.encode(caption)
    }

    /// The bundle's fluency head, when it has one.
    pub fn fluency_head(&self) -> Option<Arc<dyn FluencyHead>> {
        self.fluency
            .as_ref()
            .map(|head| Arc::clone(head) as Arc<dyn FluencyHead>)
    }

    /// The tokenizer's unknown-token id, when it has one.
    pub fn unknown_token_id(&self) -> Option<i64> {
        self.tokenizer.unknown_id()
    }

    /// Unit vectors for captions, in order; repeated and cached captions are encoded once.
    pub async fn caption_vectors(
        &self,
        captions: &[String],
    ) -> Result<Vec<Arc<CaptionVector>>, EncodeError> {
        let mut found: Vec<Option<Arc<CaptionVector>>> = Vec::with_capacity(captions.len());
        // Distinct captions that missed the cache, each with the positions that want it.
        let mut missing: HashMap<&str, Vec<usize>> = HashMap::new();
        let mut order: Vec<&str> = Vec::new();
        for (i, caption) in captions.iter().enumerate() {
            let cached = self.captions.get(caption);
            if cached.is_none() {
                let slots = missing.entry(caption.as_str()).or_default();
                if slots.is_empty() {
                    order.push(caption.as_str());
                }
                slots.push(i);
            }
            found.push(cached);
        }
        let hits = captions.len() - missing.values().map(Vec::len).sum::<usize>();
        self.metrics.add(
            "befit_cache_hits_total",
            &[("cache", "caption")],
            hits as u64,
        );
        self.metrics.add(
            "befit_cache_misses_total",
            &[("cache", "caption")],
            order.len() as u64,
        );
        if !order.is_empty() {
            let tokens = self.tokenize_all(&order, &missing).await?;
            let truncated = tokens.iter().filter(|t| t.truncated).count();
            if truncated > 0 {
                self.metrics.add(
                    "befit_captions_truncated_total",
                    &[("model", &self.id)],
                    truncated as u64,
                );
            }
            let jobs = tokens
                .iter()
                .map(|t| (t.ids.clone(), t.ids.len()))
                .collect();
            let replies = self
                .texts
                .submit_many(jobs)
                .map_err(|e| batch_error("text", e))?;
            for ((caption, tokens), reply) in order.iter().zip(tokens).zip(replies) {
                let vector = reply
                    .await
                    .map_err(|_| batch_error("text", BatchError::Closed))?
                    .map_err(|e| batch_error("text", e))?;
                let entry = Arc::new(CaptionVector {
                    vector,
                    tokens: tokens.ids.len(),
                    truncated: tokens.truncated,
                });
                self.captions.put(caption.to_string(), Arc::clone(&entry));
                for &slot in &missing[caption] {
                    found[slot] = Some(Arc::clone(&entry));
                }
            }
        }
        Ok(found
            .into_iter()
            .map(|v| v.unwrap_or_else(|| unreachable!("every slot was filled")))
            .collect())
    }

    async fn tokenize_all(
        &self,
        order: &[&str],
        slots: &HashMap<&str, Vec<usize>>,
    ) -> Result<Vec<Tokens>, EncodeError> {
        let texts: Vec<String> = order.iter().map(|s| s.to_string()).collect();
        let first_slot: Vec<usize> = order.iter().map(|c| slots[c][0]).collect();
        let tokenizer = Arc::clone(&self.tokenizer);
        let work = move || -> Result<Vec<Tokens>, EncodeError> {
            texts
                .iter()
                .zip(&first_slot)
                .map(|(t, &index)| {
                    tokenizer
                        .encode(t)
                        .map_err(|cause| EncodeError::Caption { index, cause })
                })
                .collect()
        };
        if order.len() <= INLINE_TOKENISE_LIMIT {
            work()
        } else {
            tokio::task::spawn_blocking(work)
                .await
                .map_err(|e| EncodeError::Failed {
                    tower: "text",
                    message: format!("tokeniser task failed: {e}"),
                })?
        }
    }

    /// Unit vectors for preprocessed image tensors, in order.
    pub async fn tensor_vectors(
        &self,
        tensors: Vec<Vec<f32>>,
    ) -> Result<Vec<Vec<f32>>, EncodeError> {
        let jobs = tensors.into_iter().map(|t| (t, 1)).collect();
        let replies = self
            .images
            .submit_many(jobs)
            .map_err(|e| batch_error("image", e))?;
        let mut out = Vec::with_capacity(replies.len());
        for reply in replies {
            out.push(
                reply
                    .await
                    .map_err(|_| batch_error("image", BatchError::Closed))?
                    .map_err(|e| batch_error("image", e))?,
            );
        }
        Ok(out)
    }

    /// Jobs waiting in the (image, text) queues.
    pub fn queue_depths(&self) -> (usize, usize) {
        (self.images.depth(), self.texts.depth())
    }

    /// Time both towers' queued jobs take at their recent speed (summed: the
    /// towers share the machine's cores).
    pub fn drain_time(&self) -> std::time::Duration {
        self.images.drain_time() + self.texts.drain_time()
    }
}

fn batch_error(tower: &'static str, e: BatchError) -> EncodeError {
    match e {
        BatchError::Full(_) => EncodeError::Overloaded { tower },
        BatchError::Run(message) => EncodeError::Failed { tower, message },
        BatchError::Closed => EncodeError::Failed {
            tower,
            message: "shutting down".into(),
        },
    }
}

#[cfg(test)]
mod layout_tests {
    use super::*;

    #[test]
    fn large_graphs_get_one_session_with_every_core_and_flags_win() {
        let by_size = ThreadLayout::BySize { cores: 4 };
        assert_eq!(by_size.for_graph(5 * 1024 * 1024), (4, 1));
        assert_eq!(by_size.for_graph(LARGE_GRAPH_BYTES - 1), (4, 1));
        assert_eq!(by_size.for_graph(LARGE_GRAPH_BYTES), (1, 4));
        let fixed = ThreadLayout::Fixed {
            workers: 3,
            intra_threads: 2,
        };
        assert_eq!(fixed.for_graph(LARGE_GRAPH_BYTES * 10), (3, 2));
    }
}

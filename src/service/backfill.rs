//! Embedding the bank's captions for a bundle that has not seen them: after
//! a retrain, a new bundle's caption bank would otherwise be empty. The
//! server runs it in the background at start; searches meanwhile answer from
//! what is embedded so far and say so. `befit bank embed-missing` does the
//! same offline. Stopping keeps what was committed; the next start goes on.

use std::collections::BTreeMap;
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::{Arc, Mutex};

use ndarray::Array2;
use serde::Serialize;

use crate::bank::import::{embed_missing, DEFAULT_IMPORT_BATCH};
use crate::bank::progress::EmbedReporter;
use crate::bank::{BankError, CaptionBank};
use crate::encoders::offline::ModelEmbedder;
use crate::encoders::Model;
use crate::intake::image_decode::ImageLimits;
use crate::vectors::{EmbedError, Embedder};

/// Where one bundle's backfill is.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, utoipa::ToSchema)]
#[serde(rename_all = "lowercase")]
pub enum Phase {
    Running,
    Done,
    Stopped,
    Failed,
}

/// One bundle's backfill, as `GET /v1/bank` shows it.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, utoipa::ToSchema)]
pub struct Progress {
    pub phase: Phase,
    /// Captions without a vector for the bundle when it started.
    pub missing: u64,
    pub embedded: u64,
    #[serde(skip_serializing_if = "Option::is_none")]
    pub error: Option<String>,
}

/// Every bundle's backfill, by digest; and the flag that stops them.
#[derive(Debug, Default)]
pub struct Backfills {
    by_digest: Mutex<BTreeMap<String, Progress>>,
    stop: AtomicBool,
}

impl Backfills {
    /// The backfill of `digest`, if one was needed.
    pub fn progress(&self, digest: &str) -> Option<Progress> {
        self.lock().get(digest).cloned()
    }

    /// True while `digest`'s bank is still being filled, so its answers are partial.
    pub fn partial(&self, digest: &str) -> bool {
        self.progress(digest)
            .is_some_and(|p| p.phase != Phase::Done)
    }

    /// Asks running backfills to stop after their current batch.
    pub fn stop(&self) {
        self.stop.store(true, Ordering::SeqCst);
    }

    fn lock(&self) -> std::sync::MutexGuard<'_, BTreeMap<String, Progress>> {
        self.by_digest.lock().unwrap_or_else(|p| p.into_inner())
    }

    fn update(&self, digest: &str, f: impl FnOnce(&mut Progress)) {
        if let Some(p) = self.lock().get_mut(digest) {
            f(p);
        }
    }

    /// Embeds `model`'s missing captions (blocking; run it on its own thread).
    pub fn run(
        &self,
        bank: &CaptionBank,
        model: &Arc<Model>,
        runtime: tokio::runtime::Handle,
        image_limits: ImageLimits,
    ) -> Result<(), BankError> {
        let digest = model.bundle.digest.clone();
        let missing = missing_captions(bank, &digest)?;
        if missing == 0 {
            return Ok(());
        }
        let model_bank = bank
            .loaded(&digest)
            .ok_or_else(|| BankError::NotLoaded(digest.clone()))?;
        self.lock().insert(
            digest.clone(),
            Progress {
                phase: Phase::Running,
                missing,
                embedded: 0,
                error: None,
            },
        );
        tracing::info!(model = %model.id, missing, "embedding the bank's captions for this bundle");
        let embedder = Stoppable {
            inner: ModelEmbedder {
                model: Arc::clone(model),
                runtime,
                image_limits,
            },
            stop: &self.stop,
        };
        // The bank's progress hook, as the command line's bar uses it.
        let report: &mut EmbedReporter<'_> =
            &mut |done| self.update(&digest, |p| p.embedded = done);
        let outcome = embed_missing(&model_bank, &embedder, DEFAULT_IMPORT_BATCH, report);
        let stopped = self.stop.load(Ordering::SeqCst);
        self.update(&digest, |p| match &outcome {
            Ok(n) => {
                p.embedded = *n;
                p.phase = Phase::Done;
            }
            Err(_) if stopped => p.phase = Phase::Stopped,
            Err(e) => {
                p.phase = Phase::Failed;
                p.error = Some(e.to_string());
            }
        });
        match outcome {
            Ok(n) => tracing::info!(model = %model.id, embedded = n, "bank captions embedded"),
            Err(_) if stopped => {
                tracing::info!(model = %model.id, "bank embedding stopped; it goes on at the next start")
            }
            Err(e) => {
                tracing::error!(model = %model.id, error = %e, "embedding the bank's captions failed")
            }
        }
        Ok(())
    }
}

/// Captions in the bank with no vector for `digest`.
pub fn missing_captions(bank: &CaptionBank, digest: &str) -> Result<u64, BankError> {
    let stats = bank.stats()?;
    let have = stats
        .vectors
        .iter()
        .find(|(d, _)| d == digest)
        .map_or(0, |(_, n)| *n);
    Ok(stats.captions.saturating_sub(have))
}

/// An embedder that refuses more work once asked to stop.
struct Stoppable<'a, E> {
    inner: E,
    stop: &'a AtomicBool,
}

impl<E: Embedder> Embedder for Stoppable<'_, E> {
    fn dimension(&self) -> usize {
        self.inner.dimension()
    }

    fn embed_texts(&self, texts: &[String]) -> Result<Array2<f32>, EmbedError> {
        if self.stop.load(Ordering::SeqCst) {
            return Err(EmbedError::encoder("the server is stopping"));
        }
        self.inner.embed_texts(texts)
    }

    fn embed_image_files(&self, paths: &[std::path::PathBuf]) -> Result<Array2<f32>, EmbedError> {
        self.inner.embed_image_files(paths)
    }
}

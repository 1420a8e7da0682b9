//! [`CaptionBank`]: the bank of one data dir, the store shared by every
//! bundle and the indexes of the digests loaded so far.

use std::collections::{HashMap, HashSet};
use std::path::{Path, PathBuf};
use std::sync::{Arc, RwLock};

use serde::Serialize;

use super::index::{self, DumpReport, IndexStats, LoadReport, VectorIndex};
use super::model_bank::ModelBank;
use super::store::{Caption, CaptionStore};
use super::{read, write, BankConfig, BankError, Core, RowId, BANK_FILE, INDEX_DIR};

/// Numbers for `GET /v1/bank`.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct BankStats {
    /// Distinct captions in the store.
    pub captions: u64,
    /// Size of `bank.sqlite`, in bytes.
    pub file_bytes: u64,
    /// Captions per tag.
    pub tags: Vec<(String, u64)>,
    /// Vectors stored per digest (loaded or not).
    pub vectors: Vec<(String, u64)>,
    /// One entry per loaded digest.
    pub models: Vec<IndexStats>,
}

/// The bank of one data dir: the store and the loaded digests' indexes.
/// Cheap to clone; every clone is the same bank.
#[derive(Clone)]
pub struct CaptionBank {
    core: Arc<Core>,
    index_root: PathBuf,
    models: Arc<RwLock<HashMap<String, Arc<ModelBank>>>>,
    loading: Arc<std::sync::Mutex<()>>,
    /// Set by [`CaptionBank::stop_builds`]: index builds in progress give up.
    stop: Arc<std::sync::atomic::AtomicBool>,
}

impl std::fmt::Debug for CaptionBank {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("CaptionBank")
            .field("store", &self.core.store)
            .field("models", &read(&self.models).keys().collect::<Vec<_>>())
            .finish()
    }
}

impl CaptionBank {
    /// Opens (creating if needed) `<data_dir>/bank.sqlite` and reads the tags.
    /// Indexes are loaded per digest by [`Self::model`].
    pub fn open(data_dir: &Path, config: BankConfig) -> Result<Self, BankError> {
        config.index.validate()?;
        std::fs::create_dir_all(data_dir).map_err(|source| BankError::DataDir {
            path: data_dir.to_path_buf(),
            source,
        })?;
        let store = CaptionStore::open(&data_dir.join(BANK_FILE))?;
        let mut tags: HashMap<String, HashSet<RowId>> = HashMap::new();
        for (id, tag) in store.all_tags()? {
            tags.entry(tag).or_default().insert(id);
        }
        Ok(Self {
            core: Arc::new(Core {
                store,
                config,
                tags: RwLock::new(tags),
            }),
            index_root: data_dir.join(INDEX_DIR),
            models: Arc::new(RwLock::new(HashMap::new())),
            loading: Arc::new(std::sync::Mutex::new(())),
            stop: Arc::default(),
        })
    }

    /// The bank of one bundle: loads its index from its dump (replaying rows
    /// added since) or builds it from the store, the first time a digest is
    /// asked for; later calls return the same bank and no report. Slow for
    /// large banks: call it at start, off the async runtime.
    pub fn model(
        &self,
        digest: &str,
        dimension: usize,
    ) -> Result<(Arc<ModelBank>, Option<LoadReport>), BankError> {
        if let Some(m) = self.loaded(digest) {
            return check_dimension(m, dimension).map(|m| (m, None));
        }
        index::validate_digest(digest)?;
        // One load at a time, so a digest is never loaded twice; the map
        // itself stays readable meanwhile (stats, other digests' searches).
        let _loading = self.loading.lock().unwrap_or_else(|e| e.into_inner());
        if let Some(m) = self.loaded(digest) {
            return check_dimension(m, dimension).map(|m| (m, None));
        }
        let (index, report) = VectorIndex::open_until(
            &self.index_root,
            digest,
            dimension,
            self.core.config.index,
            &self.core.store,
            &self.stop,
        )?;
        let model = Arc::new(ModelBank::new(self.core.clone(), index));
        write(&self.models).insert(digest.to_string(), model.clone());
        Ok((model, Some(report)))
    }

    /// Makes index builds in progress (and later ones) give up with
    /// [`crate::bank::index::IndexError::Stopped`]: the service is stopping,
    /// and a rebuild of minutes must not hold up its exit.
    pub fn stop_builds(&self) {
        self.stop.store(true, std::sync::atomic::Ordering::Relaxed);
    }

    /// The limits and index settings the bank was opened with.
    pub fn config(&self) -> &BankConfig {
        &self.core.config
    }

    /// The bank of a digest already loaded by [`Self::model`].
    pub fn loaded(&self, digest: &str) -> Option<Arc<ModelBank>> {
        read(&self.models).get(digest).cloned()
    }

    /// Dumps every loaded index that changed since its last dump. Call on a
    /// timer and at shutdown, off the async runtime.
    pub fn dump(&self) -> Result<Vec<(String, DumpReport)>, BankError> {
        let models: Vec<Arc<ModelBank>> = read(&self.models).values().cloned().collect();
        let mut out = Vec::with_capacity(models.len());
        for m in models {
            out.push((m.digest().to_string(), m.dump()?));
        }
        Ok(out)
    }

    /// The caption with this id, whatever bundles it has vectors for.
    pub fn caption(&self, id: RowId) -> Result<Option<Caption>, BankError> {
        Ok(self.core.store.captions(&[id])?.pop().flatten())
    }

    /// Numbers for `GET /v1/bank`.
    pub fn stats(&self) -> Result<BankStats, BankError> {
        let counts = self.core.store.counts()?;
        let mut models: Vec<IndexStats> = read(&self.models).values().map(|m| m.stats()).collect();
        models.sort_by(|a, b| a.digest.cmp(&b.digest));
        Ok(BankStats {
            captions: counts.captions,
            file_bytes: counts.file_bytes,
            tags: counts.tags,
            vectors: counts.vectors,
            models,
        })
    }

    /// The SQLite store (for integrity checks and maintenance).
    pub fn store(&self) -> &CaptionStore {
        &self.core.store
    }
}

fn check_dimension(m: Arc<ModelBank>, asked: usize) -> Result<Arc<ModelBank>, BankError> {
    if m.dimension() == asked {
        Ok(m)
    } else {
        Err(BankError::DimensionClash {
            digest: m.digest().to_string(),
            loaded: m.dimension(),
            asked,
        })
    }
}

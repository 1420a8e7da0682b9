//! The caption bank: captions stored once in SQLite with their tags and one
//! embedding per bundle digest, and per digest an HNSW index (with an exact
//! scan beside it) to find the captions nearest a vector.
//!
//! - [`store`]: the SQLite file, the source of truth (durable appends).
//! - [`index`]: the "row id -> vector" index, generic so registered images can
//!   use it too; [`exact`] is its exact scan, [`distance`] the graph's metric.
//! - [`dump`]: the index's crash-safe folder on disk, loaded at start.
//! - [`import`]: JSON Lines import, batched and resumable; [`progress`] draws
//!   its bar.
//! - [`recall`] and [`synthetic`]: the recall measure and seeded test banks
//!   shared by the tests and `bench/retrieval`.
//!
//! The service opens one [`CaptionBank`] under its data dir, asks it for the
//! [`ModelBank`] of each loaded bundle (loading or building that digest's
//! index), and calls [`CaptionBank::dump`] on a timer and at shutdown.

pub mod distance;
pub mod dump;
pub mod exact;
pub mod import;
pub mod index;
pub mod progress;
pub mod recall;
pub mod store;
pub mod synthetic;

use std::collections::{HashMap, HashSet};
use std::path::{Path, PathBuf};
use std::sync::{Arc, RwLock, RwLockReadGuard, RwLockWriteGuard};

use serde::Serialize;

pub use exact::Neighbour;
pub use import::{embed_missing, import_jsonl, ImportError, ImportProgress, ImportReport};
pub use index::{
    Answered, DumpReport, IndexError, IndexParams, IndexStats, LoadReport, RowSource, Search,
    SearchMode, VectorIndex,
};
pub use store::{Caption, CaptionStore, StoreError};

/// Id of a row: for the bank, a caption id (shared by every bundle).
pub type RowId = u64;

/// File name of the bank's SQLite file under the data dir.
pub const BANK_FILE: &str = "bank.sqlite";

/// Folder (under the data dir) holding one dump folder per bundle digest.
pub const INDEX_DIR: &str = "bank-index";

/// Longest caption accepted, in bytes of UTF-8: the same bound as the
/// service's `--max-caption-bytes` default.
pub const DEFAULT_MAX_CAPTION_BYTES: usize = 2048;

/// Longest tag accepted, in bytes.
pub const MAX_TAG_BYTES: usize = 128;

/// Most captions in one append.
pub const DEFAULT_MAX_APPEND: usize = 16_384;

/// Why the bank refused or failed.
#[derive(Debug, thiserror::Error)]
pub enum BankError {
    /// The SQLite store failed.
    #[error(transparent)]
    Store(#[from] StoreError),
    /// The index refused or failed.
    #[error(transparent)]
    Index(#[from] IndexError),
    /// A caption or tag that cannot be stored.
    #[error("captions[{position}]: {problem}")]
    Invalid {
        /// Position in the request.
        position: usize,
        /// What is wrong and how to fix it.
        problem: String,
    },
    /// Too many captions at once.
    #[error("{got} captions in one append, the limit is {limit}; send them in smaller requests")]
    TooMany {
        /// Captions sent.
        got: usize,
        /// The limit.
        limit: usize,
    },
    /// The bank was asked for a digest it has not loaded.
    #[error("the caption bank has no index loaded for bundle digest {0}; load that bundle first")]
    NotLoaded(String),
    /// A digest already loaded with another vector length.
    #[error("bundle digest {digest} is loaded with {loaded}-long vectors, not {asked}")]
    DimensionClash {
        /// Digest.
        digest: String,
        /// Length it was loaded with.
        loaded: usize,
        /// Length asked for.
        asked: usize,
    },
    /// The data dir could not be prepared.
    #[error("cannot create {path}: {source}; check the data dir is writable")]
    DataDir {
        /// Folder.
        path: PathBuf,
        /// The I/O error.
        #[source]
        source: std::io::Error,
    },
}

/// Bank settings; every default is a named constant.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
pub struct BankConfig {
    /// Index build and search settings.
    pub index: IndexParams,
    /// Longest caption ([`DEFAULT_MAX_CAPTION_BYTES`]).
    pub max_caption_bytes: usize,
    /// Most captions per append ([`DEFAULT_MAX_APPEND`]).
    pub max_append: usize,
}

impl Default for BankConfig {
    fn default() -> Self {
        Self {
            index: IndexParams::default(),
            max_caption_bytes: DEFAULT_MAX_CAPTION_BYTES,
            max_append: DEFAULT_MAX_APPEND,
        }
    }
}

/// A caption to add, with its vector from the bundle of the [`ModelBank`].
#[derive(Debug, Clone, PartialEq)]
pub struct NewCaption {
    /// Caption text, stored exactly as given.
    pub text: String,
    /// Optional tag (say, the data set it came from).
    pub tag: Option<String>,
    /// Its embedding (scaled to unit length before it is stored).
    pub vector: Vec<f32>,
}

/// What an append did with one caption.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
pub struct Appended {
    /// The caption's id.
    pub id: RowId,
    /// False when the bank already had this text with a vector for this
    /// bundle (nothing but the tag was added).
    pub new: bool,
}

/// One nearest-caption search.
#[derive(Debug, Clone, PartialEq, Eq, Default)]
pub struct BankQuery {
    /// Captions wanted (1 to [`index::MAX_K`]).
    pub k: usize,
    /// Search breadth; the bank's default ([`index::DEFAULT_EF_SEARCH`]) if `None`.
    pub ef_search: Option<usize>,
    /// Only captions with this tag.
    pub tag: Option<String>,
    /// Graph, exact, or by size.
    pub mode: SearchMode,
}

/// One hit of a search.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct BankHit {
    /// Caption id.
    pub id: RowId,
    /// Caption text.
    pub text: String,
    /// Its tags, sorted.
    pub tags: Vec<String>,
    /// Cosine to the query.
    pub cosine: f32,
}

/// The answer to a [`BankQuery`].
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct BankAnswer {
    /// Best first.
    pub hits: Vec<BankHit>,
    /// Graph or exact.
    pub answered: Answered,
    /// Breadth used (0 for exact).
    pub ef_search: usize,
}

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

fn read<T>(l: &RwLock<T>) -> RwLockReadGuard<'_, T> {
    l.read().unwrap_or_else(|e| e.into_inner())
}

fn write<T>(l: &RwLock<T>) -> RwLockWriteGuard<'_, T> {
    l.write().unwrap_or_else(|e| e.into_inner())
}

/// What every model's bank shares: the store and the tag sets.
struct Core {
    store: CaptionStore,
    config: BankConfig,
    tags: RwLock<HashMap<String, HashSet<RowId>>>,
}

impl Core {
    fn check_text(&self, position: usize, text: &str) -> Result<(), BankError> {
        let problem = if text.trim().is_empty() {
            Some("the caption is empty; send some text".to_string())
        } else if text.len() > self.config.max_caption_bytes {
            Some(format!(
                "the caption is {} bytes, the limit is {}; shorten it",
                text.len(),
                self.config.max_caption_bytes
            ))
        } else if text.contains('\0') {
            Some("the caption contains a NUL character; remove it".to_string())
        } else {
            None
        };
        match problem {
            Some(problem) => Err(BankError::Invalid { position, problem }),
            None => Ok(()),
        }
    }
}

/// Checks a tag: 1 to [`MAX_TAG_BYTES`] bytes, no control characters.
pub fn check_tag(tag: &str) -> Result<(), String> {
    if tag.is_empty() {
        Err("the tag is empty; leave it out instead".into())
    } else if tag.len() > MAX_TAG_BYTES {
        Err(format!(
            "the tag is {} bytes, the limit is {MAX_TAG_BYTES}",
            tag.len()
        ))
    } else if tag.chars().any(char::is_control) {
        Err("the tag contains a control character; use printable text".into())
    } else {
        Ok(())
    }
}

/// The bank of one data dir: the store and the loaded digests' indexes.
/// Cheap to clone; every clone is the same bank.
#[derive(Clone)]
pub struct CaptionBank {
    core: Arc<Core>,
    index_root: PathBuf,
    models: Arc<RwLock<HashMap<String, Arc<ModelBank>>>>,
    loading: Arc<std::sync::Mutex<()>>,
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
        let (index, report) = VectorIndex::open(
            &self.index_root,
            digest,
            dimension,
            self.core.config.index,
            &self.core.store,
        )?;
        let model = Arc::new(ModelBank {
            core: self.core.clone(),
            index,
        });
        write(&self.models).insert(digest.to_string(), model.clone());
        Ok((model, Some(report)))
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
        let mut models: Vec<IndexStats> = read(&self.models)
            .values()
            .map(|m| m.index.stats())
            .collect();
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
    if m.index.dimension() == asked {
        Ok(m)
    } else {
        Err(BankError::DimensionClash {
            digest: m.digest().to_string(),
            loaded: m.index.dimension(),
            asked,
        })
    }
}

/// The bank as seen by one bundle: append, search, look up.
pub struct ModelBank {
    core: Arc<Core>,
    index: VectorIndex,
}

impl std::fmt::Debug for ModelBank {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("ModelBank")
            .field("index", &self.index)
            .finish()
    }
}

impl ModelBank {
    /// The bundle digest.
    pub fn digest(&self) -> &str {
        self.index.digest()
    }

    /// Vector length of the bundle.
    pub fn dimension(&self) -> usize {
        self.index.dimension()
    }

    /// The index (exact and graph search on row ids, stats).
    pub fn index(&self) -> &VectorIndex {
        &self.index
    }

    /// Adds captions with their vectors in one transaction. When this returns
    /// they are on disk and found by every search. A text already in the bank
    /// is not stored again (its first vector is kept; a new tag is added).
    pub fn append(&self, captions: &[NewCaption]) -> Result<Vec<Appended>, BankError> {
        if captions.len() > self.core.config.max_append {
            return Err(BankError::TooMany {
                got: captions.len(),
                limit: self.core.config.max_append,
            });
        }
        let mut units = Vec::with_capacity(captions.len());
        for (position, c) in captions.iter().enumerate() {
            self.core.check_text(position, &c.text)?;
            if let Some(tag) = &c.tag {
                check_tag(tag).map_err(|problem| BankError::Invalid { position, problem })?;
            }
            let unit =
                index::unit_vector(&c.vector, self.dimension(), self.digest()).map_err(|e| {
                    BankError::Invalid {
                        position,
                        problem: e.to_string(),
                    }
                })?;
            units.push(unit);
        }
        let rows: Vec<store::StoreRow<'_>> = captions
            .iter()
            .zip(&units)
            .map(|(c, v)| store::StoreRow {
                text: &c.text,
                tag: c.tag.as_deref(),
                vector: Some(v),
            })
            .collect();
        self.commit(&rows)
    }

    /// Commits rows (vectors already unit length), then updates the tag sets
    /// and the index.
    fn commit(&self, rows: &[store::StoreRow<'_>]) -> Result<Vec<Appended>, BankError> {
        let stored = self.core.store.append(self.digest(), rows)?;
        {
            let mut tags = write(&self.core.tags);
            for (row, s) in rows.iter().zip(&stored) {
                if let Some(tag) = row.tag {
                    tags.entry(tag.to_string()).or_default().insert(s.id);
                }
            }
        }
        let fresh: Vec<(RowId, Vec<f32>)> = rows
            .iter()
            .zip(&stored)
            .filter(|(_, s)| s.new_vector)
            .filter_map(|(r, s)| r.vector.map(|v| (s.id, v.to_vec())))
            .collect();
        // After the commit the store has the rows; should the index fail here,
        // the next start replays them, so the append still succeeded.
        if let Err(e) = self.index.insert(&fresh) {
            tracing::error!(digest = self.digest(), error = %e, "caption index insert failed after commit");
        }
        Ok(stored
            .iter()
            .map(|s| Appended {
                id: s.id,
                new: s.new_vector,
            })
            .collect())
    }

    /// For each text: whether the bank already has it with a vector for this
    /// bundle (import skips those without embedding them again).
    pub fn has_vector(&self, texts: &[&str]) -> Result<Vec<bool>, BankError> {
        Ok(self.core.store.has_vector(self.digest(), texts)?)
    }

    /// Records tags for texts already in the bank with a vector (no embedding).
    fn add_tags(&self, rows: &[(&str, Option<&str>)]) -> Result<(), BankError> {
        let rows: Vec<store::StoreRow<'_>> = rows
            .iter()
            .filter(|(_, tag)| tag.is_some())
            .map(|(text, tag)| store::StoreRow {
                text,
                tag: *tag,
                vector: None,
            })
            .collect();
        if !rows.is_empty() {
            self.commit(&rows)?;
        }
        Ok(())
    }

    /// The captions nearest `query` (a vector of this bundle's space).
    pub fn search(&self, query: &[f32], q: &BankQuery) -> Result<BankAnswer, BankError> {
        let answer = match &q.tag {
            None => self.index.search(
                query,
                &Search {
                    k: q.k,
                    ef_search: q.ef_search,
                    mode: q.mode,
                    only: None,
                },
            )?,
            Some(tag) => {
                let tags = read(&self.core.tags);
                let empty = HashSet::new();
                let only = tags.get(tag).unwrap_or(&empty);
                self.index.search(
                    query,
                    &Search {
                        k: q.k,
                        ef_search: q.ef_search,
                        mode: q.mode,
                        only: Some(only),
                    },
                )?
            }
        };
        let ids: Vec<RowId> = answer.hits.iter().map(|h| h.id).collect();
        let captions = self.core.store.captions(&ids)?;
        let hits = answer
            .hits
            .iter()
            .zip(captions)
            .filter_map(|(h, c)| {
                c.map(|c| BankHit {
                    id: h.id,
                    text: c.text,
                    tags: c.tags,
                    cosine: h.cosine,
                })
            })
            .collect();
        Ok(BankAnswer {
            hits,
            answered: answer.answered,
            ef_search: answer.ef_search,
        })
    }

    /// The exact nearest captions (a full scan), optionally with a tag.
    pub fn exact(
        &self,
        query: &[f32],
        k: usize,
        tag: Option<&str>,
    ) -> Result<BankAnswer, BankError> {
        self.search(
            query,
            &BankQuery {
                k,
                ef_search: None,
                tag: tag.map(str::to_string),
                mode: SearchMode::Exact,
            },
        )
    }

    /// The caption with this id, if it has a vector for this bundle.
    pub fn get(&self, id: RowId) -> Result<Option<Caption>, BankError> {
        if !self.index.contains(id) {
            return Ok(None);
        }
        Ok(self.core.store.captions(&[id])?.pop().flatten())
    }

    /// Writes the index to disk if it changed (see [`VectorIndex::dump`]).
    pub fn dump(&self) -> Result<DumpReport, BankError> {
        Ok(self.index.dump()?)
    }

    /// Index numbers of this bundle.
    pub fn stats(&self) -> IndexStats {
        self.index.stats()
    }

    fn store(&self) -> &CaptionStore {
        &self.core.store
    }
}

#[cfg(test)]
mod tests;

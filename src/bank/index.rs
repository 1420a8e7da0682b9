//! A nearest-neighbour index over "row id -> unit vector" for one bundle
//! digest: an HNSW graph (hnsw_rs) for speed, the exact matrix beside it for
//! small banks, narrow filters and ground truth, and a dump on disk so a
//! restart does not rebuild the graph.
//!
//! The index knows nothing about captions: the caption bank uses it with
//! caption ids, and the same type serves registered images (image row ids).
//! Whatever owns the rows is the source of truth; it hands them over through
//! [`RowSource`] at open, and [`VectorIndex::insert`] after each commit.
//!
//! Concurrency: searches, inserts and [`VectorIndex::dump`] take `&self`.
//! Inserts run in parallel with each other and with searches; a dump holds
//! back inserts (not searches) while hnsw_rs writes its files, because
//! hnsw_rs's dump holds its point table locked for reading, and an insert
//! waiting on that lock would in turn stall every search (parking_lot locks
//! are fair).

use std::collections::HashSet;
use std::panic::{catch_unwind, AssertUnwindSafe};
use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicBool, AtomicU64, AtomicUsize, Ordering};
use std::sync::{Mutex, RwLock, RwLockReadGuard, RwLockWriteGuard};
use std::time::Instant;

use hnsw_rs::api::AnnT;
use hnsw_rs::hnsw::Hnsw;
use hnsw_rs::hnswio::HnswIo;
use serde::Serialize;

use super::distance::{cosine_from_distance, ClampedDot};
use super::dump::{self, Expected, Manifest};
use super::exact::{best_first, ExactRows, Neighbour};
use super::RowId;

/// HNSW `M`: links per node on the upper layers (twice that on layer 0).
/// 16 is hnswlib's and the HNSW paper's usual value for low-dimensional data
/// (Malkov and Yashunin 2018, section 4.3 recommend 5 to 48).
pub const DEFAULT_MAX_CONNECTIONS: usize = 16;

/// HNSW `ef_construction`: candidates kept while linking a new node. 200 is
/// hnswlib's recommended setting; recall at search time depends on it.
pub const DEFAULT_EF_CONSTRUCTION: usize = 200;

/// Default search breadth (`ef_search`). The smallest power of two that gives
/// recall@10 >= 0.98 against the exact scan on the blocks-like 100k bank:
/// 0.984 at 256, 0.955 at 128 (measured in `bench/retrieval`, BENCHMARKS.md).
pub const DEFAULT_EF_SEARCH: usize = 256;

/// Banks with at most this many rows are searched exactly in
/// [`SearchMode::Auto`]: below it the exact scan answers faster than hnsw_rs
/// at the default breadth. Measured on 64-d vectors: at 100k rows the scan
/// does 550 queries/s, the graph 200 at `ef_search` 256; the scan's cost
/// grows linearly, the graph's slowly, so they meet near 250k
/// (`bench/retrieval`, BENCHMARKS.md). Set a little below the crossover.
pub const DEFAULT_EXACT_BELOW: usize = 200_000;

/// Threads used to build or replay the graph. The service shares its machine
/// with the encoders, so the default is modest.
pub const DEFAULT_BUILD_THREADS: usize = 2;

/// Most neighbours one search may ask for.
pub const MAX_K: usize = 1_000;

/// Widest search breadth accepted.
pub const MAX_EF_SEARCH: usize = 10_000;

/// hnsw_rs refuses more than 256 links per node (by exiting the process).
const MAX_CONNECTIONS_LIMIT: usize = 128;

/// hnsw_rs can only reload a dump made with this many layers (its
/// `NB_LAYER_MAX`): the loader reads the layer count from the dump and the
/// layer generator after a reload assumes the maximum.
const HNSW_LAYERS: usize = 16;

/// A tag filter wider than this share of the bank is searched through the
/// graph with over-fetching; a narrower one is scanned exactly.
const OVERFETCH_FACTOR: f64 = 2.0;

/// Why the index refused or failed; each message says what to change.
#[derive(Debug, thiserror::Error)]
pub enum IndexError {
    /// A vector of the wrong length.
    #[error("the vector has {got} numbers but this index holds {expected}-long vectors (bundle digest {digest}); embed with that bundle")]
    Dimension {
        /// Length given.
        got: usize,
        /// Length expected.
        expected: usize,
        /// Digest of the index's bundle.
        digest: String,
    },
    /// A NaN or infinity in a vector.
    #[error("the vector has a non-finite number (NaN or infinity) at position {position}; the encoder output is broken")]
    NotFinite {
        /// First bad position.
        position: usize,
    },
    /// An all-zero vector.
    #[error("the vector is all zeros and has no direction to compare; send a non-zero vector")]
    Zero,
    /// A setting out of range.
    #[error("{name} = {value} is out of range: {rule}")]
    Setting {
        /// Setting name.
        name: &'static str,
        /// Value given.
        value: usize,
        /// The allowed range.
        rule: &'static str,
    },
    /// The digest is not a 64-hex string.
    #[error("bundle digest {0:?} is not 64 lowercase hex digits")]
    Digest(String),
    /// A row id the platform cannot index.
    #[error("row id {0} does not fit this platform's index ids")]
    RowId(RowId),
    /// Writing a dump failed.
    #[error("could not write the index dump under {path}: {source}; check that the data dir is writable and has free space")]
    DumpIo {
        /// Folder being written.
        path: PathBuf,
        /// The I/O error.
        #[source]
        source: std::io::Error,
    },
    /// hnsw_rs failed to write its files.
    #[error("hnsw_rs could not dump the index into {path}: {message}")]
    DumpFailed {
        /// Folder being written.
        path: PathBuf,
        /// What hnsw_rs said.
        message: String,
    },
    /// The row owner could not list its rows.
    #[error("could not read the rows to index: {0}")]
    Source(#[source] Box<dyn std::error::Error + Send + Sync>),
    /// hnsw_rs panicked; the index keeps serving, the log has the details.
    #[error("the HNSW library failed inside {0}; use exact search meanwhile and report this")]
    Internal(&'static str),
}

/// Build and search settings.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
pub struct IndexParams {
    /// HNSW `M` ([`DEFAULT_MAX_CONNECTIONS`]).
    pub max_connections: usize,
    /// HNSW `ef_construction` ([`DEFAULT_EF_CONSTRUCTION`]).
    pub ef_construction: usize,
    /// Search breadth when a search does not say ([`DEFAULT_EF_SEARCH`]).
    pub ef_search: usize,
    /// Exact scan in [`SearchMode::Auto`] up to this many rows ([`DEFAULT_EXACT_BELOW`]).
    pub exact_below: usize,
    /// Threads for building and replaying ([`DEFAULT_BUILD_THREADS`]).
    pub build_threads: usize,
}

impl Default for IndexParams {
    fn default() -> Self {
        Self {
            max_connections: DEFAULT_MAX_CONNECTIONS,
            ef_construction: DEFAULT_EF_CONSTRUCTION,
            ef_search: DEFAULT_EF_SEARCH,
            exact_below: DEFAULT_EXACT_BELOW,
            build_threads: DEFAULT_BUILD_THREADS,
        }
    }
}

impl IndexParams {
    /// Checks every setting is in range.
    pub fn validate(&self) -> Result<(), IndexError> {
        let check = |name, value: usize, lo: usize, hi: usize, rule| {
            if value < lo || value > hi {
                Err(IndexError::Setting { name, value, rule })
            } else {
                Ok(())
            }
        };
        check(
            "max_connections (M)",
            self.max_connections,
            2,
            MAX_CONNECTIONS_LIMIT,
            "use 2 to 128 (16 is usual)",
        )?;
        check(
            "ef_construction",
            self.ef_construction,
            1,
            10_000,
            "use 1 to 10000 (200 is usual)",
        )?;
        check(
            "ef_search",
            self.ef_search,
            1,
            MAX_EF_SEARCH,
            "use 1 to 10000",
        )?;
        check("build_threads", self.build_threads, 1, 256, "use 1 to 256")?;
        Ok(())
    }
}

/// How a search is answered.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default, Serialize, serde::Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum SearchMode {
    /// Exact below [`IndexParams::exact_below`] rows, the graph above.
    #[default]
    Auto,
    /// Always the HNSW graph (filters may still fall back to exact, see
    /// [`VectorIndex::search`]).
    Index,
    /// Always the exact scan.
    Exact,
}

/// How a search was answered, reported with its hits.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "lowercase")]
pub enum Answered {
    /// Through the HNSW graph.
    Index,
    /// By the exact scan.
    Exact,
}

/// One search.
#[derive(Debug, Clone, Copy)]
pub struct Search<'a> {
    /// Neighbours wanted, 1 to [`MAX_K`].
    pub k: usize,
    /// Search breadth; [`IndexParams::ef_search`] when `None`. Raised to `k`.
    pub ef_search: Option<usize>,
    /// Graph, exact, or chosen by size.
    pub mode: SearchMode,
    /// Only these rows may be returned (a tag filter).
    pub only: Option<&'a HashSet<RowId>>,
}

impl<'a> Search<'a> {
    /// The `k` best rows, default breadth, mode chosen by size, no filter.
    pub fn top(k: usize) -> Self {
        Self {
            k,
            ef_search: None,
            mode: SearchMode::Auto,
            only: None,
        }
    }
}

/// The hits of one search, best first.
#[derive(Debug, Clone, PartialEq)]
pub struct SearchAnswer {
    /// Best first; fewer than `k` when fewer rows match.
    pub hits: Vec<Neighbour>,
    /// Graph or exact.
    pub answered: Answered,
    /// Breadth used (0 for exact).
    pub ef_search: usize,
}

/// Whoever owns the rows: lists them so the index can be built or replayed.
pub trait RowSource {
    /// Calls `each` with every row that has a vector for `digest`.
    fn each_row(
        &self,
        digest: &str,
        each: &mut dyn FnMut(RowId, &[f32]),
    ) -> Result<(), Box<dyn std::error::Error + Send + Sync>>;
}

/// Rows in memory, for tests, benchmarks and small callers.
impl RowSource for Vec<(RowId, Vec<f32>)> {
    fn each_row(
        &self,
        _digest: &str,
        each: &mut dyn FnMut(RowId, &[f32]),
    ) -> Result<(), Box<dyn std::error::Error + Send + Sync>> {
        for (id, v) in self {
            each(*id, v);
        }
        Ok(())
    }
}

/// How the graph came to be at open.
#[derive(Debug, Clone, PartialEq, Eq, Serialize)]
#[serde(tag = "kind", rename_all = "lowercase")]
pub enum GraphOrigin {
    /// Loaded from a dump, then the rows it lacked were inserted.
    Loaded {
        /// Rows in the dump.
        dumped: usize,
        /// Rows inserted after loading.
        replayed: usize,
    },
    /// Built from every row; `reason` says why the dump was not used.
    Built {
        /// Why no dump was loaded.
        reason: String,
    },
    /// Not backed by disk.
    InMemory,
}

/// What opening an index found and did.
#[derive(Debug, Clone, PartialEq, Eq, Serialize)]
pub struct LoadReport {
    /// Rows taken from the source.
    pub rows: usize,
    /// Rows of the source whose vectors were unusable (wrong length, NaN,
    /// zero) and were left out; the first few ids are in `skipped_ids`.
    pub skipped: usize,
    /// Up to ten of the skipped ids.
    pub skipped_ids: Vec<RowId>,
    /// Dump loaded or graph built.
    pub origin: GraphOrigin,
    /// Wall time of the whole open, in milliseconds.
    pub millis: u64,
}

/// What a dump did.
#[derive(Debug, Clone, PartialEq, Eq, Serialize)]
pub struct DumpReport {
    /// Rows in the dump (0 when nothing was written).
    pub rows: usize,
    /// False when nothing had changed since the last dump, or the index is
    /// empty or in memory only.
    pub written: bool,
    /// Wall time, in milliseconds.
    pub millis: u64,
}

/// Numbers for `GET /v1/bank`.
#[derive(Debug, Clone, PartialEq, Eq, Serialize)]
pub struct IndexStats {
    /// Bundle digest.
    pub digest: String,
    /// Vector length.
    pub dimension: usize,
    /// Rows searchable exactly.
    pub rows: usize,
    /// Rows in the graph.
    pub indexed: usize,
    /// Rows in the last dump on disk.
    pub dumped_rows: usize,
    /// When the last dump was written, milliseconds since the Unix epoch.
    pub last_dump_unix_ms: Option<u64>,
    /// Settings.
    pub params: IndexParams,
}

/// Checks a vector's length and values and returns it scaled to unit length.
pub fn unit_vector(v: &[f32], dim: usize, digest: &str) -> Result<Vec<f32>, IndexError> {
    if v.len() != dim {
        return Err(IndexError::Dimension {
            got: v.len(),
            expected: dim,
            digest: digest.to_string(),
        });
    }
    if let Some(position) = v.iter().position(|x| !x.is_finite()) {
        return Err(IndexError::NotFinite { position });
    }
    let norm = v
        .iter()
        .map(|x| (*x as f64) * (*x as f64))
        .sum::<f64>()
        .sqrt();
    if norm == 0.0 || !norm.is_finite() {
        return Err(IndexError::Zero);
    }
    Ok(v.iter().map(|x| (*x as f64 / norm) as f32).collect())
}

/// Checks that a digest is 64 lowercase hex digits (it names a folder).
pub fn validate_digest(digest: &str) -> Result<(), IndexError> {
    if digest.len() == 64
        && digest
            .bytes()
            .all(|b| b.is_ascii_digit() || (b'a'..=b'f').contains(&b))
    {
        Ok(())
    } else {
        Err(IndexError::Digest(digest.to_string()))
    }
}

fn read<T>(l: &RwLock<T>) -> RwLockReadGuard<'_, T> {
    l.read().unwrap_or_else(|e| e.into_inner())
}

fn write<T>(l: &RwLock<T>) -> RwLockWriteGuard<'_, T> {
    l.write().unwrap_or_else(|e| e.into_inner())
}

type Graph = Hnsw<'static, f32, ClampedDot>;

/// The index of one digest. See the module docs.
pub struct VectorIndex {
    digest: String,
    dim: usize,
    params: IndexParams,
    /// `<root>/<digest>`, or `None` in memory.
    dir: Option<PathBuf>,
    graph: Graph,
    rows: RwLock<ExactRows>,
    /// Inserts share it, a dump takes it alone (see the module docs).
    gate: RwLock<()>,
    indexed: AtomicUsize,
    max_indexed: AtomicU64,
    any_indexed: AtomicBool,
    /// Bumped by every insert; a dump records the value it saw.
    generation: AtomicU64,
    dumped: Mutex<DumpState>,
}

#[derive(Debug, Default, Clone, Copy)]
struct DumpState {
    generation: u64,
    rows: usize,
    at_unix_ms: Option<u64>,
}

impl std::fmt::Debug for VectorIndex {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("VectorIndex")
            .field("digest", &self.digest)
            .field("dim", &self.dim)
            .field("rows", &read(&self.rows).len())
            .finish()
    }
}

fn new_graph(params: &IndexParams, capacity: usize) -> Graph {
    Hnsw::new(
        params.max_connections,
        capacity.max(1),
        HNSW_LAYERS,
        params.ef_construction,
        ClampedDot,
    )
}

fn distance_name() -> String {
    std::any::type_name::<ClampedDot>().to_string()
}

impl VectorIndex {
    /// An empty index kept only in memory ([`Self::dump`] writes nothing).
    pub fn in_memory(
        digest: &str,
        dimension: usize,
        params: IndexParams,
    ) -> Result<Self, IndexError> {
        validate_digest(digest)?;
        params.validate()?;
        if dimension == 0 {
            return Err(IndexError::Setting {
                name: "dimension",
                value: 0,
                rule: "vectors need at least one number",
            });
        }
        Ok(Self::assemble(
            digest,
            dimension,
            params,
            None,
            new_graph(&params, 1),
            ExactRows::new(dimension),
        ))
    }

    fn assemble(
        digest: &str,
        dim: usize,
        params: IndexParams,
        dir: Option<PathBuf>,
        graph: Graph,
        rows: ExactRows,
    ) -> Self {
        Self {
            digest: digest.to_string(),
            dim,
            params,
            dir,
            graph,
            rows: RwLock::new(rows),
            gate: RwLock::new(()),
            indexed: AtomicUsize::new(0),
            max_indexed: AtomicU64::new(0),
            any_indexed: AtomicBool::new(false),
            generation: AtomicU64::new(0),
            dumped: Mutex::new(DumpState::default()),
        }
    }

    /// Opens the index of `digest` under `root` (its dump is in
    /// `<root>/<digest>/`): reads every row from `source`, loads the dump when
    /// it checks out and inserts the rows it lacks, or builds the graph from
    /// all rows when the dump is missing, for another digest or build
    /// settings, truncated or corrupt. Can take minutes for large banks: call
    /// it off the async runtime.
    pub fn open(
        root: &Path,
        digest: &str,
        dimension: usize,
        params: IndexParams,
        source: &dyn RowSource,
    ) -> Result<(Self, LoadReport), IndexError> {
        let start = Instant::now();
        let mut index = Self::in_memory(digest, dimension, params)?;
        let dir = root.join(digest);
        std::fs::create_dir_all(&dir).map_err(|source| IndexError::DumpIo {
            path: dir.clone(),
            source,
        })?;
        dump::remove_stale(&dir, None);
        index.dir = Some(dir.clone());

        let mut rows = ExactRows::new(dimension);
        let mut skipped = 0usize;
        let mut skipped_ids = Vec::new();
        source
            .each_row(
                digest,
                &mut |id, v| match unit_vector(v, dimension, digest) {
                    Ok(u) if usize::try_from(id).is_ok() => {
                        rows.push(id, &u);
                    }
                    _ => {
                        skipped += 1;
                        if skipped_ids.len() < 10 {
                            skipped_ids.push(id);
                        }
                    }
                },
            )
            .map_err(IndexError::Source)?;

        let expected = Expected {
            digest,
            dimension,
            max_connections: params.max_connections,
            ef_construction: params.ef_construction,
            distance: &distance_name(),
        };
        let origin = match dump::check(&dir, &expected)
            .and_then(|checked| load_checked(&checked, &rows, dimension))
        {
            Ok((graph, manifest, in_dump)) => {
                index.graph = graph;
                index.indexed.store(manifest.rows, Ordering::SeqCst);
                if let Some(max) = manifest.max_row_id {
                    index.max_indexed.store(max, Ordering::SeqCst);
                    index.any_indexed.store(true, Ordering::SeqCst);
                }
                let missing: Vec<RowId> = rows
                    .ids()
                    .iter()
                    .copied()
                    .filter(|id| !in_dump.contains(id))
                    .collect();
                *index.rows.get_mut().unwrap_or_else(|e| e.into_inner()) = rows;
                index.insert_into_graph(&missing)?;
                *index.dumped.get_mut().unwrap_or_else(|e| e.into_inner()) = DumpState {
                    generation: if missing.is_empty() { 0 } else { u64::MAX },
                    rows: manifest.rows,
                    at_unix_ms: Some(manifest.written_at_unix_ms),
                };
                GraphOrigin::Loaded {
                    dumped: manifest.rows,
                    replayed: missing.len(),
                }
            }
            Err(reason) => {
                index.graph = new_graph(&params, rows.len());
                let all: Vec<RowId> = rows.ids().to_vec();
                *index.rows.get_mut().unwrap_or_else(|e| e.into_inner()) = rows;
                index.insert_into_graph(&all)?;
                if !all.is_empty() {
                    // Nothing on disk matches: the next dump must write.
                    index
                        .dumped
                        .get_mut()
                        .unwrap_or_else(|e| e.into_inner())
                        .generation = u64::MAX;
                }
                GraphOrigin::Built { reason }
            }
        };
        let report = LoadReport {
            rows: index.len(),
            skipped,
            skipped_ids,
            origin,
            millis: start.elapsed().as_millis() as u64,
        };
        Ok((index, report))
    }

    /// Bundle digest.
    pub fn digest(&self) -> &str {
        &self.digest
    }

    /// Vector length.
    pub fn dimension(&self) -> usize {
        self.dim
    }

    /// Settings.
    pub fn params(&self) -> &IndexParams {
        &self.params
    }

    /// Rows searchable (exactly; the graph has them once their insert returns).
    pub fn len(&self) -> usize {
        read(&self.rows).len()
    }

    /// True when there are no rows.
    pub fn is_empty(&self) -> bool {
        self.len() == 0
    }

    /// Whether row `id` is in the index.
    pub fn contains(&self, id: RowId) -> bool {
        read(&self.rows).contains(id)
    }

    /// The stored (unit) vector of row `id`.
    pub fn vector(&self, id: RowId) -> Option<Vec<f32>> {
        read(&self.rows).vector(id).map(<[f32]>::to_vec)
    }

    /// Adds rows (after their commit in the source of truth): first to the
    /// exact matrix, then to the graph, in parallel when there are many.
    /// Rows already present are skipped. Returns how many were new.
    pub fn insert(&self, rows: &[(RowId, Vec<f32>)]) -> Result<usize, IndexError> {
        let mut checked = Vec::with_capacity(rows.len());
        for (id, v) in rows {
            usize::try_from(*id).map_err(|_| IndexError::RowId(*id))?;
            checked.push((*id, unit_vector(v, self.dim, &self.digest)?));
        }
        let mut fresh = Vec::with_capacity(checked.len());
        {
            let mut matrix = write(&self.rows);
            matrix.reserve(checked.len());
            for (id, v) in &checked {
                if matrix.push(*id, v) {
                    fresh.push(*id);
                }
            }
        }
        self.insert_into_graph(&fresh)?;
        Ok(fresh.len())
    }

    /// Inserts rows already in the matrix into the graph.
    fn insert_into_graph(&self, ids: &[RowId]) -> Result<(), IndexError> {
        if ids.is_empty() {
            return Ok(());
        }
        let _shared = read(&self.gate);
        let matrix = read(&self.rows);
        let threads = self.params.build_threads.min(ids.len().div_ceil(64)).max(1);
        let next = AtomicUsize::new(0);
        let failed = AtomicBool::new(false);
        let work = || loop {
            let i = next.fetch_add(1, Ordering::Relaxed);
            let Some(id) = ids.get(i) else { break };
            let Some(v) = matrix.vector(*id) else {
                continue;
            };
            // Checked in insert/open: ids fit a usize.
            let data_id = *id as usize;
            if catch_unwind(AssertUnwindSafe(|| self.graph.insert_slice((v, data_id)))).is_err() {
                failed.store(true, Ordering::SeqCst);
                break;
            }
            self.indexed.fetch_add(1, Ordering::SeqCst);
            self.max_indexed.fetch_max(*id, Ordering::SeqCst);
            self.any_indexed.store(true, Ordering::SeqCst);
        };
        if threads == 1 {
            work();
        } else {
            std::thread::scope(|s| {
                for _ in 0..threads {
                    s.spawn(work);
                }
            });
        }
        self.generation.fetch_add(1, Ordering::SeqCst);
        if failed.load(Ordering::SeqCst) {
            return Err(IndexError::Internal("insert"));
        }
        Ok(())
    }

    fn check_search(
        &self,
        query: &[f32],
        search: &Search<'_>,
    ) -> Result<(Vec<f32>, usize), IndexError> {
        if search.k == 0 || search.k > MAX_K {
            return Err(IndexError::Setting {
                name: "k",
                value: search.k,
                rule: "ask for 1 to 1000 neighbours",
            });
        }
        let ef = search.ef_search.unwrap_or(self.params.ef_search);
        if ef == 0 || ef > MAX_EF_SEARCH {
            return Err(IndexError::Setting {
                name: "ef_search",
                value: ef,
                rule: "use 1 to 10000",
            });
        }
        Ok((
            unit_vector(query, self.dim, &self.digest)?,
            ef.max(search.k),
        ))
    }

    /// The nearest rows to `query` (scaled to unit length first).
    ///
    /// With a filter (`only`): a set no larger than
    /// [`IndexParams::exact_below`] is scanned exactly; a larger one is
    /// searched through the graph asking for `k * bank / set * 2` candidates,
    /// keeping those in the set, and scanned exactly if fewer than `k`
    /// survive. (hnsw_rs's own filtered search was not used: its result size
    /// varies with how the filter cuts the graph, which makes recall hard to
    /// bound; over-fetching keeps the graph search unchanged.)
    pub fn search(&self, query: &[f32], search: &Search<'_>) -> Result<SearchAnswer, IndexError> {
        let (q, ef) = self.check_search(query, search)?;
        let n = self.len();
        let exact = match search.mode {
            SearchMode::Exact => true,
            SearchMode::Auto => n <= self.params.exact_below,
            SearchMode::Index => false,
        };
        if exact {
            return Ok(self.exact_with(&q, search.k, search.only));
        }
        let Some(only) = search.only else {
            let hits = self.graph_search(&q, search.k, ef)?;
            return Ok(SearchAnswer {
                hits,
                answered: Answered::Index,
                ef_search: ef,
            });
        };
        if only.len() <= self.params.exact_below || only.is_empty() {
            return Ok(self.exact_with(&q, search.k, Some(only)));
        }
        let share = only.len() as f64 / n.max(1) as f64;
        let fetch = ((search.k as f64 / share.min(1.0)) * OVERFETCH_FACTOR).ceil() as usize;
        let fetch = fetch.clamp(search.k, n.max(search.k));
        let ef = ef.max(fetch).min(MAX_EF_SEARCH.max(fetch));
        let mut hits = self.graph_search(&q, fetch, ef)?;
        hits.retain(|h| only.contains(&h.id));
        if hits.len() < search.k.min(only.len()) {
            return Ok(self.exact_with(&q, search.k, Some(only)));
        }
        hits.truncate(search.k);
        Ok(SearchAnswer {
            hits,
            answered: Answered::Index,
            ef_search: ef,
        })
    }

    /// The exact `k` nearest rows, optionally among `only`.
    pub fn exact(
        &self,
        query: &[f32],
        k: usize,
        only: Option<&HashSet<RowId>>,
    ) -> Result<Vec<Neighbour>, IndexError> {
        let search = Search {
            k,
            ef_search: None,
            mode: SearchMode::Exact,
            only,
        };
        let (q, _) = self.check_search(query, &search)?;
        Ok(self.exact_with(&q, k, only).hits)
    }

    fn exact_with(&self, q: &[f32], k: usize, only: Option<&HashSet<RowId>>) -> SearchAnswer {
        let rows = read(&self.rows);
        let hits = match only {
            None => rows.search(q, k, None),
            // Scanning a small set row by row beats a full matrix pass.
            Some(set) if set.len().saturating_mul(4) < rows.len() => {
                rows.search_among(q, k, set.iter())
            }
            Some(set) => rows.search(q, k, Some(&|id| set.contains(&id))),
        };
        SearchAnswer {
            hits,
            answered: Answered::Exact,
            ef_search: 0,
        }
    }

    fn graph_search(&self, q: &[f32], k: usize, ef: usize) -> Result<Vec<Neighbour>, IndexError> {
        let found = catch_unwind(AssertUnwindSafe(|| self.graph.search(q, k, ef)))
            .map_err(|_| IndexError::Internal("search"))?;
        let mut hits: Vec<Neighbour> = found
            .into_iter()
            .map(|n| Neighbour {
                id: n.d_id as RowId,
                cosine: cosine_from_distance(n.distance).clamp(-1.0, 1.0),
            })
            .collect();
        hits.sort_by(best_first);
        hits.truncate(k);
        Ok(hits)
    }

    /// Writes the graph to disk if it changed since the last dump (see
    /// [`crate::bank::dump`] for the layout and why it is crash-safe). Holds
    /// back inserts, not searches, while hnsw_rs writes. Call on a timer and
    /// at shutdown, off the async runtime.
    pub fn dump(&self) -> Result<DumpReport, IndexError> {
        let start = Instant::now();
        let Some(dir) = &self.dir else {
            return Ok(DumpReport {
                rows: 0,
                written: false,
                millis: 0,
            });
        };
        let mut state = self.dumped.lock().unwrap_or_else(|e| e.into_inner());
        let exclusive = write(&self.gate);
        let generation = self.generation.load(Ordering::SeqCst);
        let rows = self.graph.get_nb_point();
        if rows == 0 || generation == state.generation {
            return Ok(DumpReport {
                rows: state.rows,
                written: false,
                millis: 0,
            });
        }
        let tmp = dump::temp_folder(dir).map_err(|source| IndexError::DumpIo {
            path: dir.clone(),
            source,
        })?;
        let written = catch_unwind(AssertUnwindSafe(|| {
            self.graph.file_dump(&tmp, dump::HNSW_BASENAME)
        }));
        let max_row_id = self
            .any_indexed
            .load(Ordering::SeqCst)
            .then(|| self.max_indexed.load(Ordering::SeqCst));
        drop(exclusive);
        let basename = match written {
            Ok(Ok(name)) => name,
            Ok(Err(e)) => {
                let _ = std::fs::remove_dir_all(&tmp);
                return Err(IndexError::DumpFailed {
                    path: tmp,
                    message: e.to_string(),
                });
            }
            Err(_) => {
                let _ = std::fs::remove_dir_all(&tmp);
                return Err(IndexError::DumpFailed {
                    path: tmp,
                    message: "it panicked".into(),
                });
            }
        };
        let manifest = Manifest {
            format: dump::MANIFEST_FORMAT,
            hnsw_rs: dump::HNSW_RS_VERSION.to_string(),
            distance: distance_name(),
            digest: self.digest.clone(),
            dimension: self.dim,
            max_connections: self.params.max_connections,
            ef_construction: self.params.ef_construction,
            rows,
            max_row_id,
            basename,
            files: Vec::new(),
            written_at_unix_ms: dump::unix_ms(),
        };
        let at = manifest.written_at_unix_ms;
        if let Err(source) = dump::publish(dir, &tmp, manifest) {
            let _ = std::fs::remove_dir_all(&tmp);
            return Err(IndexError::DumpIo {
                path: dir.clone(),
                source,
            });
        }
        *state = DumpState {
            generation,
            rows,
            at_unix_ms: Some(at),
        };
        Ok(DumpReport {
            rows,
            written: true,
            millis: start.elapsed().as_millis() as u64,
        })
    }

    /// Numbers for the stats route.
    pub fn stats(&self) -> IndexStats {
        let dumped = *self.dumped.lock().unwrap_or_else(|e| e.into_inner());
        IndexStats {
            digest: self.digest.clone(),
            dimension: self.dim,
            rows: self.len(),
            indexed: self.indexed.load(Ordering::SeqCst),
            dumped_rows: dumped.rows,
            last_dump_unix_ms: dumped.at_unix_ms,
            params: self.params,
        }
    }
}

/// Loads a dump that passed [`dump::check`] and verifies it against the rows
/// of the source: same count as the manifest, every row known with the same
/// vector, no row twice. Returns the graph and the ids it holds.
fn load_checked(
    checked: &dump::CheckedDump,
    rows: &ExactRows,
    dim: usize,
) -> Result<(Graph, Manifest, HashSet<RowId>), String> {
    let manifest = checked.manifest.clone();
    // The loaded graph borrows its loader for as long as it lives (hnsw_rs
    // ties the two for memory-mapped data, unused here). The loader is a few
    // paths and counters, leaked once per load, so the graph can be 'static.
    let loader: &'static HnswIo =
        Box::leak(Box::new(HnswIo::new(&checked.folder, &manifest.basename)));
    let loaded = catch_unwind(AssertUnwindSafe(|| {
        loader.load_hnsw_with_dist::<f32, ClampedDot>(ClampedDot)
    }));
    let mut graph: Graph = match loaded {
        Ok(Ok(g)) => g,
        Ok(Err(e)) => return Err(format!("hnsw_rs could not read the dump: {e}")),
        Err(_) => return Err("hnsw_rs failed while reading the dump".into()),
    };
    // A reloaded graph turns on candidate extension, which a built one does
    // not use: keep inserts after a reload the same as before it.
    graph.set_extend_candidates(false);
    if graph.get_nb_point() != manifest.rows {
        return Err(format!(
            "dump holds {} rows, its manifest says {}",
            graph.get_nb_point(),
            manifest.rows
        ));
    }
    let mut ids = HashSet::with_capacity(manifest.rows);
    let indexation = graph.get_point_indexation();
    for layer in 0..HNSW_LAYERS {
        // The layer iterator indexes without a bounds check; a layer that is
        // empty or absent has nothing to verify anyway.
        if indexation.get_layer_nb_point(layer) == 0 {
            continue;
        }
        for point in indexation.get_layer_iterator(layer) {
            let id = point.get_origin_id() as RowId;
            let v = point.get_v();
            if v.len() != dim {
                return Err(format!(
                    "dump row {id} has {} numbers, expected {dim}",
                    v.len()
                ));
            }
            match rows.vector(id) {
                None => {
                    return Err(format!(
                        "dump holds row {id}, which the store does not have"
                    ))
                }
                Some(stored) if stored != v => {
                    return Err(format!("dump row {id} has another vector than the store"))
                }
                Some(_) => {}
            }
            if !ids.insert(id) {
                return Err(format!("dump holds row {id} twice"));
            }
        }
    }
    if ids.len() != manifest.rows {
        return Err(format!(
            "dump lists {} rows, its manifest says {}",
            ids.len(),
            manifest.rows
        ));
    }
    Ok((graph, manifest, ids))
}

#[cfg(test)]
mod tests;

//! A nearest-neighbour index over "row id -> unit vector" for one bundle
//! digest: an HNSW graph for speed, the exact matrix beside it for small
//! banks, narrow filters and ground truth, and a dump on disk so a restart
//! does not rebuild the graph.
//!
//! The index knows nothing about captions: the caption bank uses it with
//! caption ids, and the same type serves registered images (image row ids).
//! Whatever owns the rows is the source of truth; it hands them over through
//! [`RowSource`] at open, and [`VectorIndex::insert`] after each commit.
//!
//! - [`parameters`]: settings, their defaults and bounds ([`MAX_K`],
//!   [`MAX_EF_SEARCH`]), one search's request, vector and digest checks.
//! - [`errors`]: [`IndexError`], caller faults apart from the index's own.
//! - `build`: opening (load the dump or build the graph) and inserting.
//! - `search`: graph, exact and tag-filtered search.
//! - `persistence`: writing the dump and checking one before it is used.
//! - `graph`: the [`IndexBackend`] choice and the trait every graph library
//!   implements; `hnsw`: the one file that calls hnsw_rs, `usearch_graph`
//!   the one that calls usearch.
//! - `flat_graph`: a frozen flat copy of a usearch graph laid out for
//!   searching ([`VectorIndex::freeze`]), its level-0 links strengthened by
//!   `flat_links` so no node is left unreachable; `frozen`: when the copy is made
//!   and renewed, and searches through it with the exact scan of the rows
//!   it does not hold yet.
//!
//! Concurrency: searches, inserts and [`VectorIndex::dump`] take `&self`.
//! Inserts run in parallel with each other and with searches; a dump holds
//! back inserts (not searches) while hnsw_rs writes its files, because
//! hnsw_rs's dump holds its point table locked for reading, and an insert
//! waiting on that lock would in turn stall every search (parking_lot locks
//! are fair).

mod build;
pub mod errors;
mod flat_graph;
mod flat_links;
mod frozen;
mod graph;
mod hnsw;
pub mod parameters;
mod persistence;
mod search;
mod usearch_graph;

use std::path::PathBuf;
use std::sync::atomic::{AtomicBool, AtomicU64, AtomicUsize, Ordering};
use std::sync::{Arc, Mutex, RwLock, RwLockReadGuard, RwLockWriteGuard};

use serde::Serialize;

pub use build::{GraphOrigin, LoadReport, RowSource};
pub use errors::IndexError;
pub use flat_graph::{FlatGraph, FreezeError};
pub use graph::{IndexBackend, LibraryMemory};
pub use parameters::{
    check_query_count, check_search_bounds, unit_vector, validate_digest, IndexParams, Search,
    SearchMode, DEFAULT_BUILD_THREADS, DEFAULT_EF_CONSTRUCTION, DEFAULT_EF_SEARCH,
    DEFAULT_EXACT_BELOW, DEFAULT_MAX_CONNECTIONS, HNSW_RS_EXACT_BELOW, MAX_EF_SEARCH, MAX_K,
    MAX_QUERIES, USEARCH_EXACT_BELOW,
};
pub use persistence::DumpReport;
pub use search::{Answered, FilterWalk, SearchAnswer};

use super::exact::ExactRows;
use super::RowId;
use graph::Graph;
use persistence::DumpState;

/// The dimension [`IndexParams::exact_below`] is counted in.
pub const THRESHOLD_DIMENSION: usize = 64;

/// Numbers for `GET /v1/bank`.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, utoipa::ToSchema)]
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
    /// Banks up to this many rows are scanned exactly in auto mode:
    /// `params.exact_below` scaled to this dimension
    /// ([`VectorIndex::exact_below_rows`]).
    pub exact_below_rows: usize,
}

/// Bytes the index holds in memory, by part (docs/bank.md says what each
/// part is for).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
pub struct IndexMemory {
    /// The exact matrix: vectors, row ids and the id-to-position map.
    pub exact_rows: usize,
    /// The graph library's own count, when it gives one (usearch does,
    /// hnsw_rs does not).
    pub library: Option<LibraryMemory>,
    /// The flat copy searches go through (0 without one).
    pub copy: usize,
}

fn read<T>(l: &RwLock<T>) -> RwLockReadGuard<'_, T> {
    l.read().unwrap_or_else(|e| e.into_inner())
}

fn write<T>(l: &RwLock<T>) -> RwLockWriteGuard<'_, T> {
    l.write().unwrap_or_else(|e| e.into_inner())
}

/// The index of one digest. See the module docs.
pub struct VectorIndex {
    digest: String,
    dim: usize,
    params: IndexParams,
    /// `<root>/<digest>`, or `None` in memory.
    dir: Option<PathBuf>,
    graph: Box<dyn Graph>,
    rows: RwLock<ExactRows>,
    /// Inserts share it, a dump takes it alone (see the module docs).
    gate: RwLock<()>,
    indexed: AtomicUsize,
    max_indexed: AtomicU64,
    any_indexed: AtomicBool,
    /// Bumped by every insert; a dump records the value it saw.
    generation: AtomicU64,
    dumped: Mutex<DumpState>,
    /// The flat copy searches go through, when the backend makes one.
    frozen: RwLock<Option<Arc<frozen::Frozen>>>,
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

impl VectorIndex {
    /// An empty index kept only in memory ([`Self::dump`] writes nothing).
    pub fn in_memory(
        digest: &str,
        dimension: usize,
        params: IndexParams,
    ) -> Result<Self, IndexError> {
        validate_digest(digest)?;
        params.validate()?;
        parameters::check_dimension(dimension)?;
        Ok(Self {
            digest: digest.to_string(),
            dim: dimension,
            params,
            dir: None,
            graph: params.backend.new_graph(&params, dimension, 1)?,
            rows: RwLock::new(ExactRows::new(dimension)),
            gate: RwLock::new(()),
            indexed: AtomicUsize::new(0),
            max_indexed: AtomicU64::new(0),
            any_indexed: AtomicBool::new(false),
            generation: AtomicU64::new(0),
            dumped: Mutex::new(DumpState::default()),
            frozen: RwLock::new(None),
        })
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

    /// A frozen flat copy of the graph for searching ([`FlatGraph`]): rows
    /// inserted later are not in it. Inserts and searches wait while it is
    /// made. Only the usearch backend makes one.
    pub fn freeze(&self) -> Result<FlatGraph, FreezeError> {
        // Rows enter the matrix before the graph, so these cover the graph.
        let known = read(&self.rows).ids().to_vec();
        self.graph.freeze(&self.digest, &known)
    }

    /// The exact-scan threshold for this index: `params.exact_below` is in
    /// rows of 64-d vectors, and a scan of `d`-long vectors costs `d / 64`
    /// times as much per row, where the graph's search cost grows alike
    /// but starts higher. Measured with usearch's copy: the crossover lay
    /// at 2000 rows for 64-d and at 250 for 512-d (BENCHMARKS.md, "The
    /// default, and the issue's goals"), which is 2000 x 64 / d.
    pub fn exact_below_rows(&self) -> usize {
        self.params.exact_below.saturating_mul(THRESHOLD_DIMENSION) / self.dim.max(1)
    }

    /// Bytes held in memory, by part.
    pub fn memory(&self) -> IndexMemory {
        IndexMemory {
            exact_rows: read(&self.rows).heap_bytes(),
            library: self.graph.library_memory(),
            copy: self.copy().map_or(0, |f| f.copy.bytes()),
        }
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
            exact_below_rows: self.exact_below_rows(),
        }
    }
}

#[cfg(test)]
mod tests;

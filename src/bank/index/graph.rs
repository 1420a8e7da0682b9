//! What the index needs from a graph library, as one trait ([`Graph`]), and
//! the choice of library ([`IndexBackend`]): each backend is one file
//! (`hnsw.rs` for hnsw_rs, `usearch_graph.rs` for usearch) and the only file
//! that names its library. Building, searching with the exact fallback,
//! dump folders and their checks are the index's, the same for every
//! backend.

use std::path::Path;

use serde::{Deserialize, Serialize};

use super::errors::IndexError;
use super::flat_graph::{FlatGraph, FreezeError};
use super::hnsw::HnswGraph;
use super::parameters::{
    IndexParams, HNSW_RS_EXACT_BELOW, HNSW_RS_SCAN_ROWS_PER_BREADTH, USEARCH_EXACT_BELOW,
    USEARCH_SCAN_ROWS_PER_BREADTH,
};
use super::usearch_graph::UsearchGraph;
use crate::bank::distance::cosine_from_distance;
use crate::bank::exact::{best_first, Neighbour};
use crate::bank::RowId;

/// A filter on row ids for a graph search (a tag's rows).
pub(super) type RowFilter<'a> = &'a (dyn Fn(RowId) -> bool + Sync);

/// What [`Graph::each_point`] calls with each point; an error stops the walk.
pub(super) type PointVisitor<'a> = &'a mut dyn FnMut(RowId, &[f32]) -> Result<(), String>;

/// A nearest-neighbour graph over unit vectors whose point ids are row ids.
/// Every method takes `&self` and may be called from several threads at
/// once; a failure inside the library is an [`IndexError`], never a panic.
pub(super) trait Graph: Send + Sync {
    /// Makes room for `additional` more points (a hint: `insert` grows too).
    fn reserve(&self, additional: usize) -> Result<(), IndexError>;

    /// Adds one point.
    fn insert(&self, vector: &[f32], id: RowId) -> Result<(), IndexError>;

    /// The `k` nearest points at breadth `ef`, best first, cosines in
    /// `[-1, 1]`; with `only`, nearest among the points it allows (may come
    /// back short when the filter cuts the graph: the caller decides then).
    fn search(
        &self,
        q: &[f32],
        k: usize,
        ef: usize,
        only: Option<RowFilter<'_>>,
    ) -> Result<Vec<Neighbour>, IndexError>;

    /// Points in the graph.
    fn len(&self) -> usize;

    /// What the library reports it holds in memory, when it can tell.
    fn library_memory(&self) -> Option<LibraryMemory> {
        None
    }

    /// Calls `each` with every point's id and vector; stops at the first
    /// error. `known` lists the ids the caller expects: a library that
    /// cannot list its points looks those up instead (the caller then
    /// compares the count with [`Graph::len`], so an unknown point is still
    /// caught).
    fn each_point(&self, known: &[RowId], each: PointVisitor<'_>) -> Result<(), String>;

    /// Writes the graph's files into the empty folder `folder`; returns the
    /// names of the files written.
    fn write(&self, folder: &Path) -> Result<Vec<String>, String>;

    /// A flat read-only copy for searching (see [`FlatGraph`]); `known` as
    /// for [`Graph::each_point`]. Only the usearch backend makes one.
    fn freeze(&self, _digest: &str, _known: &[RowId]) -> Result<FlatGraph, FreezeError> {
        Err(FreezeError(
            "only the usearch backend's graph can be copied".into(),
        ))
    }
}

/// Bytes a graph library holds, by its own count.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
pub struct LibraryMemory {
    /// Its copies of the vectors.
    pub vectors: usize,
    /// The graph: nodes, links, levels.
    pub graph: usize,
}

/// The `k` best of a library's answer given as `(row, 1 - dot)` pairs,
/// best first, cosines clamped to `[-1, 1]` (a library's rounding can step
/// past them).
pub(super) fn best_k(found: impl Iterator<Item = (RowId, f32)>, k: usize) -> Vec<Neighbour> {
    let mut hits: Vec<Neighbour> = found
        .map(|(id, distance)| Neighbour {
            id,
            cosine: cosine_from_distance(distance).clamp(-1.0, 1.0),
        })
        .collect();
    hits.sort_by(best_first);
    hits.truncate(k);
    hits
}

/// Which library holds the graph. A dump records it and is only read by the
/// same backend; opening with another one rebuilds the graph from the rows.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default, Serialize, Deserialize, utoipa::ToSchema)]
#[serde(rename_all = "kebab-case")]
pub enum IndexBackend {
    /// hnsw_rs, pure Rust. Its graph reaches recall@10 1.0 for image queries
    /// on the blocks probe bank (`tests/integration/bank.rs`), but builds
    /// in 3.2-8.6x hnswlib's time, searches at 0.08-0.31x its queries/s and
    /// takes 3-6.6x its memory (BENCHMARKS.md, "Retrieval", "The dot
    /// kernels").
    HnswRs,
    /// usearch, C++ built with the crate, searched through a flat copy of
    /// its graph whose level-0 links are strengthened (`flat_links`): the
    /// default. Builds in 1.25-1.7x hnswlib's time and, through the copy,
    /// answers at or above hnswlib's queries/s at 100k and 1M x 64 and at
    /// 200k x 512; recall@10 0.999 on the probe bank (BENCHMARKS.md, "The
    /// default", "The dot kernels").
    #[default]
    Usearch,
}

impl IndexBackend {
    /// Every backend, for tests and the benchmark.
    pub const ALL: [Self; 2] = [Self::HnswRs, Self::Usearch];

    /// Whether searches go through a flat copy of the graph
    /// ([`super::flat_graph::FlatGraph`]): usearch's, which answered about
    /// twice as many queries a second from the copy (BENCHMARKS.md).
    pub fn makes_flat_copy(self) -> bool {
        matches!(self, Self::Usearch)
    }

    /// The name used in flags, manifests and reports.
    pub fn name(self) -> &'static str {
        match self {
            Self::HnswRs => "hnsw-rs",
            Self::Usearch => "usearch",
        }
    }

    /// The backend called `name` ([`Self::name`]).
    pub fn from_name(name: &str) -> Option<Self> {
        Self::ALL.into_iter().find(|b| b.name() == name)
    }

    /// Banks up to this many rows are scanned exactly in auto mode: where
    /// the scan stops beating this backend's graph, measured per backend.
    pub fn exact_below(self) -> usize {
        match self {
            Self::HnswRs => HNSW_RS_EXACT_BELOW,
            Self::Usearch => USEARCH_EXACT_BELOW,
        }
    }

    /// Rows of a tag the exact scan reads in the time this backend's graph
    /// search spends per unit of breadth, with the over-fetch a tag filter
    /// uses ([`super::VectorIndex::filter_exact_below`]). Measured at
    /// 100k x 64 by `bench/retrieval --filtered` (BENCHMARKS.md, "Tag
    /// filters"): where over-fetching and the scan of the tag's rows answer
    /// equally fast, `tagged^2 / (max(ef_search, 2 k) bank)`.
    pub fn scan_rows_per_breadth(self) -> f64 {
        match self {
            Self::HnswRs => HNSW_RS_SCAN_ROWS_PER_BREADTH,
            Self::Usearch => USEARCH_SCAN_ROWS_PER_BREADTH,
        }
    }

    /// Library and version whose file format its dumps are in (pinned in
    /// Cargo.toml); a dump written by another version is rebuilt.
    pub fn library(self) -> &'static str {
        match self {
            Self::HnswRs => HnswGraph::LIBRARY,
            Self::Usearch => UsearchGraph::LIBRARY,
        }
    }

    /// The distance's name, recorded in dump manifests so a dump made with
    /// another distance is rebuilt rather than read.
    pub fn distance(self) -> String {
        match self {
            Self::HnswRs => HnswGraph::distance_name(),
            Self::Usearch => UsearchGraph::distance_name(),
        }
    }

    /// Files a dump of this backend must list in its manifest (each checked
    /// against its checksum before the library reads it).
    pub fn dump_files(self) -> Vec<String> {
        match self {
            Self::HnswRs => HnswGraph::dump_files(),
            Self::Usearch => UsearchGraph::dump_files(),
        }
    }

    /// An empty graph sized for about `capacity` points.
    pub(super) fn new_graph(
        self,
        params: &IndexParams,
        dimension: usize,
        capacity: usize,
    ) -> Result<Box<dyn Graph>, IndexError> {
        Ok(match self {
            Self::HnswRs => Box::new(HnswGraph::new(params, capacity)),
            Self::Usearch => Box::new(UsearchGraph::new(params, dimension, capacity)?),
        })
    }

    /// Reads a graph written by [`Graph::write`] from a folder that passed
    /// the dump checks (the libraries trust their input).
    pub(super) fn read_graph(
        self,
        folder: &Path,
        params: &IndexParams,
        dimension: usize,
    ) -> Result<Box<dyn Graph>, String> {
        Ok(match self {
            Self::HnswRs => Box::new(HnswGraph::read(folder)?),
            Self::Usearch => Box::new(UsearchGraph::read(folder, params, dimension)?),
        })
    }
}

impl std::fmt::Display for IndexBackend {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.write_str(self.name())
    }
}

//! The index's settings and bounds: build and search defaults, the limits a
//! search keeps to ([`MAX_K`], [`MAX_EF_SEARCH`], defined here and nowhere
//! else), what one search asks for, and the checks of vectors and digests
//! before anything reaches the graph.

use std::collections::HashSet;

use serde::Serialize;

use super::errors::IndexError;
use super::graph::IndexBackend;
use crate::bank::RowId;

/// HNSW `M`: links per node on the upper layers (twice that on layer 0).
/// 16 is the default of hnswlib's Python `init_index(max_elements,
/// ef_construction = 200, M = 16, ...)` (hnswlib README, "short API
/// description"); hnswlib's ALGO_PARAMS.md calls 12 to 48 "ok for the most of
/// the use cases", and Malkov and Yashunin 2018 ("Efficient and robust
/// approximate nearest neighbor search using Hierarchical Navigable Small
/// World graphs", IEEE TPAMI) recommend 5 to 48 (the section number is from
/// memory, not checked).
pub const DEFAULT_MAX_CONNECTIONS: usize = 16;

/// HNSW `ef_construction`: candidates kept while linking a new node. 200 is
/// the default of hnswlib's Python `init_index` (hnswlib README, "short API
/// description"). hnswlib's ALGO_PARAMS.md gives no fixed value, only a
/// check: recall of an `M`-nearest search with `ef = ef_construction` should
/// be at least 0.9. Recall at search time depends on it.
pub const DEFAULT_EF_CONSTRUCTION: usize = 200;

/// Default search breadth (`ef_search`). The smallest power of two that gives
/// recall@10 >= 0.98 against the exact scan on the blocks-like 100k bank:
/// 0.984 at 256, 0.955 at 128 (measured in `bench/retrieval`, BENCHMARKS.md).
pub const DEFAULT_EF_SEARCH: usize = 256;

/// Banks with at most this many rows are searched exactly in
/// [`SearchMode::Auto`] with the hnsw-rs backend: below it the exact scan
/// answers faster than hnsw_rs at the default breadth. Measured on 64-d
/// vectors: at 100k rows the scan does 550 queries/s, the graph 200 at
/// `ef_search` 256; the scan's cost grows linearly, the graph's slowly, so
/// they meet near 250k (`bench/retrieval`, BENCHMARKS.md). Set a little
/// below the crossover. An index of another dimension scales it by
/// `64 / dimension` as [`USEARCH_EXACT_BELOW`] was measured to scale; for
/// hnsw_rs that scaling is assumed, not measured (a 512-d bank large enough
/// to find its crossover would take hnsw_rs hours to build here).
pub const HNSW_RS_EXACT_BELOW: usize = 200_000;

/// [`HNSW_RS_EXACT_BELOW`] for the usearch backend, searched through its flat
/// copy: at `ef_search` 256 on 64-d blocks-like banks the exact scan
/// answered 42.0k queries/s and the copy 42.0k at 2000 rows, 17.6k against
/// 36.3k at 5000, and 750 against 18.5k at 100k; on 512-d ones 48.8k
/// against 53.4k at 250 rows, 13.2k against 23.3k at 1000
/// (`bench/retrieval --crossover --backend usearch --dim D`, BENCHMARKS.md).
/// Set where the two met at 64-d; scaled by `64 / dimension`, it gives the
/// 250 measured at 512-d.
pub const USEARCH_EXACT_BELOW: usize = 2_000;

/// [`IndexBackend::scan_rows_per_breadth`] of usearch's copy: at 100k x 64,
/// `ef_search` 256, over-fetching a tag of 10% (10 021 rows, breadth 2560)
/// answered 551 queries/s and the scan of its rows 1522; at 20% (breadth
/// 1280) 1043 against 739 (`bench/retrieval --filtered --backend usearch`,
/// BENCHMARKS.md, "Tag filters"). The two meet, by the ratio's logarithm
/// between those shares, at 16.8% (16 800 rows): 16 800^2 / (256 x
/// 100 000) = 11.0. (Measured with the narrower over-fetch of before, the
/// figure was 12.7.)
pub const USEARCH_SCAN_ROWS_PER_BREADTH: f64 = 11.0;

/// [`IndexBackend::scan_rows_per_breadth`] of hnsw_rs: over-fetching a
/// tag of 1% of 100k rows (breadth 2000) answered 67.6 queries/s and the
/// scan of its 1036 rows 31 k (BENCHMARKS.md, "Tag filters", the hnsw_rs
/// run): 7.4 us of graph per unit of breadth against 31 ns of scan per
/// row. Measured with the narrower over-fetch of before; the cost per
/// unit of breadth is taken to hold at the wider one (not re-measured).
/// With [`HNSW_RS_EXACT_BELOW`] (200 000) and the default breadth this
/// changes no choice below about 650k rows (200 000^2 / (256 x 240)).
pub const HNSW_RS_SCAN_ROWS_PER_BREADTH: f64 = 240.0;

/// [`IndexParams::exact_below`] of the default backend.
pub const DEFAULT_EXACT_BELOW: usize = USEARCH_EXACT_BELOW;

/// Threads used to build or replay the graph. The service shares its machine
/// with the encoders, so the default is modest.
pub const DEFAULT_BUILD_THREADS: usize = 2;

/// Most neighbours one search may ask for: a query answers a person or a
/// training loop looking at the nearest captions, not a bulk export, and the
/// answer (texts and tags) is built in memory.
pub const MAX_K: usize = 1_000;

/// Widest search breadth accepted: past a few thousand candidates a graph
/// search costs as much as the exact scan of a large bank.
pub const MAX_EF_SEARCH: usize = 10_000;

/// Most queries in one batched search. A training step asks for the
/// neighbours of a batch of images (hundreds, rarely thousands); 4096
/// queries of 512 numbers are 8 MiB of vectors, and the exact answer over
/// 1M captions is about 4096 x 1M x 512 multiply-adds (some tens of seconds
/// on one core), still inside the request timeout.
pub const MAX_QUERIES: usize = 4_096;

/// Fewest links per node: with one, a layer is a chain and search degrades.
pub const MIN_CONNECTIONS: usize = 2;

/// Most links per node: hnsw_rs refuses more than 256 (by exiting the
/// process), and layer 0 keeps twice `M`.
pub const MAX_CONNECTIONS: usize = 128;

/// Widest `ef_construction`: like [`MAX_EF_SEARCH`], beyond it building costs
/// more and adds no recall.
pub const MAX_EF_CONSTRUCTION: usize = 10_000;

/// Most build threads: more than any machine the service runs on has cores.
pub const MAX_BUILD_THREADS: usize = 256;

/// Build and search settings.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, utoipa::ToSchema)]
pub struct IndexParams {
    /// HNSW `M` ([`DEFAULT_MAX_CONNECTIONS`]).
    pub max_connections: usize,
    /// HNSW `ef_construction` ([`DEFAULT_EF_CONSTRUCTION`]).
    pub ef_construction: usize,
    /// Search breadth when a search does not say ([`DEFAULT_EF_SEARCH`]).
    pub ef_search: usize,
    /// Exact scan in [`SearchMode::Auto`] up to this many rows of 64-d
    /// vectors (by backend: [`HNSW_RS_EXACT_BELOW`], [`USEARCH_EXACT_BELOW`]);
    /// an index of another dimension scales it
    /// ([`super::VectorIndex::exact_below_rows`]).
    pub exact_below: usize,
    /// Threads for building and replaying ([`DEFAULT_BUILD_THREADS`]).
    pub build_threads: usize,
    /// The graph library ([`IndexBackend::default`]).
    pub backend: IndexBackend,
}

impl Default for IndexParams {
    fn default() -> Self {
        Self::for_backend(IndexBackend::default())
    }
}

impl IndexParams {
    /// The defaults with `backend`, and the exact-scan threshold measured
    /// for it ([`IndexBackend::exact_below`]).
    pub fn for_backend(backend: IndexBackend) -> Self {
        Self {
            max_connections: DEFAULT_MAX_CONNECTIONS,
            ef_construction: DEFAULT_EF_CONSTRUCTION,
            ef_search: DEFAULT_EF_SEARCH,
            exact_below: backend.exact_below(),
            build_threads: DEFAULT_BUILD_THREADS,
            backend,
        }
    }
}

/// Refuses `value` outside `min..=max`, naming the setting.
fn in_range(name: &'static str, value: usize, min: usize, max: usize) -> Result<(), IndexError> {
    if (min..=max).contains(&value) {
        Ok(())
    } else {
        Err(IndexError::Setting {
            name,
            value,
            min,
            max,
        })
    }
}

impl IndexParams {
    /// Checks every setting is in range.
    pub fn validate(&self) -> Result<(), IndexError> {
        in_range(
            "max_connections (M)",
            self.max_connections,
            MIN_CONNECTIONS,
            MAX_CONNECTIONS,
        )?;
        in_range(
            "ef_construction",
            self.ef_construction,
            1,
            MAX_EF_CONSTRUCTION,
        )?;
        in_range("ef_search", self.ef_search, 1, MAX_EF_SEARCH)?;
        in_range("build_threads", self.build_threads, 1, MAX_BUILD_THREADS)
    }
}

/// Checks what a search asks for: `k` from 1 to [`MAX_K`], a breadth (when
/// given) from 1 to [`MAX_EF_SEARCH`]. Every search runs it; callers that do
/// work before searching (embedding a query) run it first to fail early.
pub fn check_search_bounds(k: usize, ef_search: Option<usize>) -> Result<(), IndexError> {
    in_range("k", k, 1, MAX_K)?;
    if let Some(ef) = ef_search {
        in_range("ef_search", ef, 1, MAX_EF_SEARCH)?;
    }
    Ok(())
}

/// Checks the number of queries of a batched search (1 to [`MAX_QUERIES`]);
/// `field` names the request field that holds them.
pub fn check_query_count(field: &'static str, count: usize) -> Result<(), IndexError> {
    in_range(field, count, 1, MAX_QUERIES)
}

/// How a search is answered.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default, Serialize, serde::Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum SearchMode {
    /// Exact below [`IndexParams::exact_below`] rows, the graph above.
    #[default]
    Auto,
    /// Always the HNSW graph (filters may still fall back to exact, see
    /// [`super::VectorIndex::search`]).
    Index,
    /// Always the exact scan.
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

/// Checks a vector length for a new index.
pub(super) fn check_dimension(dimension: usize) -> Result<(), IndexError> {
    if dimension == 0 {
        Err(IndexError::ZeroDimension)
    } else {
        Ok(())
    }
}

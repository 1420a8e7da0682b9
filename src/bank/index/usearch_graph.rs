//! The HNSW graph through usearch (the `usearch` backend): the only file of
//! the index that names the library. usearch is C++ (built by its crate's
//! build script); its calls return errors as values, which become
//! [`IndexError`]s.
//!
//! Three things usearch leaves to its caller:
//! - Room: an insert past the reserved capacity fails, and reserving must not
//!   run beside inserts or searches. Calls share a lock that reserving takes
//!   alone, and inserts keep [`THREAD_SLOTS`] spare places so inserts running
//!   at once never overrun.
//! - Threads: each call borrows one of the per-thread contexts reserved with
//!   the capacity, and fails when none is free. [`THREAD_SLOTS`] contexts are
//!   reserved and a call waits for a free one instead of failing.
//! - The search breadth is a setting of the whole index, not of a call: a
//!   search at another breadth changes it with the lock held alone.

use std::path::Path;
use std::sync::{Condvar, Mutex, RwLock};

use usearch::{Index, IndexOptions, MetricKind, ScalarKind, VectorType};

use crate::bank::distance::{dot, MAX_DISTANCE};

use super::errors::IndexError;
use super::flat_graph::{FlatGraph, FreezeError, FreezeSource};
use super::graph::{best_k, Graph, LibraryMemory, PointVisitor, RowFilter};
use super::parameters::IndexParams;
use super::{read, write};
use crate::bank::exact::Neighbour;
use crate::bank::RowId;

/// Calls that may run inside usearch at once (searches and inserts). More
/// wait for a free slot. Each slot holds a search context (candidate queues
/// and a visited set, some kilobytes to a few megabytes at a million rows);
/// the service's blocking pool rarely runs more index work at once than
/// there are cores.
const THREAD_SLOTS: usize = 64;

/// The one file of a dump.
const FILE: &str = "index.usearch";

/// One usearch index over unit vectors (f32, inner product), keys the row ids.
pub(super) struct UsearchGraph {
    index: RwLock<Index>,
    slots: Slots,
}

/// A counting semaphore over usearch's per-thread contexts.
struct Slots {
    free: Mutex<usize>,
    freed: Condvar,
}

impl Slots {
    fn new() -> Self {
        Self {
            free: Mutex::new(THREAD_SLOTS),
            freed: Condvar::new(),
        }
    }

    fn take(&self) -> SlotGuard<'_> {
        let mut free = self.free.lock().unwrap_or_else(|e| e.into_inner());
        while *free == 0 {
            free = self.freed.wait(free).unwrap_or_else(|e| e.into_inner());
        }
        *free -= 1;
        SlotGuard(self)
    }
}

struct SlotGuard<'a>(&'a Slots);

impl Drop for SlotGuard<'_> {
    fn drop(&mut self) {
        *self.0.free.lock().unwrap_or_else(|e| e.into_inner()) += 1;
        self.0.freed.notify_one();
    }
}

/// Replaces usearch's inner product with the project's `dot`. usearch's
/// (numkong's `nk_dot_f32_skylake` here) widens each f32 to f64 and sums 8
/// lanes a step in one chain: in a profile of a 100k x 64 build it took 61 %
/// of the samples, 2.4 times the samples hnswlib's `InnerProductSIMD16ExtAVX512`
/// took for the same build (BENCHMARKS.md, "Where usearch's build time goes").
/// usearch keeps only the metric's kind in its file, so this is set again
/// after every load.
fn use_project_dot(index: &mut Index, dimension: usize) -> Result<(), IndexError> {
    // Through the trait: `Index::change_metric` unwraps usearch's error.
    <f32 as VectorType>::change_metric(
        index,
        Box::new(move |a: *const f32, b: *const f32| metric(a, b, dimension)),
    )
    .map_err(|_| IndexError::Internal("metric"))
}

/// `1 - dot` of two vectors usearch hands the metric. Some of its pointers
/// lack the 4-byte alignment a `&[f32]` must have (a debug build's check
/// caught one in about one run of the bank tests in two; where in usearch
/// they come from was not traced), so those are copied into aligned
/// buffers first; aligned ones are read in place. A null pointer (never
/// seen) is the largest distance.
fn metric(a: *const f32, b: *const f32, dimension: usize) -> f32 {
    if a.is_null() || b.is_null() {
        return MAX_DISTANCE;
    }
    if a.is_aligned() && b.is_aligned() {
        // SAFETY: usearch calls the metric with two of the index's vectors
        // or a query, each `dimension` f32 long (the index checks a query's
        // length before it reaches usearch); both are aligned and non-null.
        let (a, b) = unsafe {
            (
                std::slice::from_raw_parts(a, dimension),
                std::slice::from_raw_parts(b, dimension),
            )
        };
        return 1.0 - dot(a, b);
    }
    thread_local! {
        static ALIGNED: std::cell::RefCell<(Vec<f32>, Vec<f32>)> = const {
            std::cell::RefCell::new((Vec::new(), Vec::new()))
        };
    }
    ALIGNED.with_borrow_mut(|(ca, cb)| {
        for (to, from) in [(&mut *ca, a), (&mut *cb, b)] {
            to.clear();
            // SAFETY: as above, `dimension` f32 from a non-null pointer,
            // read without assuming alignment.
            to.extend((0..dimension).map(|i| unsafe { from.add(i).read_unaligned() }));
        }
        1.0 - dot(ca, cb)
    })
}

fn options(params: &IndexParams, dimension: usize) -> IndexOptions {
    IndexOptions {
        dimensions: dimension,
        // `1 - dot`, as hnsw_rs's ClampedDot: the vectors are unit length.
        metric: MetricKind::IP,
        quantization: ScalarKind::F32,
        connectivity: params.max_connections,
        expansion_add: params.ef_construction,
        expansion_search: params.ef_search,
        multi: false,
    }
}

impl UsearchGraph {
    /// The usearch release whose file format the dumps are in (pinned in
    /// Cargo.toml).
    pub(super) const LIBRARY: &'static str = "usearch 2.26.6";

    /// The distance's name (see [`super::graph::IndexBackend::distance`]).
    pub(super) fn distance_name() -> String {
        "usearch inner product (1 - dot), f32".into()
    }

    /// The one file usearch writes.
    pub(super) fn dump_files() -> Vec<String> {
        vec![FILE.to_string()]
    }

    /// An empty index with room for `capacity` points.
    pub(super) fn new(
        params: &IndexParams,
        dimension: usize,
        capacity: usize,
    ) -> Result<Self, IndexError> {
        let mut index =
            Index::new(&options(params, dimension)).map_err(|_| IndexError::Internal("create"))?;
        use_project_dot(&mut index, dimension)?;
        index
            .reserve_capacity_and_threads(capacity.max(1) + THREAD_SLOTS, THREAD_SLOTS)
            .map_err(|_| IndexError::Internal("reserve"))?;
        Ok(Self {
            index: RwLock::new(index),
            slots: Slots::new(),
        })
    }

    /// Reads the file written by [`Graph::write`] from a folder that passed
    /// the dump checks.
    pub(super) fn read(
        folder: &Path,
        params: &IndexParams,
        dimension: usize,
    ) -> Result<Self, String> {
        let path = folder.join(FILE);
        let path = path
            .to_str()
            .ok_or_else(|| format!("{} is not a UTF-8 path", path.display()))?;
        let graph = Self::new(params, dimension, 1).map_err(|e| e.to_string())?;
        {
            let mut index = write(&graph.index);
            index
                .load(path)
                .map_err(|e| format!("usearch could not read the dump: {e}"))?;
            use_project_dot(&mut index, dimension).map_err(|e| e.to_string())?;
            if index.dimensions() != dimension {
                return Err(format!(
                    "dump holds {}-long vectors, expected {dimension}",
                    index.dimensions()
                ));
            }
            // Loading sizes the index to its content and resets its limits.
            index
                .reserve_capacity_and_threads(index.size() + THREAD_SLOTS, THREAD_SLOTS)
                .map_err(|e| format!("usearch could not make room after loading: {e}"))?;
            index.change_expansion_add(params.ef_construction);
            index.change_expansion_search(params.ef_search);
        }
        Ok(graph)
    }

    /// A flat copy of the graph for searching ([`FlatGraph`]) over the
    /// points among `known` (the caller's rows; usearch cannot list its
    /// keys), made with the lock held alone so no insert changes the graph
    /// under the walk. Fails when the graph holds a point `known` does not
    /// list, or its links do not make a well-formed graph.
    fn freeze_graph(&self, digest: &str, known: &[RowId]) -> Result<FlatGraph, FreezeError> {
        let index = write(&self.index);
        let ids: Vec<RowId> = known
            .iter()
            .copied()
            .filter(|&id| index.contains(id))
            .collect();
        if ids.len() != index.size() {
            return Err(FreezeError(format!(
                "the graph holds {} points but only {} of the known rows",
                index.size(),
                ids.len()
            )));
        }
        // usearch does not expose its entry point. `FlatGraph::build` enters
        // at a node of the highest level: usearch's entry is the first node
        // that reached that level, and any node there reaches every other
        // through the links of that level and those below, so the greedy
        // descent starts as high and only its first steps differ.
        let m = index.connectivity();
        // usearch's level 0 keeps `connectivity_base` links, by default twice
        // `connectivity` (index.hpp, `index_config_t`); the Rust options do
        // not change it.
        FlatGraph::build(
            digest,
            index.dimensions(),
            2 * m,
            m,
            &ids,
            &UsearchSource(&index),
        )
    }

    /// Grows the capacity (lock held alone) when fewer than `spare` places
    /// are left.
    fn ensure_room(&self, spare: usize) -> Result<(), IndexError> {
        let short = |index: &Index| index.size() + spare > index.capacity();
        if !short(&read(&self.index)) {
            return Ok(());
        }
        let index = write(&self.index);
        if short(&index) {
            let wanted = (index.size() + spare).max(index.capacity() + index.capacity() / 2);
            index
                .reserve_capacity_and_threads(wanted, THREAD_SLOTS)
                .map_err(|_| IndexError::Internal("reserve"))?;
        }
        Ok(())
    }
}

/// usearch's graph seen node by node, for [`FlatGraph::build`].
struct UsearchSource<'a>(&'a Index);

impl FreezeSource for UsearchSource<'_> {
    fn level(&self, id: RowId) -> usize {
        self.0.level_of_key(id)
    }

    fn links(&self, id: RowId, level: usize, out: &mut Vec<RowId>) -> Result<(), String> {
        out.extend(self.0.neighbors(id, level));
        Ok(())
    }

    fn vector(&self, id: RowId, out: &mut [f32]) -> Result<(), String> {
        match self.0.get(id, out) {
            Ok(1) => Ok(()),
            Ok(n) => Err(format!("usearch holds row {id} {n} times")),
            Err(e) => Err(format!("usearch could not read row {id}: {e}")),
        }
    }
}

impl Graph for UsearchGraph {
    fn reserve(&self, additional: usize) -> Result<(), IndexError> {
        self.ensure_room(additional + THREAD_SLOTS)
    }

    fn insert(&self, vector: &[f32], id: RowId) -> Result<(), IndexError> {
        self.ensure_room(THREAD_SLOTS)?;
        let _slot = self.slots.take();
        read(&self.index)
            .add(id, vector)
            .map_err(|_| IndexError::Internal("insert"))
    }

    fn search(
        &self,
        q: &[f32],
        k: usize,
        ef: usize,
        only: Option<RowFilter<'_>>,
    ) -> Result<Vec<Neighbour>, IndexError> {
        let _slot = self.slots.take();
        let mut index = read(&self.index);
        if index.expansion_search() != ef {
            drop(index);
            write(&self.index).change_expansion_search(ef);
            index = read(&self.index);
        }
        let found = match only {
            None => index.search(q, k),
            Some(allowed) => index.filtered_search(q, k, allowed),
        }
        .map_err(|_| IndexError::Internal("search"))?;
        // usearch's inner-product distance is `1 - dot`, as ClampedDot's.
        Ok(best_k(
            found
                .keys
                .iter()
                .copied()
                .zip(found.distances.iter().copied()),
            k,
        ))
    }

    fn len(&self) -> usize {
        read(&self.index).size()
    }

    /// By usearch's own count (`memory_usage`, which it calls a lower bound
    /// within 10 %, and its allocator tapes): the vectors' tape, and the
    /// rest (node tape, node table, search contexts). The part of each tape
    /// reserved for growth and not yet written is left out: it is mapped
    /// but not resident until used.
    fn library_memory(&self) -> Option<LibraryMemory> {
        let index = read(&self.index);
        let tapes = index.memory_stats();
        let vectors = tapes
            .vectors_allocated
            .saturating_sub(tapes.vectors_reserved);
        let graph = index
            .memory_usage()
            .saturating_sub(tapes.vectors_allocated)
            .saturating_sub(tapes.graph_reserved);
        Some(LibraryMemory { vectors, graph })
    }

    /// usearch cannot list its keys: looks up each of `known`.
    fn each_point(&self, known: &[RowId], each: PointVisitor<'_>) -> Result<(), String> {
        let index = read(&self.index);
        let mut v = vec![0f32; index.dimensions()];
        for &id in known {
            if !index.contains(id) {
                continue;
            }
            match index.get(id, &mut v) {
                Ok(1) => each(id, &v)?,
                Ok(n) => return Err(format!("dump holds row {id} {n} times")),
                Err(e) => return Err(format!("usearch could not read row {id}: {e}")),
            }
        }
        Ok(())
    }

    fn freeze(&self, digest: &str, known: &[RowId]) -> Result<FlatGraph, FreezeError> {
        self.freeze_graph(digest, known)
    }

    fn write(&self, folder: &Path) -> Result<Vec<String>, String> {
        let path = folder.join(FILE);
        let path = path
            .to_str()
            .ok_or_else(|| format!("{} is not a UTF-8 path", path.display()))?;
        read(&self.index)
            .save(path)
            .map_err(|e| format!("usearch could not write its file: {e}"))?;
        Ok(Self::dump_files())
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn the_metric_reads_unaligned_and_null_vectors() {
        let a: Vec<f32> = (0..70).map(|i| ((i * 7 % 13) as f32 - 6.0) / 9.0).collect();
        let b: Vec<f32> = (0..70).map(|i| ((i * 5 % 11) as f32 - 5.0) / 7.0).collect();
        // Reference: the dot product in f64 over the same floats.
        let want = 1.0
            - a.iter()
                .zip(&b)
                .map(|(x, y)| f64::from(*x) * f64::from(*y))
                .sum::<f64>();
        // The same floats one byte past an aligned start.
        let mut bytes = vec![0u8; 1 + 4 * a.len()];
        for (i, x) in a.iter().enumerate() {
            bytes[1 + 4 * i..5 + 4 * i].copy_from_slice(&x.to_ne_bytes());
        }
        let shifted = bytes[1..].as_ptr().cast::<f32>();
        assert!(!shifted.is_aligned());
        for (x, y) in [
            (shifted, b.as_ptr()),
            (b.as_ptr(), shifted),
            (a.as_ptr(), b.as_ptr()),
        ] {
            let got = f64::from(metric(x, y, a.len()));
            assert!((got - want).abs() < 1e-5, "{got} against {want}");
        }
        assert_eq!(metric(std::ptr::null(), b.as_ptr(), 70), MAX_DISTANCE);
    }
}

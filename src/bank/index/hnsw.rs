//! The HNSW graph, through hnsw_rs: the only file of the index that names the
//! library. [`HnswGraph`] offers what the index needs from a graph (insert,
//! search, count, write to a folder, read back, list its points), each call
//! guarded so a panic inside the library becomes an [`IndexError`] and never
//! takes the service down. Another graph library would go beside this file
//! with the same methods.

use std::panic::{catch_unwind, AssertUnwindSafe};
use std::path::Path;

use hnsw_rs::api::AnnT;
use hnsw_rs::filter::FilterT;
use hnsw_rs::hnsw::Hnsw;
use hnsw_rs::hnswio::HnswIo;

use super::errors::IndexError;
use super::parameters::IndexParams;
use crate::bank::distance::{cosine_from_distance, ClampedDot};
use crate::bank::exact::{best_first, Neighbour};
use crate::bank::RowId;

/// hnsw_rs can only reload a dump made with this many layers (its
/// `NB_LAYER_MAX`): the loader reads the layer count from the dump and the
/// layer generator after a reload assumes the maximum.
const HNSW_LAYERS: usize = 16;

type Graph = Hnsw<'static, f32, ClampedDot>;

/// One hnsw_rs graph over unit vectors, its point ids the row ids.
pub(super) struct HnswGraph {
    graph: Graph,
}

impl HnswGraph {
    /// An empty graph sized for about `capacity` points.
    pub(super) fn new(params: &IndexParams, capacity: usize) -> Self {
        Self {
            graph: Hnsw::new(
                params.max_connections,
                capacity.max(1),
                HNSW_LAYERS,
                params.ef_construction,
                ClampedDot,
            ),
        }
    }

    /// The distance's name, recorded in dump manifests so a dump made with
    /// another distance is rebuilt rather than read.
    pub(super) fn distance_name() -> String {
        std::any::type_name::<ClampedDot>().to_string()
    }

    /// Adds one point. Safe to call from several threads at once.
    pub(super) fn insert(&self, vector: &[f32], id: RowId) -> Result<(), IndexError> {
        // Checked when rows enter the index: ids fit a usize.
        let data_id = id as usize;
        catch_unwind(AssertUnwindSafe(|| {
            self.graph.insert_slice((vector, data_id))
        }))
        .map_err(|_| IndexError::Internal("insert"))
    }

    /// The `k` nearest points at breadth `ef`, best first; with `only`, the
    /// `k` nearest of those points the filter allows, found by walking the
    /// whole graph and keeping only allowed points among the `ef` best
    /// (hnsw_rs's filtered search). A filtered walk can return fewer than
    /// `k` when the filter cuts the graph; the caller decides what then.
    pub(super) fn search(
        &self,
        q: &[f32],
        k: usize,
        ef: usize,
        only: Option<&(dyn Fn(RowId) -> bool + Sync)>,
    ) -> Result<Vec<Neighbour>, IndexError> {
        let allowed = only.map(|f| move |id: &usize| f(*id as RowId));
        let filter = allowed.as_ref().map(|f| f as &dyn FilterT);
        let found = catch_unwind(AssertUnwindSafe(|| {
            self.graph.search_filter(q, k, ef, filter)
        }))
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

    /// Points in the graph.
    pub(super) fn len(&self) -> usize {
        self.graph.get_nb_point()
    }

    /// Writes the graph's files into `folder` under `basename`; returns the
    /// base name the library actually used.
    pub(super) fn write(&self, folder: &Path, basename: &str) -> Result<String, String> {
        match catch_unwind(AssertUnwindSafe(|| self.graph.file_dump(folder, basename))) {
            Ok(Ok(name)) => Ok(name),
            Ok(Err(e)) => Err(e.to_string()),
            Err(_) => Err("it panicked".into()),
        }
    }

    /// Reads a graph written by [`Self::write`]. The folder must have passed
    /// the dump checks first: the library trusts its input.
    pub(super) fn read(folder: &Path, basename: &str) -> Result<Self, String> {
        // The loaded graph borrows its loader for as long as it lives (hnsw_rs
        // ties the two for memory-mapped data, unused here). The loader is a
        // few paths and counters, leaked once per load, so the graph can be
        // 'static.
        let loader: &'static HnswIo = Box::leak(Box::new(HnswIo::new(folder, basename)));
        let loaded = catch_unwind(AssertUnwindSafe(|| {
            loader.load_hnsw_with_dist::<f32, ClampedDot>(ClampedDot)
        }));
        let mut graph: Graph = match loaded {
            Ok(Ok(g)) => g,
            Ok(Err(e)) => return Err(format!("hnsw_rs could not read the dump: {e}")),
            Err(_) => return Err("hnsw_rs failed while reading the dump".into()),
        };
        // A reloaded graph turns on candidate extension, which a built one
        // does not use: keep inserts after a reload the same as before it.
        graph.set_extend_candidates(false);
        Ok(Self { graph })
    }

    /// Calls `each` with every point's id and vector, layer by layer (a point
    /// sits in exactly one layer's list); stops at the first error.
    pub(super) fn each_point<E>(
        &self,
        mut each: impl FnMut(RowId, &[f32]) -> Result<(), E>,
    ) -> Result<(), E> {
        let indexation = self.graph.get_point_indexation();
        for layer in 0..HNSW_LAYERS {
            // The layer iterator indexes without a bounds check; a layer that
            // is empty or absent has nothing to list anyway.
            if indexation.get_layer_nb_point(layer) == 0 {
                continue;
            }
            for point in indexation.get_layer_iterator(layer) {
                each(point.get_origin_id() as RowId, point.get_v())?;
            }
        }
        Ok(())
    }
}

//! The HNSW graph through hnsw_rs (the `hnsw-rs` backend): the only file of
//! the index that names the library. [`HnswGraph`] implements [`Graph`],
//! each call guarded so a panic inside the library becomes an
//! [`IndexError`] and never takes the service down.

use std::panic::{catch_unwind, AssertUnwindSafe};
use std::path::Path;

use hnsw_rs::api::AnnT;
use hnsw_rs::filter::FilterT;
use hnsw_rs::hnsw::Hnsw;
use hnsw_rs::hnswio::HnswIo;

use super::errors::IndexError;
use super::graph::{best_k, Graph, PointVisitor, RowFilter};
use super::parameters::IndexParams;
use crate::bank::distance::ClampedDot;
use crate::bank::exact::Neighbour;
use crate::bank::RowId;

/// hnsw_rs can only reload a dump made with this many layers (its
/// `NB_LAYER_MAX`): the loader reads the layer count from the dump and the
/// layer generator after a reload assumes the maximum.
const HNSW_LAYERS: usize = 16;

/// Base name hnsw_rs is given for its two files in a dump folder.
const BASENAME: &str = "index";

type HnswLib = Hnsw<'static, f32, ClampedDot>;

/// One hnsw_rs graph over unit vectors, its point ids the row ids.
pub(super) struct HnswGraph {
    graph: HnswLib,
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

    /// The hnsw_rs release whose file format the dumps are in (pinned in
    /// Cargo.toml).
    pub(super) const LIBRARY: &'static str = "hnsw_rs 0.3.5";

    /// The distance's name (see [`super::graph::IndexBackend::distance`]).
    pub(super) fn distance_name() -> String {
        std::any::type_name::<ClampedDot>().to_string()
    }

    /// The two files hnsw_rs writes.
    pub(super) fn dump_files() -> Vec<String> {
        vec![
            format!("{BASENAME}.hnsw.graph"),
            format!("{BASENAME}.hnsw.data"),
        ]
    }

    /// Reads a graph written by [`Graph::write`]. The folder must have passed
    /// the dump checks first: the library trusts its input.
    pub(super) fn read(folder: &Path) -> Result<Self, String> {
        // The loaded graph borrows its loader for as long as it lives (hnsw_rs
        // ties the two for memory-mapped data, unused here). The loader is a
        // few paths and counters, leaked once per load, so the graph can be
        // 'static.
        let loader: &'static HnswIo = Box::leak(Box::new(HnswIo::new(folder, BASENAME)));
        let loaded = catch_unwind(AssertUnwindSafe(|| {
            loader.load_hnsw_with_dist::<f32, ClampedDot>(ClampedDot)
        }));
        let mut graph: HnswLib = match loaded {
            Ok(Ok(g)) => g,
            Ok(Err(e)) => return Err(format!("hnsw_rs could not read the dump: {e}")),
            Err(_) => return Err("hnsw_rs failed while reading the dump".into()),
        };
        // A reloaded graph turns on candidate extension, which a built one
        // does not use: keep inserts after a reload the same as before it.
        graph.set_extend_candidates(false);
        Ok(Self { graph })
    }
}

impl Graph for HnswGraph {
    /// hnsw_rs grows its point table as it goes.
    fn reserve(&self, _additional: usize) -> Result<(), IndexError> {
        Ok(())
    }

    fn insert(&self, vector: &[f32], id: RowId) -> Result<(), IndexError> {
        // Checked when rows enter the index: ids fit a usize.
        let data_id = id as usize;
        catch_unwind(AssertUnwindSafe(|| {
            self.graph.insert_slice((vector, data_id))
        }))
        .map_err(|_| IndexError::Internal("insert"))
    }

    /// With `only`, walks the whole graph keeping only allowed points among
    /// the `ef` best (hnsw_rs's filtered search).
    fn search(
        &self,
        q: &[f32],
        k: usize,
        ef: usize,
        only: Option<RowFilter<'_>>,
    ) -> Result<Vec<Neighbour>, IndexError> {
        let allowed = only.map(|f| move |id: &usize| f(*id as RowId));
        let filter = allowed.as_ref().map(|f| f as &dyn FilterT);
        let found = catch_unwind(AssertUnwindSafe(|| {
            self.graph.search_filter(q, k, ef, filter)
        }))
        .map_err(|_| IndexError::Internal("search"))?;
        Ok(best_k(
            found.into_iter().map(|n| (n.d_id as RowId, n.distance)),
            k,
        ))
    }

    fn len(&self) -> usize {
        self.graph.get_nb_point()
    }

    fn write(&self, folder: &Path) -> Result<Vec<String>, String> {
        match catch_unwind(AssertUnwindSafe(|| self.graph.file_dump(folder, BASENAME))) {
            Ok(Ok(name)) if name == BASENAME => Ok(Self::dump_files()),
            Ok(Ok(name)) => Err(format!(
                "hnsw_rs wrote its files as {name:?}, not {BASENAME:?} (the folder was not empty)"
            )),
            Ok(Err(e)) => Err(e.to_string()),
            Err(_) => Err("it panicked".into()),
        }
    }

    /// Lists the points layer by layer (a point sits in exactly one layer's
    /// list); `known` is not needed.
    fn each_point(&self, _known: &[RowId], each: PointVisitor<'_>) -> Result<(), String> {
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

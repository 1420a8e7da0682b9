//! Filling an index: opening it from its row owner (loading the dump and
//! replaying what it lacks, or building the graph from every row) and
//! inserting rows after each commit.

use std::path::Path;
use std::sync::atomic::{AtomicBool, AtomicUsize, Ordering};
use std::time::Instant;

use serde::Serialize;

use super::parameters::{unit_vector, IndexParams};
use super::persistence::{self, DumpState};
use super::{read, write, IndexError, VectorIndex};
use crate::bank::dump::{self, Expected};
use crate::bank::exact::ExactRows;
use crate::bank::RowId;

/// Skipped ids listed in a [`LoadReport`] (all are counted).
const SKIPPED_IDS_LISTED: usize = 10;

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

impl VectorIndex {
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
        Self::open_until(
            root,
            digest,
            dimension,
            params,
            source,
            &AtomicBool::new(false),
        )
    }

    /// [`VectorIndex::open`] that gives up with [`IndexError::Stopped`] as
    /// soon as `stop` is set while it inserts rows into the graph (a service
    /// asked to stop during a rebuild of minutes).
    pub fn open_until(
        root: &Path,
        digest: &str,
        dimension: usize,
        params: IndexParams,
        source: &dyn RowSource,
        stop: &AtomicBool,
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
                        if skipped_ids.len() < SKIPPED_IDS_LISTED {
                            skipped_ids.push(id);
                        }
                    }
                },
            )
            .map_err(IndexError::Source)?;

        let backend = params.backend;
        let files = backend.dump_files();
        let expected = Expected {
            backend: backend.name(),
            library: backend.library(),
            files: &files,
            digest,
            dimension,
            max_connections: params.max_connections,
            ef_construction: params.ef_construction,
            distance: &backend.distance(),
        };
        let origin = match dump::check(&dir, &expected)
            .and_then(|checked| persistence::load_checked(&checked, &rows, &params, dimension))
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
                index.insert_into_graph(&missing, stop)?;
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
                index.graph = backend.new_graph(&params, dimension, rows.len())?;
                let all: Vec<RowId> = rows.ids().to_vec();
                *index.rows.get_mut().unwrap_or_else(|e| e.into_inner()) = rows;
                index.insert_into_graph(&all, stop)?;
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
        index.refresh_copy_or_warn();
        let report = LoadReport {
            rows: index.len(),
            skipped,
            skipped_ids,
            origin,
            millis: start.elapsed().as_millis() as u64,
        };
        Ok((index, report))
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
        self.insert_into_graph(&fresh, &AtomicBool::new(false))?;
        self.refresh_copy_or_warn();
        Ok(fresh.len())
    }

    /// [`Self::refresh_copy`]; a failure only logs: searches go to the
    /// library's graph (no copy yet) or keep the old copy and its tail.
    fn refresh_copy_or_warn(&self) {
        if let Err(e) = self.refresh_copy() {
            tracing::warn!(digest = %self.digest, "{e}; searches keep what they had");
        }
    }

    /// Inserts rows already in the matrix into the graph, giving up once `stop` is set.
    fn insert_into_graph(&self, ids: &[RowId], stop: &AtomicBool) -> Result<(), IndexError> {
        if ids.is_empty() {
            return Ok(());
        }
        let _shared = read(&self.gate);
        self.graph.reserve(ids.len())?;
        let matrix = read(&self.rows);
        let threads = self.params.build_threads.min(ids.len().div_ceil(64)).max(1);
        let next = AtomicUsize::new(0);
        let failed = AtomicBool::new(false);
        let work = || loop {
            if stop.load(Ordering::Relaxed) {
                break;
            }
            let i = next.fetch_add(1, Ordering::Relaxed);
            let Some(id) = ids.get(i) else { break };
            let Some(v) = matrix.vector(*id) else {
                continue;
            };
            if self.graph.insert(v, *id).is_err() {
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
        if stop.load(Ordering::Relaxed) {
            return Err(IndexError::Stopped);
        }
        Ok(())
    }
}

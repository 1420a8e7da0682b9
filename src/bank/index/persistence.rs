//! The index on disk: writing a dump when the graph changed (see
//! [`crate::bank::dump`] for the folder layout and why it is crash-safe), and
//! checking a dump against the rows of the source before it replaces a
//! build.

use std::collections::HashSet;
use std::sync::atomic::Ordering;
use std::time::Instant;

use serde::Serialize;

use super::graph::Graph;
use super::parameters::IndexParams;
use super::{write, IndexError, VectorIndex};
use crate::bank::dump::{self, Manifest};
use crate::bank::exact::ExactRows;
use crate::bank::RowId;

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

/// The last dump on disk, as the index remembers it.
#[derive(Debug, Default, Clone, Copy)]
pub(super) struct DumpState {
    /// The insert generation it covers (`u64::MAX`: none matches the graph).
    pub(super) generation: u64,
    /// Rows in it.
    pub(super) rows: usize,
    /// When it was written, milliseconds since the Unix epoch.
    pub(super) at_unix_ms: Option<u64>,
}

impl VectorIndex {
    /// Writes the graph to disk if it changed since the last dump. Holds
    /// back inserts, not searches, while the graph writes its files. Call on
    /// a timer and at shutdown, off the async runtime.
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
        let rows = self.graph.len();
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
        let written = self.graph.write(&tmp);
        let max_row_id = self
            .any_indexed
            .load(Ordering::SeqCst)
            .then(|| self.max_indexed.load(Ordering::SeqCst));
        drop(exclusive);
        let files = match written {
            Ok(files) => files,
            Err(message) => {
                let _ = std::fs::remove_dir_all(&tmp);
                return Err(IndexError::DumpFailed { path: tmp, message });
            }
        };
        let manifest = Manifest {
            format: dump::MANIFEST_FORMAT,
            backend: self.params.backend.name().to_string(),
            library: self.params.backend.library().to_string(),
            distance: self.params.backend.distance(),
            digest: self.digest.clone(),
            dimension: self.dim,
            max_connections: self.params.max_connections,
            ef_construction: self.params.ef_construction,
            rows,
            max_row_id,
            files: Vec::new(),
            written_at_unix_ms: dump::unix_ms(),
        };
        let at = manifest.written_at_unix_ms;
        if let Err(source) = dump::publish(dir, &tmp, &files, manifest) {
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
}

/// A dump read back: its graph, its manifest and the ids it holds.
type LoadedDump = (Box<dyn Graph>, Manifest, HashSet<RowId>);

/// Loads a dump that passed [`dump::check`] and verifies it against the rows
/// of the source: same count as the manifest, every row known with the same
/// vector, no row twice. Returns the graph and the ids it holds, or why the
/// dump cannot be used (the index is then built instead).
pub(super) fn load_checked(
    checked: &dump::CheckedDump,
    rows: &ExactRows,
    params: &IndexParams,
    dim: usize,
) -> Result<LoadedDump, String> {
    let manifest = checked.manifest.clone();
    let graph = params.backend.read_graph(&checked.folder, params, dim)?;
    if graph.len() != manifest.rows {
        return Err(format!(
            "dump holds {} rows, its manifest says {}",
            graph.len(),
            manifest.rows
        ));
    }
    let mut ids = HashSet::with_capacity(manifest.rows);
    graph.each_point(rows.ids(), &mut |id, v| {
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
        Ok(())
    })?;
    // The graph holds manifest.rows points (checked above); those not met
    // among the store's rows are unknown to it (a backend that looks rows up
    // by id cannot name them).
    if ids.len() != manifest.rows {
        return Err(format!(
            "dump holds {} rows which the store does not have",
            manifest.rows - ids.len().min(manifest.rows)
        ));
    }
    Ok((graph, manifest, ids))
}

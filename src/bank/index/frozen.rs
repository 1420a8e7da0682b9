//! Searches through the flat copy of the graph ([`FlatGraph`]) rather than
//! the library, for backends that make one (usearch).
//!
//! The copy is made when the index opens and renewed after inserts once the
//! rows beyond it pass [`VectorIndex::tail_limit`]. It covers a prefix of
//! the exact matrix (rows enter the matrix in order, and the graph in the
//! same order batch by batch); the rows after that prefix, the tail, are
//! scanned exactly and merged with the copy's hits, so a search sees every
//! committed row whether or not the copy has it yet.
//!
//! Why (BENCHMARKS.md, "A flat copy of usearch's graph for searching"):
//! the same graph, searched from one contiguous array of node records with
//! the vectors inline, answered about twice usearch's own queries a second.
//! A search through the copy also never runs inside usearch while an insert
//! changes its graph. The cost is memory: the copy holds the vectors and
//! the level-0 links again (`docs/bank.md`).

use std::sync::Arc;
use std::time::Instant;

use super::flat_graph::{FlatGraph, FreezeError};
use super::{read, write, VectorIndex};
use crate::bank::exact::{best_first, Neighbour};

/// The copy and how many rows of the exact matrix (a prefix) it holds.
pub(super) struct Frozen {
    pub(super) copy: FlatGraph,
    /// Rows of the matrix, from its first, that the copy holds.
    pub(super) covers: usize,
}

/// The tail may grow to this share of the copy's rows (and at least to
/// [`super::IndexParams::exact_below`]) before the copy is renewed: renewing
/// reads the whole graph, so it is paid once per this many inserts.
const TAIL_SHARE: usize = 100;

/// Hands the memory freed since the last call back to the system: the
/// copy's making goes through temporary tables as large as the copy, and a
/// renewal frees the old copy, but glibc's allocator keeps freed blocks
/// below its (growing) mapping threshold in its heaps, where they stay
/// resident. `malloc_trim` releases the free pages of every heap.
fn return_freed_memory() {
    #[cfg(all(target_os = "linux", target_env = "gnu"))]
    // SAFETY: malloc_trim only walks the allocator's own free lists; it
    // takes no pointer and leaves allocated blocks where they are.
    unsafe {
        libc::malloc_trim(0);
    }
}

impl VectorIndex {
    /// Rows beyond the copy that are scanned exactly before it is renewed:
    /// `exact_below` (below it the scan beats the graph), or 1 % of the
    /// copy's rows if that is more.
    pub(super) fn tail_limit(&self, covers: usize) -> usize {
        self.exact_below_rows().max(covers / TAIL_SHARE)
    }

    /// Makes the flat copy, or renews it once its tail passed
    /// [`Self::tail_limit`]. Holds back inserts and dumps while it reads the
    /// graph, not searches (they use the old copy and its tail meanwhile).
    /// Returns whether a new copy was made. A backend without copies, or a
    /// graph that does not hold a prefix of the matrix (an insert that
    /// failed or was stopped), keeps what it had: searches stay correct
    /// either way.
    pub(super) fn refresh_copy(&self) -> Result<bool, FreezeError> {
        if !self.params.backend.makes_flat_copy() {
            return Ok(false);
        }
        let covered = self.copy().map(|f| f.covers);
        let rows = read(&self.rows).len();
        if let Some(covers) = covered {
            if rows - covers <= self.tail_limit(covers) {
                return Ok(false);
            }
        }
        let start = Instant::now();
        let _exclusive = write(&self.gate);
        // With the gate held no insert is inside the graph, and every batch
        // before went in whole: the graph holds the matrix's first rows.
        let in_graph = self.graph.len();
        if in_graph == 0 || covered == Some(in_graph) {
            return Ok(false);
        }
        let known = {
            let rows = read(&self.rows);
            match rows.ids().get(..in_graph) {
                Some(prefix) => prefix.to_vec(),
                None => return Ok(false),
            }
        };
        let copy = self.graph.freeze(&self.digest, &known)?;
        let links = copy.link_report();
        tracing::info!(
            digest = %self.digest,
            rows = in_graph,
            megabytes = copy.bytes() / (1 << 20),
            reverse_links = links.reverse,
            stranded = links.stranded,
            rejoined = links.rejoined,
            millis = start.elapsed().as_millis() as u64,
            "made the flat copy of the graph for searching"
        );
        *write(&self.frozen) = Some(Arc::new(Frozen {
            copy,
            covers: in_graph,
        }));
        return_freed_memory();
        Ok(true)
    }

    /// Drops the copy: searches go to the library's graph until inserts
    /// renew it (the retrieval benchmark measures both ways).
    pub fn set_copy_aside(&self) {
        *write(&self.frozen) = None;
    }

    /// The current copy, if any.
    pub(super) fn copy(&self) -> Option<Arc<Frozen>> {
        read(&self.frozen).clone()
    }

    /// The `k` best at breadth `ef` for the unit query `q` through the copy
    /// and the exact scan of its tail; `None` without a copy.
    pub(super) fn search_copy(&self, q: &[f32], k: usize, ef: usize) -> Option<Vec<Neighbour>> {
        let frozen = self.copy()?;
        let mut hits = frozen.copy.search_unit(q, k, ef);
        {
            let rows = read(&self.rows);
            let tail = rows.ids().get(frozen.covers..).unwrap_or_default();
            hits.extend(rows.search_among(q, k, tail));
        }
        hits.sort_by(best_first);
        hits.truncate(k);
        Some(hits)
    }
}

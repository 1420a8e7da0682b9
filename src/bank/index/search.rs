//! Answering a search: through the graph, by the exact scan, or with a tag
//! filter (over-fetching from the graph, or scanning the filtered rows).

use std::collections::HashSet;

use serde::Serialize;

use super::parameters::{check_search_bounds, unit_vector, Search, SearchMode, MAX_EF_SEARCH};
use super::{read, IndexError, VectorIndex};
use crate::bank::exact::Neighbour;
use crate::bank::RowId;

/// A tag filter is searched through the graph asking for this many times
/// the candidates its share of the bank implies, so that enough survive the
/// filter (see [`VectorIndex::search`]).
const OVERFETCH_FACTOR: f64 = 2.0;

/// How a search was answered, reported with its hits.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "lowercase")]
pub enum Answered {
    /// Through the HNSW graph.
    Index,
    /// By the exact scan.
    Exact,
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

impl VectorIndex {
    /// Checks a search and its query; returns the unit query and the breadth.
    fn check_search(
        &self,
        query: &[f32],
        search: &Search<'_>,
    ) -> Result<(Vec<f32>, usize), IndexError> {
        check_search_bounds(search.k, search.ef_search)?;
        let ef = search.ef_search.unwrap_or(self.params.ef_search);
        Ok((
            unit_vector(query, self.dim, &self.digest)?,
            ef.max(search.k),
        ))
    }

    /// The nearest rows to `query` (scaled to unit length first).
    ///
    /// With a filter (`only`): a set no larger than
    /// [`super::IndexParams::exact_below`] is scanned exactly; a larger one is
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
            let hits = self.graph.search(&q, search.k, ef)?;
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
        let mut hits = self.graph.search(&q, fetch, ef)?;
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
}

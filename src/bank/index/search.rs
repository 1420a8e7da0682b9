//! Answering a search: through the graph, by the exact scan, or with a tag
//! filter (a filtered walk of the graph or over-fetching from it, and the
//! exact scan of the filter's rows when either comes back short).

use std::collections::HashSet;

use serde::Serialize;

use super::parameters::{check_query_count, check_search_bounds, unit_vector, Search, SearchMode};
use super::{read, IndexError, VectorIndex};
use crate::bank::exact::Neighbour;
use crate::bank::RowId;

/// [`FilterWalk::OverFetch`] searches at a breadth where at least this
/// many times `k` allowed rows are expected among the candidates, however
/// narrow the search's own breadth.
const OVERFETCH_FACTOR: usize = 2;

/// How a tag filter wider than [`VectorIndex::filter_exact_below`] rows is
/// searched through the graph. Either way, fewer than `k` allowed hits send
/// the search to the exact scan of the filter's rows.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum FilterWalk {
    /// Walk the graph keeping only allowed rows among the `ef_search` best
    /// (hnsw_rs's filtered search).
    Within,
    /// Search the whole graph at breadth `max(ef_search, 2 k) * bank / set`
    /// and keep the allowed candidates ([`VectorIndex::over_fetch_breadth`]).
    OverFetch,
}

impl FilterWalk {
    /// The way [`VectorIndex::search`] uses: over-fetching, by measurement
    /// (BENCHMARKS.md, "Tag filters"). hnsw_rs's filtered walk reaches
    /// recall near 1 but answered 4 to 20 times fewer queries per second at
    /// 100k rows: with a filter its layer search gives up the early stop,
    /// expands every candidate it queued, and queues every neighbour closer
    /// than the worst allowed row kept (any neighbour while fewer than
    /// `ef_search` allowed rows are kept), so a narrow tag walks most of
    /// the graph. usearch's filtered walk reached the same recall as
    /// over-fetching at the wider breadth, at 0.4 to 0.7 times its
    /// queries/s.
    pub const DEFAULT: Self = Self::OverFetch;
}

/// How a search was answered, reported with its hits.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, utoipa::ToSchema)]
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
        Ok((
            unit_vector(query, self.dim, &self.digest)?,
            self.breadth(search),
        ))
    }

    /// The breadth a search runs at: its own or the index's, at least `k`.
    fn breadth(&self, search: &Search<'_>) -> usize {
        search
            .ef_search
            .unwrap_or(self.params.ef_search)
            .max(search.k)
    }

    /// The nearest rows to `query` (scaled to unit length first).
    ///
    /// With a filter (`only`): a set no larger than
    /// [`Self::filter_exact_below`] is scanned exactly; a larger one is
    /// searched through the graph the [`FilterWalk::DEFAULT`] way, and
    /// scanned exactly if fewer than `k` allowed rows come back, so the
    /// answer has `k` hits whenever the set has `k` rows.
    pub fn search(&self, query: &[f32], search: &Search<'_>) -> Result<SearchAnswer, IndexError> {
        self.search_walking(query, search, FilterWalk::DEFAULT)
    }

    /// [`Self::search`], with a tag filter searched through the graph the
    /// `walk` way (the benchmark sets the two ways side by side).
    pub fn search_walking(
        &self,
        query: &[f32],
        search: &Search<'_>,
        walk: FilterWalk,
    ) -> Result<SearchAnswer, IndexError> {
        let (q, ef) = self.check_search(query, search)?;
        if self.answers_exactly(search) {
            return Ok(self.exact_with(&q, search.k, search.only));
        }
        let Some(only) = search.only else {
            let hits = self.graph_search(&q, search.k, ef)?;
            return Ok(SearchAnswer {
                hits,
                answered: Answered::Index,
                ef_search: ef,
            });
        };
        let (mut hits, ef) = match walk {
            FilterWalk::Within => {
                let allowed = |id: RowId| only.contains(&id);
                (self.graph.search(&q, search.k, ef, Some(&allowed))?, ef)
            }
            FilterWalk::OverFetch => {
                let breadth = self.over_fetch_breadth(ef, search.k, only.len());
                let mut hits = self.graph_search(&q, breadth, breadth)?;
                hits.retain(|h| only.contains(&h.id));
                (hits, breadth)
            }
        };
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

    /// The `k` best through the flat copy when there is one, else the
    /// library's graph.
    fn graph_search(&self, q: &[f32], k: usize, ef: usize) -> Result<Vec<Neighbour>, IndexError> {
        match self.search_copy(q, k, ef) {
            Some(hits) => Ok(hits),
            None => self.graph.search(q, k, ef, None),
        }
    }

    /// Several searches with the same settings, answered in order, each the
    /// answer [`Self::search`] gives that query. When the search is exact
    /// (by mode, by bank size, or a narrow filter) the queries share matrix
    /// products over the exact rows ([`ExactRows::search_many`]); graph
    /// searches run one query after another.
    ///
    /// [`ExactRows::search_many`]: crate::bank::exact::ExactRows::search_many
    pub fn search_many(
        &self,
        queries: &[Vec<f32>],
        search: &Search<'_>,
    ) -> Result<Vec<SearchAnswer>, IndexError> {
        check_search_bounds(search.k, search.ef_search)?;
        check_query_count("queries", queries.len())?;
        if !self.answers_exactly(search) {
            return queries.iter().map(|q| self.search(q, search)).collect();
        }
        let mut units = Vec::with_capacity(queries.len().saturating_mul(self.dim));
        for q in queries {
            units.extend(unit_vector(q, self.dim, &self.digest)?);
        }
        let rows = read(&self.rows);
        let k = search.k;
        let hits = match search.only {
            None => rows.search_many(&units, k, None),
            Some(set) if narrow(set, rows.len()) => units
                .chunks_exact(self.dim)
                .map(|q| rows.search_among(q, k, set.iter()))
                .collect(),
            Some(set) => rows.search_many(&units, k, Some(&|id| set.contains(&id))),
        };
        Ok(hits
            .into_iter()
            .map(|hits| SearchAnswer {
                hits,
                answered: Answered::Exact,
                ef_search: 0,
            })
            .collect())
    }

    /// The breadth a tag of `tagged` rows is over-fetched at, for a search
    /// of breadth `ef` and `k` hits: `max(ef, 2 k)` divided by the tag's
    /// share of the bank, at most the bank. Among that many candidates
    /// about `max(ef, 2 k)` are expected to carry the tag, so the tagged
    /// rows kept are as near the best as an unfiltered search at `ef` is.
    /// (Before, the breadth was `max(ef, 2 k bank / tagged)`: tags of 5 to
    /// 20 % came back with recall@10 0.86 to 0.92 where the unfiltered
    /// search had 0.98; BENCHMARKS.md, "Tag filters".)
    pub fn over_fetch_breadth(&self, ef: usize, k: usize, tagged: usize) -> usize {
        let n = self.len().max(1);
        let wanted = tagged_wanted(ef, k);
        let breadth = (wanted as f64 * n as f64 / tagged.max(1) as f64).ceil();
        (breadth.min(n as f64) as usize).max(k)
    }

    /// Whether a search goes to the exact scan without trying the graph:
    /// asked to, a bank at most [`super::IndexParams::exact_below`] rows, or
    /// a filter at most [`Self::filter_exact_below`] rows (or empty).
    pub(super) fn answers_exactly(&self, search: &Search<'_>) -> bool {
        let by_mode = match search.mode {
            SearchMode::Exact => true,
            SearchMode::Auto => self.len() <= self.exact_below_rows(),
            SearchMode::Index => false,
        };
        let ef = self.breadth(search);
        by_mode
            || search
                .only
                .is_some_and(|only| only.len() <= self.filter_exact_below(search.k, ef))
    }

    /// The largest tag filter that the exact scan of its rows answers, for
    /// `k` hits at breadth `ef`, rather than over-fetching through the graph.
    ///
    /// Over-fetching a tag of `t` rows in a bank of `n` searches the graph
    /// at breadth `b n / t` with `b = max(ef, 2 k)`
    /// ([`Self::over_fetch_breadth`]); scanning the tag reads its `t` rows.
    /// With `r` rows scanned in the time the graph spends per unit of
    /// breadth ([`super::IndexBackend::scan_rows_per_breadth`], measured),
    /// the two cost the same at `t^2 = b n r`: a narrower tag is scanned.
    /// So the limit grows with the square root of the bank: a share of the
    /// bank that over-fetches well at 100k rows would ask for breadths in
    /// the tens of thousands at 1M. Never below
    /// [`Self::exact_below_rows`], where scanning beats the graph outright;
    /// 0 when `exact_below` is 0, which turns every choice of the scan by
    /// size off (the benchmark's way to time the graph).
    pub fn filter_exact_below(&self, k: usize, ef: usize) -> usize {
        if self.params.exact_below == 0 {
            return 0;
        }
        let breadth = tagged_wanted(ef, k);
        let balance =
            breadth as f64 * self.len() as f64 * self.params.backend.scan_rows_per_breadth();
        self.exact_below_rows().max(balance.sqrt() as usize)
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
            Some(set) if narrow(set, rows.len()) => rows.search_among(q, k, set.iter()),
            Some(set) => rows.search(q, k, Some(&|id| set.contains(&id))),
        };
        SearchAnswer {
            hits,
            answered: Answered::Exact,
            ef_search: 0,
        }
    }
}

/// Tagged rows an over-fetch wants among its candidates, for a search of
/// breadth `ef` and `k` hits: `max(ef, 2 k)`.
fn tagged_wanted(ef: usize, k: usize) -> usize {
    ef.max(OVERFETCH_FACTOR.saturating_mul(k))
}

/// Scanning a filter's rows one by one beats a full matrix pass when they
/// are under a quarter of the bank.
fn narrow(set: &HashSet<RowId>, rows: usize) -> bool {
    set.len().saturating_mul(4) < rows
}

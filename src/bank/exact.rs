//! The exact scan: every row's vector in one contiguous row-major matrix,
//! scored against a query with one matrix-vector product.
//!
//! It is the ground truth the HNSW index is measured against, the answer for
//! small banks (where it is faster than the graph, see
//! [`crate::bank::index::DEFAULT_EXACT_BELOW`]) and for narrow tag filters,
//! and the in-memory copy the index is rebuilt from.

use std::cmp::Ordering;
use std::collections::HashMap;

use ndarray::{ArrayView1, ArrayView2, Axis};

use super::distance::dot;
use super::RowId;

/// One search answer: a row and its cosine to the query.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Neighbour {
    /// The row (for the bank: the caption id).
    pub id: RowId,
    /// Cosine similarity to the query, in `[-1, 1]`.
    pub cosine: f32,
}

/// Orders neighbours best first: higher cosine, then lower id (so that ties
/// come out the same way on every run).
pub fn best_first(a: &Neighbour, b: &Neighbour) -> Ordering {
    b.cosine.total_cmp(&a.cosine).then(a.id.cmp(&b.id))
}

/// Keeps the best `k` of a stream of neighbours by partial selection: offers
/// are appended to a buffer, and when it holds `k + SELECTION_SLACK` of them
/// `select_nth_unstable_by` keeps the best `k` (linear time) and records the
/// worst of those as a floor that later offers must beat. Across a scan of
/// `n` rows this costs O(n) comparisons, most of them one float compare
/// against the floor, where a binary heap pays O(log k) per kept offer.
pub struct TopK {
    k: usize,
    kept: Vec<Neighbour>,
    /// The k-th best after the last selection: an offer not better than it
    /// cannot be among the best `k`.
    floor: Option<Neighbour>,
}

/// Offers buffered past `k` before a selection: large enough that selections
/// are rare, small enough that the buffer stays in the L1 cache.
const SELECTION_SLACK: usize = 256;

impl TopK {
    /// An empty selection of at most `k` neighbours.
    pub fn new(k: usize) -> Self {
        Self {
            k,
            kept: Vec::with_capacity(k.saturating_add(SELECTION_SLACK).min(1 << 16)),
            floor: None,
        }
    }

    /// Offers one neighbour.
    #[inline]
    pub fn push(&mut self, n: Neighbour) {
        if self.k == 0 {
            return;
        }
        if let Some(floor) = &self.floor {
            // Fast refusal first: a lower cosine never beats the floor.
            if n.cosine < floor.cosine || best_first(&n, floor) != Ordering::Less {
                return;
            }
        }
        self.kept.push(n);
        if self.kept.len() >= self.k.saturating_add(SELECTION_SLACK) {
            self.select();
        }
    }

    fn select(&mut self) {
        if self.kept.len() > self.k {
            self.kept.select_nth_unstable_by(self.k - 1, best_first);
            self.kept.truncate(self.k);
        }
        if self.kept.len() == self.k {
            self.floor = self.kept.iter().copied().max_by(best_first);
        }
    }

    /// The kept neighbours, best first.
    pub fn into_sorted(mut self) -> Vec<Neighbour> {
        self.select();
        self.kept.sort_by(best_first);
        self.kept
    }
}

/// Bank rows scored by one matrix product in a batched search: 2048 rows
/// of 512 numbers are 4 MiB, so the block of bank and the block of scores
/// stay near the cache while every query of the batch reads them.
const BATCH_ROWS: usize = 2048;

/// Queries scored together against one block of rows: 512 queries x
/// [`BATCH_ROWS`] scores are 4 MiB.
const BATCH_QUERIES: usize = 512;

/// Offers one query's scores against `ids` (same order) to its selection.
#[inline]
fn offer_scores(
    top: &mut TopK,
    ids: &[RowId],
    scores: &[f32],
    keep: Option<&dyn Fn(RowId) -> bool>,
) {
    for (id, score) in ids.iter().zip(scores) {
        if keep.is_none_or(|f| f(*id)) {
            top.push(Neighbour {
                id: *id,
                cosine: score.clamp(-1.0, 1.0),
            });
        }
    }
}

/// Every row's vector, contiguous, with the row ids beside them.
#[derive(Debug, Clone)]
pub struct ExactRows {
    dim: usize,
    data: Vec<f32>,
    ids: Vec<RowId>,
    position: HashMap<RowId, usize>,
}

impl ExactRows {
    /// An empty matrix of `dim`-long rows.
    pub fn new(dim: usize) -> Self {
        Self {
            dim,
            data: Vec::new(),
            ids: Vec::new(),
            position: HashMap::new(),
        }
    }

    /// Length of every row.
    pub fn dimension(&self) -> usize {
        self.dim
    }

    /// Number of rows.
    pub fn len(&self) -> usize {
        self.ids.len()
    }

    /// True when there are no rows.
    pub fn is_empty(&self) -> bool {
        self.ids.is_empty()
    }

    /// Whether row `id` is here.
    pub fn contains(&self, id: RowId) -> bool {
        self.position.contains_key(&id)
    }

    /// The vector of row `id`.
    pub fn vector(&self, id: RowId) -> Option<&[f32]> {
        let p = *self.position.get(&id)?;
        self.data.get(p * self.dim..(p + 1) * self.dim)
    }

    /// Bytes this matrix holds in memory: the vectors and the ids as far
    /// as they are filled (room reserved past that is not touched, so not
    /// resident), and the id-to-position map's table (its slots, one
    /// control byte each).
    pub fn heap_bytes(&self) -> usize {
        let slot = std::mem::size_of::<(RowId, usize)>() + 1;
        self.data.len() * std::mem::size_of::<f32>()
            + self.ids.len() * std::mem::size_of::<RowId>()
            + self.position.capacity() * slot
    }

    /// Row ids in the order they were added.
    pub fn ids(&self) -> &[RowId] {
        &self.ids
    }

    /// Adds a row; false (and nothing changes) when `id` is already here or
    /// the vector is not `dim` long. Callers validate vectors first.
    pub fn push(&mut self, id: RowId, vector: &[f32]) -> bool {
        if vector.len() != self.dim || self.position.contains_key(&id) {
            return false;
        }
        self.position.insert(id, self.ids.len());
        self.ids.push(id);
        self.data.extend_from_slice(vector);
        true
    }

    /// Reserves room for `more` rows.
    pub fn reserve(&mut self, more: usize) {
        self.data.reserve(more.saturating_mul(self.dim));
        self.ids.reserve(more);
        self.position.reserve(more);
    }

    /// The best `k` rows for a unit-length `query` of this matrix's dimension,
    /// among those `keep` accepts (all when `None`).
    ///
    /// Rows are scored with one matrix-vector product; the kept rows' cosines
    /// are then computed again with [`dot`], so that this, [`Self::search_many`]
    /// and [`Self::search_among`] report the same number for the same row
    /// (the matrix kernels sum in different orders, which moves the last bits).
    pub fn search(
        &self,
        query: &[f32],
        k: usize,
        keep: Option<&dyn Fn(RowId) -> bool>,
    ) -> Vec<Neighbour> {
        if self.is_empty() || query.len() != self.dim || k == 0 {
            return Vec::new();
        }
        let (Ok(matrix), q) = (
            ArrayView2::from_shape((self.ids.len(), self.dim), &self.data),
            ArrayView1::from(query),
        ) else {
            return Vec::new();
        };
        let scores = matrix.dot(&q);
        let mut top = TopK::new(k);
        offer_scores(&mut top, &self.ids, scores.as_slice().unwrap_or(&[]), keep);
        self.rescored(query, top)
    }

    /// The best `k` rows for each of several unit-length queries (`queries`
    /// holds them one after another, `dimension` numbers each), answered in
    /// order: the same as calling [`Self::search`] for each, computed as
    /// matrix products of blocks of queries by blocks of rows, so the bank
    /// is read once per [`BATCH_QUERIES`] queries instead of once per query.
    pub fn search_many(
        &self,
        queries: &[f32],
        k: usize,
        keep: Option<&dyn Fn(RowId) -> bool>,
    ) -> Vec<Vec<Neighbour>> {
        let count = queries.len() / self.dim.max(1);
        if self.is_empty() || k == 0 || queries.len() != count * self.dim {
            return vec![Vec::new(); count];
        }
        let Ok(all_queries) = ArrayView2::from_shape((count, self.dim), queries) else {
            return vec![Vec::new(); count];
        };
        let Ok(bank) = ArrayView2::from_shape((self.ids.len(), self.dim), &self.data) else {
            return vec![Vec::new(); count];
        };
        let mut tops: Vec<TopK> = (0..count).map(|_| TopK::new(k)).collect();
        for (block, rows) in bank.axis_chunks_iter(Axis(0), BATCH_ROWS).enumerate() {
            let ids = &self.ids[block * BATCH_ROWS..block * BATCH_ROWS + rows.nrows()];
            for (qblock, qs) in all_queries
                .axis_chunks_iter(Axis(0), BATCH_QUERIES)
                .enumerate()
            {
                let scores = qs.dot(&rows.t());
                for (i, row) in scores.rows().into_iter().enumerate() {
                    let top = &mut tops[qblock * BATCH_QUERIES + i];
                    offer_scores(top, ids, row.as_slice().unwrap_or(&[]), keep);
                }
            }
        }
        tops.into_iter()
            .zip(queries.chunks_exact(self.dim))
            .map(|(top, q)| self.rescored(q, top))
            .collect()
    }

    /// The kept neighbours with their cosines from [`dot`], best first.
    fn rescored(&self, query: &[f32], top: TopK) -> Vec<Neighbour> {
        let mut hits: Vec<Neighbour> = top
            .into_sorted()
            .into_iter()
            .map(|n| Neighbour {
                id: n.id,
                cosine: self
                    .vector(n.id)
                    .map_or(n.cosine, |v| dot(query, v).clamp(-1.0, 1.0)),
            })
            .collect();
        hits.sort_by(best_first);
        hits
    }

    /// The best `k` among the given rows only (rows not here are skipped):
    /// cheaper than [`Self::search`] when they are few.
    pub fn search_among<'a>(
        &self,
        query: &[f32],
        k: usize,
        rows: impl IntoIterator<Item = &'a RowId>,
    ) -> Vec<Neighbour> {
        let mut top = TopK::new(k);
        for id in rows {
            if let Some(v) = self.vector(*id) {
                top.push(Neighbour {
                    id: *id,
                    cosine: dot(query, v).clamp(-1.0, 1.0),
                });
            }
        }
        top.into_sorted()
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::bank::synthetic::uniform_sphere;

    #[test]
    fn finds_the_best_rows_in_order() {
        let mut rows = ExactRows::new(2);
        assert!(rows.push(10, &[1.0, 0.0]));
        assert!(rows.push(11, &[0.0, 1.0]));
        assert!(rows.push(12, &[-1.0, 0.0]));
        assert!(!rows.push(10, &[0.0, 1.0]), "an id is stored once");
        let hits = rows.search(&[0.6, 0.8], 2, None);
        assert_eq!(hits.iter().map(|h| h.id).collect::<Vec<_>>(), vec![11, 10]);
        assert!((hits[0].cosine - 0.8).abs() < 1e-6);
        let only_12 = |id: RowId| id == 12;
        let hits = rows.search(&[0.6, 0.8], 2, Some(&only_12));
        assert_eq!(hits.len(), 1);
        assert_eq!(hits[0].id, 12);
        let among = rows.search_among(&[0.6, 0.8], 5, &[12, 10, 99]);
        assert_eq!(among.iter().map(|h| h.id).collect::<Vec<_>>(), vec![10, 12]);
    }

    #[test]
    fn matrix_scan_agrees_with_row_by_row_dots() {
        let dim = 64;
        let data = uniform_sphere(500, dim, 5);
        let mut rows = ExactRows::new(dim);
        for (i, v) in data.chunks(dim).enumerate() {
            rows.push(i as RowId, v);
        }
        let q = &data[..dim];
        let all: Vec<RowId> = (0..500).collect();
        assert_eq!(
            rows.search(q, 10, None)
                .iter()
                .map(|h| h.id)
                .collect::<Vec<_>>(),
            rows.search_among(q, 10, &all)
                .iter()
                .map(|h| h.id)
                .collect::<Vec<_>>()
        );
        assert_eq!(rows.search(q, 1, None)[0].id, 0);
    }

    #[test]
    fn ties_come_out_by_id() {
        let mut top = TopK::new(2);
        for id in [5, 3, 9, 1] {
            top.push(Neighbour { id, cosine: 0.5 });
        }
        assert_eq!(
            top.into_sorted().iter().map(|n| n.id).collect::<Vec<_>>(),
            vec![1, 3]
        );
    }

    /// The best `k` by the definition: every cosine in f64, a full sort
    /// (higher cosine first, then lower id), no selection tricks.
    fn scan_in_f64(data: &[f32], dim: usize, query: &[f32], k: usize) -> Vec<(RowId, f64)> {
        let mut all: Vec<(RowId, f64)> = data
            .chunks(dim)
            .enumerate()
            .map(|(i, v)| {
                let c = v
                    .iter()
                    .zip(query)
                    .map(|(a, b)| *a as f64 * *b as f64)
                    .sum();
                (i as RowId, c)
            })
            .collect();
        all.sort_by(|a, b| b.1.total_cmp(&a.1).then(a.0.cmp(&b.0)));
        all.truncate(k);
        all
    }

    fn rows_of(data: &[f32], dim: usize) -> ExactRows {
        let mut rows = ExactRows::new(dim);
        for (i, v) in data.chunks(dim).enumerate() {
            rows.push(i as RowId, v);
        }
        rows
    }

    #[test]
    fn batched_answers_equal_single_answers_and_the_f64_scan() {
        // Enough rows for three row blocks and enough queries for two query
        // blocks, so the block edges are crossed.
        let dim = 48;
        let n = 2 * BATCH_ROWS + 301;
        let data = uniform_sphere(n, dim, 11);
        let rows = rows_of(&data, dim);
        let queries = uniform_sphere(BATCH_QUERIES + 37, dim, 12);
        let k = 15;
        let batched = rows.search_many(&queries, k, None);
        assert_eq!(batched.len(), BATCH_QUERIES + 37);
        for (q, got) in queries.chunks(dim).zip(&batched) {
            assert_eq!(got, &rows.search(q, k, None), "batched differs from single");
            let want = scan_in_f64(&data, dim, q, k);
            assert_eq!(
                got.iter().map(|h| h.id).collect::<Vec<_>>(),
                want.iter().map(|w| w.0).collect::<Vec<_>>()
            );
            for (h, w) in got.iter().zip(&want) {
                // f32 sums of 48 products of unit-vector entries: within 1e-5.
                assert!(
                    (h.cosine as f64 - w.1).abs() < 1e-5,
                    "{} vs {}",
                    h.cosine,
                    w.1
                );
            }
        }
        let even = |id: RowId| id.is_multiple_of(2);
        let filtered = rows.search_many(&queries[..dim * 40], k, Some(&even));
        for (q, got) in queries.chunks(dim).zip(&filtered) {
            assert!(got.iter().all(|h| h.id.is_multiple_of(2)));
            assert_eq!(got, &rows.search(q, k, Some(&even)));
        }
    }

    #[test]
    fn batched_search_handles_edges_without_panicking() {
        let rows = rows_of(&uniform_sphere(30, 8, 3), 8);
        let qs = uniform_sphere(3, 8, 4);
        // k above the bank: every row, best first, per query.
        let all = rows.search_many(&qs, 100, None);
        assert!(all.iter().all(|a| a.len() == 30));
        assert!(all[0].windows(2).all(|w| best_first(&w[0], &w[1]).is_lt()));
        assert!(rows.search_many(&qs, 0, None).iter().all(Vec::is_empty));
        // A ragged query buffer answers nothing rather than misreading rows.
        assert!(rows
            .search_many(&qs[..20], 5, None)
            .iter()
            .all(Vec::is_empty));
        assert_eq!(ExactRows::new(8).search_many(&qs, 5, None), vec![vec![]; 3]);
    }

    #[test]
    fn partial_selection_keeps_what_a_full_sort_keeps() {
        // Many ties (cosines on a coarse grid), ids in random order, and
        // enough offers for several selections per k.
        let mut rng = crate::bank::synthetic::SplitMix64::new(9);
        let offers: Vec<Neighbour> = (0..5_000)
            .map(|_| Neighbour {
                id: rng.next_u64() % 100_000,
                cosine: (rng.below(41) as f32 - 20.0) / 20.0,
            })
            .collect();
        for k in [1, 7, 256, 300, 4_999, 5_000, 6_000] {
            let mut top = TopK::new(k);
            for n in &offers {
                top.push(*n);
            }
            let mut want = offers.clone();
            want.sort_by(best_first);
            want.truncate(k);
            assert_eq!(top.into_sorted(), want, "k = {k}");
        }
    }
}

//! The exact scan: every row's vector in one contiguous row-major matrix,
//! scored against a query with one matrix-vector product.
//!
//! It is the ground truth the HNSW index is measured against, the answer for
//! small banks (where it is faster than the graph, see
//! [`crate::bank::index::DEFAULT_EXACT_BELOW`]) and for narrow tag filters,
//! and the in-memory copy the index is rebuilt from.

use std::cmp::Ordering;
use std::collections::{BinaryHeap, HashMap};

use ndarray::{ArrayView1, ArrayView2};

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

/// Heap entry whose maximum is the *worst* kept neighbour, so the heap holds
/// the best `k` seen so far and the worst of them is evicted first.
#[derive(PartialEq)]
struct Kept(Neighbour);

impl Eq for Kept {}

impl PartialOrd for Kept {
    fn partial_cmp(&self, other: &Self) -> Option<Ordering> {
        Some(self.cmp(other))
    }
}

impl Ord for Kept {
    fn cmp(&self, other: &Self) -> Ordering {
        best_first(&self.0, &other.0)
    }
}

/// Keeps the best `k` of a stream of neighbours.
pub struct TopK {
    k: usize,
    heap: BinaryHeap<Kept>,
}

impl TopK {
    /// An empty selection of at most `k` neighbours.
    pub fn new(k: usize) -> Self {
        Self {
            k,
            heap: BinaryHeap::with_capacity(k.saturating_add(1).min(1 << 16)),
        }
    }

    /// Offers one neighbour.
    pub fn push(&mut self, n: Neighbour) {
        if self.k == 0 {
            return;
        }
        if self.heap.len() < self.k {
            self.heap.push(Kept(n));
        } else if let Some(worst) = self.heap.peek() {
            if best_first(&n, &worst.0) == Ordering::Less {
                self.heap.pop();
                self.heap.push(Kept(n));
            }
        }
    }

    /// The kept neighbours, best first.
    pub fn into_sorted(self) -> Vec<Neighbour> {
        let mut v: Vec<Neighbour> = self.heap.into_iter().map(|k| k.0).collect();
        v.sort_by(best_first);
        v
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
    pub fn search(
        &self,
        query: &[f32],
        k: usize,
        keep: Option<&dyn Fn(RowId) -> bool>,
    ) -> Vec<Neighbour> {
        let mut top = TopK::new(k);
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
        for (id, score) in self.ids.iter().zip(scores.iter()) {
            if keep.is_none_or(|f| f(*id)) {
                top.push(Neighbour {
                    id: *id,
                    cosine: score.clamp(-1.0, 1.0),
                });
            }
        }
        top.into_sorted()
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
}

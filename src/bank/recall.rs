//! Recall of an approximate search against the exact one: the one measure
//! the tests and the benchmark use, so their figures mean the same thing.

/// Cosines within this much of the exact k-th neighbour's count as found, so
/// that two rows with the same vector (a tie) do not count as a miss.
/// ann-benchmarks (`ann_benchmarks/plotting/metrics.py`, `knn_threshold`)
/// allows 1e-3 in distance; this is stricter: only rounding-level ties.
pub const RECALL_EPSILON: f32 = 1e-6;

/// Recall@k of one query: the share of the approximate top `k` whose cosine
/// is at least the exact k-th cosine (minus [`RECALL_EPSILON`]).
///
/// `exact` holds the exact cosines best first; `approx` the approximate ones.
/// When the bank holds fewer than `k` rows, `k` is the bank's size.
pub fn recall_of_query(exact: &[f32], approx: &[f32], k: usize) -> f64 {
    let k = k.min(exact.len());
    if k == 0 {
        return 1.0;
    }
    let threshold = exact[k - 1] - RECALL_EPSILON;
    let found = approx.iter().take(k).filter(|c| **c >= threshold).count();
    found as f64 / k as f64
}

/// Mean recall@k over queries; `exact[i]` and `approx[i]` belong to query `i`.
pub fn mean_recall(exact: &[Vec<f32>], approx: &[Vec<f32>], k: usize) -> f64 {
    if exact.is_empty() {
        return 1.0;
    }
    let total: f64 = exact
        .iter()
        .zip(approx)
        .map(|(e, a)| recall_of_query(e, a, k))
        .sum();
    total / exact.len() as f64
}

/// Recall@k of `index`'s graph search at breadth `ef_search` against its own
/// exact scan, over `queries` (row-major, the index's dimension).
pub fn index_recall(
    index: &super::VectorIndex,
    queries: &[f32],
    k: usize,
    ef_search: usize,
) -> Result<f64, super::IndexError> {
    let dim = index.dimension().max(1);
    let mut exact = Vec::new();
    let mut approx = Vec::new();
    let search = super::Search {
        k,
        ef_search: Some(ef_search),
        mode: super::SearchMode::Index,
        only: None,
    };
    for q in queries.chunks_exact(dim) {
        exact.push(index.exact(q, k, None)?.iter().map(|n| n.cosine).collect());
        approx.push(
            index
                .search(q, &search)?
                .hits
                .iter()
                .map(|n| n.cosine)
                .collect(),
        );
    }
    Ok(mean_recall(&exact, &approx, k))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn counts_hits_above_the_kth_exact_cosine() {
        let exact = [0.9, 0.8, 0.7];
        assert_eq!(recall_of_query(&exact, &[0.9, 0.8, 0.7], 3), 1.0);
        assert!((recall_of_query(&exact, &[0.9, 0.8, 0.6], 3) - 2.0 / 3.0).abs() < 1e-12);
        // Another row tied with the k-th (a duplicate vector) is a hit too.
        assert_eq!(recall_of_query(&exact, &[0.9, 0.8, 0.7 - 1e-7], 3), 1.0);
        assert_eq!(recall_of_query(&[], &[], 10), 1.0);
    }

    #[test]
    fn mean_is_over_queries() {
        let exact = vec![vec![1.0], vec![1.0]];
        let approx = vec![vec![1.0], vec![0.0]];
        assert_eq!(mean_recall(&exact, &approx, 1), 0.5);
    }
}

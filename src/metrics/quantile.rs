//! Quantiles of a bucketed histogram, estimated the way Prometheus's
//! `histogram_quantile` does for classic histograms: find the bucket that
//! holds the rank `q x count` and interpolate linearly inside it.

/// The `q`-quantile (0 <= q <= 1) of a histogram with finite upper `bounds`
/// (ascending), `cumulative` counts at or below each bound, and `count`
/// observations in all (the `+Inf` bucket). None without observations.
///
/// As Prometheus documents it: the lowest bucket's lower limit is 0 when its
/// upper bound is positive; a rank that falls in the `+Inf` bucket gives the
/// highest finite bound, since nothing is known above it.
pub fn histogram_quantile(q: f64, bounds: &[f64], cumulative: &[u64], count: u64) -> Option<f64> {
    if count == 0 || bounds.is_empty() || bounds.len() != cumulative.len() {
        return None;
    }
    let q = q.clamp(0.0, 1.0);
    let rank = q * count as f64;
    let Some(b) = cumulative.iter().position(|&c| c as f64 >= rank) else {
        return Some(bounds[bounds.len() - 1]);
    };
    if b == 0 && bounds[0] <= 0.0 {
        return Some(bounds[0]);
    }
    let (start, below) = if b == 0 {
        (0.0, 0.0)
    } else {
        (bounds[b - 1], cumulative[b - 1] as f64)
    };
    let inside = cumulative[b] as f64 - below;
    if inside <= 0.0 {
        // Only reached for q = 0 with an empty first bucket: the rank sits at the bucket's start.
        return Some(start);
    }
    Some(start + (bounds[b] - start) * (rank - below) / inside)
}

#[cfg(test)]
mod tests {
    use super::*;

    fn close(a: f64, b: f64) -> bool {
        (a - b).abs() < 1e-12
    }

    #[test]
    fn matches_the_published_worked_example() {
        // ClickHouse's docs for quantilePrometheusHistogram ("performed similarly
        // to the PromQL histogram_quantile() function"): buckets le=0 -> 6,
        // le=0.5 -> 11, le=1 -> 14, le=+Inf -> 19; the median is 0.35.
        let q = histogram_quantile(0.5, &[0.0, 0.5, 1.0], &[6, 11, 14], 19).unwrap();
        assert!(close(q, 0.35), "{q}");
    }

    #[test]
    fn interpolates_inside_the_bucket_that_holds_the_rank() {
        // Worked by hand: bounds 1, 2, 4 with 10, 30, 40 at or below, 40 in all.
        // q = 0.5: rank 20 lies in (1, 2], 10 of its 20 observations in: 1 + 1 x 10/20 = 1.5.
        let (bounds, cum) = ([1.0, 2.0, 4.0], [10, 30, 40]);
        assert!(close(
            histogram_quantile(0.5, &bounds, &cum, 40).unwrap(),
            1.5
        ));
        // q = 0.9: rank 36 lies in (2, 4], 6 of its 10 in: 2 + 2 x 6/10 = 3.2.
        assert!(close(
            histogram_quantile(0.9, &bounds, &cum, 40).unwrap(),
            3.2
        ));
        // q = 0.1: rank 4 in the lowest bucket, whose lower limit is 0
        // (Prometheus docs, histogram_quantile): 0 + 1 x 4/10 = 0.4.
        assert!(close(
            histogram_quantile(0.1, &bounds, &cum, 40).unwrap(),
            0.4
        ));
    }

    #[test]
    fn a_rank_above_the_finite_buckets_gives_the_highest_bound() {
        // Prometheus docs, histogram_quantile: "If a quantile is located in the
        // highest bucket, the upper bound of the second highest bucket is
        // returned" (quoted from memory); here 2 of 10 lie above 4.
        assert_eq!(
            histogram_quantile(0.99, &[1.0, 2.0, 4.0], &[5, 6, 8], 10),
            Some(4.0)
        );
    }

    #[test]
    fn nothing_observed_has_no_quantile() {
        assert_eq!(histogram_quantile(0.5, &[1.0, 2.0], &[0, 0], 0), None);
    }
}

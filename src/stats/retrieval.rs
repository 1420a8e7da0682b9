//! Cross-modal retrieval on the probe set by the standard protocol (as in
//! VSE++'s evaluation, Faghri et al. 2018, section 4): recall at 1, 5 and 10,
//! median and mean rank, in both directions, and their sum.
//!
//! Ties are resolved in the model's favour and deterministically: an item
//! counts as ranked above the true one only when its cosine is strictly
//! greater, so a true item tied with negatives keeps the best of the tied ranks.

use ndarray::Array2;
use serde::{Deserialize, Serialize};

use super::intervals::{wilson, Interval};
use super::summary::median;

/// Retrieval figures of one direction.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, utoipa::ToSchema)]
pub struct RetrievalFigures {
    /// Queries (images for image-to-text, captions for text-to-image).
    pub queries: usize,
    /// Percentage of queries whose rank is 1.
    pub r_at_1: f64,
    /// Percentage of queries whose rank is at most 5.
    pub r_at_5: f64,
    /// Percentage of queries whose rank is at most 10.
    pub r_at_10: f64,
    /// `numpy.median` of the 1-based ranks (a .5 value when the two middle
    /// ranks differ; VSE++'s code reports floor(median of 0-based ranks) + 1).
    pub median_rank: f64,
    /// Mean of the 1-based ranks.
    pub mean_rank: f64,
    /// 95 % Wilson score intervals of the three recalls, in percent (see
    /// [`super::intervals`]); the queries are taken as independent trials.
    pub intervals: RecallIntervals,
}

/// Confidence intervals of R@1, R@5 and R@10, in percent.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, utoipa::ToSchema)]
pub struct RecallIntervals {
    /// Of R@1.
    pub r_at_1: Interval,
    /// Of R@5.
    pub r_at_5: Interval,
    /// Of R@10.
    pub r_at_10: Interval,
}

/// Retrieval in both directions.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, utoipa::ToSchema)]
pub struct RetrievalReport {
    /// Image query against all probe true captions; the rank is that of the
    /// best-ranked of the image's own captions: 1 + the number of captions
    /// with a strictly greater cosine than the image's best true caption.
    pub image_to_text: RetrievalFigures,
    /// Caption query against all probe images; the rank of its image is 1 +
    /// the number of images with a strictly greater cosine.
    pub text_to_image: RetrievalFigures,
    /// Sum of the six recalls, in percentage points (0 to 600).
    pub rsum: f64,
}

/// 1-based image-to-text ranks, one per image.
pub(crate) fn image_to_text_ranks(s: &Array2<f64>, caption_image: &[usize]) -> Vec<usize> {
    let n = s.nrows();
    let mut best = vec![f64::NEG_INFINITY; n];
    for (c, &i) in caption_image.iter().enumerate() {
        best[i] = best[i].max(s[[i, c]]);
    }
    s.outer_iter()
        .zip(&best)
        .map(|(row, &b)| 1 + row.iter().filter(|&&v| v > b).count())
        .collect()
}

/// 1-based text-to-image ranks, one per true caption.
pub(crate) fn text_to_image_ranks(s: &Array2<f64>, caption_image: &[usize]) -> Vec<usize> {
    caption_image
        .iter()
        .enumerate()
        .map(|(c, &i)| {
            let pos = s[[i, c]];
            1 + s.column(c).iter().filter(|&&v| v > pos).count()
        })
        .collect()
}

fn figures(ranks: &[usize]) -> RetrievalFigures {
    let n = ranks.len() as f64;
    let hits = |k: usize| ranks.iter().filter(|&&r| r <= k).count();
    let recall = |k: usize| 100.0 * hits(k) as f64 / n;
    // Retrieval is only computed with at least one query.
    let interval = |k: usize| {
        wilson(hits(k), ranks.len())
            .unwrap_or(Interval {
                low: 0.0,
                high: 1.0,
            })
            .scaled(100.0)
    };
    let as_f64: Vec<f64> = ranks.iter().map(|&r| r as f64).collect();
    RetrievalFigures {
        queries: ranks.len(),
        r_at_1: recall(1),
        r_at_5: recall(5),
        r_at_10: recall(10),
        median_rank: median(&as_f64),
        mean_rank: as_f64.iter().sum::<f64>() / n,
        intervals: RecallIntervals {
            r_at_1: interval(1),
            r_at_5: interval(5),
            r_at_10: interval(10),
        },
    }
}

/// Retrieval figures of similarity matrix `s` (images x true captions).
pub(crate) fn retrieval_report(s: &Array2<f64>, caption_image: &[usize]) -> RetrievalReport {
    let image_to_text = figures(&image_to_text_ranks(s, caption_image));
    let text_to_image = figures(&text_to_image_ranks(s, caption_image));
    let rsum = image_to_text.r_at_1
        + image_to_text.r_at_5
        + image_to_text.r_at_10
        + text_to_image.r_at_1
        + text_to_image.r_at_5
        + text_to_image.r_at_10;
    RetrievalReport {
        image_to_text,
        text_to_image,
        rsum,
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use ndarray::array;

    #[test]
    fn ranks_worked_by_hand_with_several_captions_per_image() {
        // Worked by hand; captions c0, c1 describe image 0, c2 image 1:
        //   S = [[0.8, 0.75, 0.65],
        //        [0.4, 0.7,  0.3 ]]
        // image 0: best true 0.8, nothing above -> rank 1;
        // image 1: true 0.3, 0.4 and 0.7 above -> rank 3.
        // c0: column [0.8, 0.4], own 0.8 -> 1; c1: [0.75, 0.7] -> 1;
        // c2: [0.65, 0.3], own image 1 at 0.3 -> 2.
        let s = array![[0.8, 0.75, 0.65], [0.4, 0.7, 0.3]];
        let map = [0, 0, 1];
        assert_eq!(image_to_text_ranks(&s, &map), vec![1, 3]);
        assert_eq!(text_to_image_ranks(&s, &map), vec![1, 1, 2]);
        let r = retrieval_report(&s, &map);
        assert!((r.image_to_text.r_at_1 - 50.0).abs() < 1e-12);
        assert_eq!(r.image_to_text.r_at_5, 100.0);
        assert_eq!(r.image_to_text.median_rank, 2.0);
        assert_eq!(r.image_to_text.mean_rank, 2.0);
        assert!((r.text_to_image.r_at_1 - 200.0 / 3.0).abs() < 1e-12);
        assert_eq!(r.text_to_image.median_rank, 1.0);
        assert!((r.text_to_image.mean_rank - 4.0 / 3.0).abs() < 1e-12);
        // rsum = 50 + 100 + 100 + 66.67 + 100 + 100
        assert!((r.rsum - (450.0 + 200.0 / 3.0)).abs() < 1e-9);
    }

    #[test]
    fn ties_count_in_the_models_favour() {
        // All cosines equal: nothing is strictly above any true item, every rank is 1.
        let s = array![[0.5, 0.5], [0.5, 0.5]];
        assert_eq!(image_to_text_ranks(&s, &[0, 1]), vec![1, 1]);
        assert_eq!(text_to_image_ranks(&s, &[0, 1]), vec![1, 1]);
    }

    #[test]
    fn rank_beyond_ten_misses_every_recall() {
        // Image 0's caption is beaten by 11 others (rank 12).
        let mut s = Array2::from_elem((12, 12), 0.0);
        for c in 0..12 {
            s[[c, c]] = 0.5;
        }
        for c in 1..12 {
            s[[0, c]] = 0.9;
        }
        let map: Vec<usize> = (0..12).collect();
        assert_eq!(image_to_text_ranks(&s, &map)[0], 12);
        let r = retrieval_report(&s, &map);
        assert!((r.image_to_text.r_at_10 - 100.0 * 11.0 / 12.0).abs() < 1e-12);
    }
}

//! ROC curve and area under it for two samples of scores: positives (true
//! captions' cosines) against negatives (their contrasts' cosines).
//!
//! The curve steps through every distinct score from the highest down, as
//! `sklearn.metrics.roc_curve(..., drop_intermediate=False)` does; the area is
//! the trapezoidal area under those points, which equals the Mann-Whitney
//! probability that a random positive outscores a random negative, ties
//! counted one half (Hanley and McNeil 1982, Radiology 143(1)), and
//! `sklearn.metrics.roc_auc_score`, which `tests/reference` checks.

use serde::{Deserialize, Serialize};

/// A ROC curve and its area.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, utoipa::ToSchema)]
pub struct Roc {
    /// Area under the curve, 0 to 1 (0.5: the scores do not separate).
    pub auc: f64,
    /// [false-positive rate, true-positive rate] from (0, 0) to (1, 1), one
    /// point per distinct score.
    pub points: Vec<[f64; 2]>,
}

/// The ROC of `positives` against `negatives`; `None` when either is empty
/// or a score is not finite.
pub fn roc(positives: &[f64], negatives: &[f64]) -> Option<Roc> {
    if positives.is_empty() || negatives.is_empty() {
        return None;
    }
    let mut scored: Vec<(f64, bool)> = positives
        .iter()
        .map(|&s| (s, true))
        .chain(negatives.iter().map(|&s| (s, false)))
        .collect();
    if scored.iter().any(|(s, _)| !s.is_finite()) {
        return None;
    }
    scored.sort_by(|a, b| b.0.total_cmp(&a.0));
    let (p, n) = (positives.len() as f64, negatives.len() as f64);
    let (mut tp, mut fp) = (0usize, 0usize);
    let mut points = vec![[0.0, 0.0]];
    let mut auc = 0.0;
    let mut k = 0;
    while k < scored.len() {
        let score = scored[k].0;
        while k < scored.len() && scored[k].0 == score {
            if scored[k].1 {
                tp += 1;
            } else {
                fp += 1;
            }
            k += 1;
        }
        let [x0, y0] = points[points.len() - 1];
        let (x, y) = (fp as f64 / n, tp as f64 / p);
        auc += (x - x0) * (y + y0) / 2.0;
        points.push([x, y]);
    }
    Some(Roc { auc, points })
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn auc_worked_by_hand_with_a_tie() {
        // Positives {0.9, 0.6, 0.4}, negatives {0.6, 0.3}. Pairs won by the
        // positive: 0.9 beats both (2), 0.6 beats 0.3 and ties 0.6 (1.5),
        // 0.4 beats 0.3 (1): 4.5 of 6 = 0.75, what
        // sklearn.metrics.roc_auc_score([1,1,1,0,0], [.9,.6,.4,.6,.3]) gives.
        let r = roc(&[0.9, 0.6, 0.4], &[0.6, 0.3]).unwrap();
        assert!((r.auc - 0.75).abs() < 1e-12, "{r:?}");
        // roc_curve(..., drop_intermediate=False): fpr [0, 0, .5, .5, 1],
        // tpr [0, 1/3, 2/3, 1, 1].
        let third = 1.0 / 3.0;
        let want = [
            [0.0, 0.0],
            [0.0, third],
            [0.5, 2.0 * third],
            [0.5, 1.0],
            [1.0, 1.0],
        ];
        assert_eq!(r.points.len(), want.len());
        for (got, want) in r.points.iter().zip(want) {
            assert!((got[0] - want[0]).abs() < 1e-12 && (got[1] - want[1]).abs() < 1e-12);
        }
    }

    #[test]
    fn separated_reversed_and_empty_samples() {
        assert_eq!(roc(&[0.9, 0.8], &[0.1]).unwrap().auc, 1.0);
        assert_eq!(roc(&[0.1], &[0.9, 0.8]).unwrap().auc, 0.0);
        // All scores equal: one step from (0, 0) to (1, 1), area one half.
        assert_eq!(roc(&[0.5, 0.5], &[0.5]).unwrap().auc, 0.5);
        assert_eq!(roc(&[], &[0.5]), None);
        assert_eq!(roc(&[f64::NAN], &[0.5]), None);
    }
}

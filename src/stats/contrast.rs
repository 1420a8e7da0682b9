//! Contrast captions: a true caption with one fact changed (colour, shape,
//! size, relation, count...). A reward that can tell them apart ranks the
//! true caption strictly above its contrast for the same image.

use std::collections::BTreeMap;

use serde::{Deserialize, Serialize};

use super::intervals::{wilson, Interval};
use super::roc::{roc, Roc};

/// How often true captions beat their contrasts, for one label or overall.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, utoipa::ToSchema)]
pub struct ContrastFigures {
    /// Contrast pairs.
    pub count: usize,
    /// Pairs where cos(image, true caption) > cos(image, contrast), strictly.
    pub wins: usize,
    /// Pairs where the two cosines are exactly equal (counted as not won).
    pub ties: usize,
    /// wins / count; null when there are no pairs.
    pub rate: Option<f64>,
    /// Mean of cos(image, true caption) - cos(image, contrast); null when
    /// there are no pairs.
    pub mean_gap: Option<f64>,
    /// 95 % Wilson score interval of `rate` (see [`super::intervals`]);
    /// null when there are no pairs.
    pub rate_interval: Option<Interval>,
    /// Area under the ROC curve of the true captions' cosines against the
    /// contrasts' cosines, unpaired (see [`super::roc`]); null when there are
    /// no pairs.
    pub auc: Option<f64>,
}

/// Contrast figures overall and per `changed` label.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, utoipa::ToSchema)]
pub struct ContrastReport {
    /// Every contrast pair.
    pub overall: ContrastFigures,
    /// Per label, in label order.
    pub by_label: BTreeMap<String, ContrastFigures>,
    /// ROC curve of the true captions' cosines against the contrasts' per
    /// label, in label order.
    pub roc: BTreeMap<String, Roc>,
}

#[derive(Default)]
struct Tally {
    count: usize,
    wins: usize,
    ties: usize,
    gap_sum: f64,
    true_cos: Vec<f64>,
    contrast_cos: Vec<f64>,
}

impl Tally {
    fn add(&mut self, true_cos: f64, contrast_cos: f64) {
        self.count += 1;
        self.wins += usize::from(true_cos > contrast_cos);
        self.ties += usize::from(true_cos == contrast_cos);
        self.gap_sum += true_cos - contrast_cos;
        self.true_cos.push(true_cos);
        self.contrast_cos.push(contrast_cos);
    }

    fn roc(&self) -> Option<Roc> {
        roc(&self.true_cos, &self.contrast_cos)
    }

    fn figures(&self) -> ContrastFigures {
        let n = self.count as f64;
        let some = |v: f64| (self.count > 0).then_some(v);
        ContrastFigures {
            count: self.count,
            wins: self.wins,
            ties: self.ties,
            rate: some(self.wins as f64 / n),
            mean_gap: some(self.gap_sum / n),
            rate_interval: wilson(self.wins, self.count),
            auc: self.roc().map(|r| r.auc),
        }
    }
}

/// Contrast figures from the cosines of each contrast's true caption and of
/// the contrast itself (both with the true caption's image), and its label.
pub(crate) fn contrast_report(
    true_cos: &[f64],
    contrast_cos: &[f64],
    labels: &[String],
) -> ContrastReport {
    let mut overall = Tally::default();
    let mut by_label: BTreeMap<&str, Tally> = BTreeMap::new();
    for ((&t, &c), label) in true_cos.iter().zip(contrast_cos).zip(labels) {
        overall.add(t, c);
        by_label.entry(label).or_default().add(t, c);
    }
    ContrastReport {
        overall: overall.figures(),
        roc: by_label
            .iter()
            .filter_map(|(k, v)| Some((k.to_string(), v.roc()?)))
            .collect(),
        by_label: by_label
            .into_iter()
            .map(|(k, v)| (k.to_string(), v.figures()))
            .collect(),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn rates_and_gaps_worked_by_hand() {
        // Worked by hand: colour pairs (0.8 vs 0.6) won, (0.5 vs 0.5) tied;
        // shape (0.4 vs 0.7) lost. colour: rate 1/2, gap (0.2 + 0)/2 = 0.1;
        // shape: rate 0, gap -0.3; overall: rate 1/3, gap -0.1/3.
        let labels: Vec<String> = ["colour", "colour", "shape"].map(String::from).to_vec();
        let r = contrast_report(&[0.8, 0.5, 0.4], &[0.6, 0.5, 0.7], &labels);
        let colour = &r.by_label["colour"];
        assert_eq!((colour.count, colour.wins, colour.ties), (2, 1, 1));
        assert_eq!(colour.rate, Some(0.5));
        assert!((colour.mean_gap.unwrap() - 0.1).abs() < 1e-12);
        let shape = &r.by_label["shape"];
        assert_eq!(shape.rate, Some(0.0));
        assert!((shape.mean_gap.unwrap() + 0.3).abs() < 1e-12);
        assert!((r.overall.rate.unwrap() - 1.0 / 3.0).abs() < 1e-12);
        assert!((r.overall.mean_gap.unwrap() + 0.1 / 3.0).abs() < 1e-12);
        // colour's ROC: positives {0.8, 0.5} against negatives {0.6, 0.5}:
        // 0.8 beats both (2), 0.5 ties 0.5 (0.5): 2.5 / 4 (the Mann-Whitney
        // count of Hanley and McNeil 1982).
        assert!((colour.auc.unwrap() - 0.625).abs() < 1e-12);
        assert_eq!(r.roc["colour"].points.last(), Some(&[1.0, 1.0]));
        // Wilson interval of 1 win in 2 pairs is symmetric about 1/2.
        let i = colour.rate_interval.unwrap();
        assert!((i.low + i.high - 1.0).abs() < 1e-12);
    }

    #[test]
    fn no_contrasts_give_nulls_not_nans() {
        let r = contrast_report(&[], &[], &[]);
        assert_eq!(r.overall.count, 0);
        assert_eq!(r.overall.rate, None);
        assert!(r.by_label.is_empty());
        assert_eq!((r.overall.rate_interval, r.overall.auc), (None, None));
    }
}

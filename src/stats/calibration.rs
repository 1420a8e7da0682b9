//! Calibration of one bundle on a labelled probe set: hinge losses, cosine
//! distributions, retrieval, contrast rates, and the reward scale they
//! suggest. Every figure is defined in `docs/statistics.md`.

use serde::{Deserialize, Serialize};

use super::contrast::{contrast_report, ContrastReport};
use super::hinge::{hinge_report, HingeReport, DEFAULT_BATCH_IMAGES, DEFAULT_MARGIN};
use super::pairs::{ProbeVectors, Similarities};
use super::retrieval::{retrieval_report, RetrievalReport};
use super::summary::{round_range, Distribution};
use super::StatsError;

/// Default number of histogram bins over the report's round range.
pub const DEFAULT_HISTOGRAM_BINS: usize = 40;

/// Most histogram bins accepted; more would only bloat reports.
pub const MAX_HISTOGRAM_BINS: usize = 2000;

/// Example pairs listed per kind (lowest true pairs, lost contrasts): a
/// screenful to look at, not a statistic.
pub const EXAMPLE_PAIRS: usize = 8;

/// One pair shown as an example, with its image and captions.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, utoipa::ToSchema)]
pub struct ExamplePair {
    /// The image, as named in the probe set.
    pub image: String,
    /// Line of the image's row in the probe file.
    pub image_line: usize,
    /// The true caption.
    pub caption: String,
    /// cos(image, true caption).
    pub true_cos: f64,
    /// For a contrast: the altered caption; null for a true pair.
    pub contrast: Option<String>,
    /// For a contrast: what was changed.
    pub changed: Option<String>,
    /// For a contrast: cos(image, contrast).
    pub contrast_cos: Option<f64>,
}

/// Pairs to look at: where the reward is least sure, and where it is wrong.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, utoipa::ToSchema)]
pub struct Examples {
    /// The [`EXAMPLE_PAIRS`] true pairs of lowest cosine, lowest first, ties
    /// by caption order.
    pub lowest_true: Vec<ExamplePair>,
    /// Up to [`EXAMPLE_PAIRS`] contrasts not beaten by their true caption
    /// (contrast cosine >= true cosine), by increasing true - contrast gap,
    /// ties by contrast order.
    pub lost_contrasts: Vec<ExamplePair>,
}

/// Settings of a calibration.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, utoipa::ToSchema)]
#[serde(default, deny_unknown_fields)]
pub struct CalibrationOptions {
    /// Hinge margin alpha (VSE++ uses 0.2).
    pub margin: f64,
    /// Images per batch for the batch-averaged hinge losses, at least 2.
    pub batch_images: usize,
    /// Histogram bins over the report's round range of cosines
    /// ([`round_range`]), 1 to [`MAX_HISTOGRAM_BINS`].
    pub histogram_bins: usize,
}

impl Default for CalibrationOptions {
    fn default() -> Self {
        CalibrationOptions {
            margin: DEFAULT_MARGIN,
            batch_images: DEFAULT_BATCH_IMAGES,
            histogram_bins: DEFAULT_HISTOGRAM_BINS,
        }
    }
}

impl CalibrationOptions {
    /// Refuses settings no figure can be computed with.
    pub fn validate(&self) -> Result<(), StatsError> {
        if !(self.margin.is_finite() && self.margin >= 0.0) {
            return Err(StatsError::BadOption {
                name: "margin",
                why: format!("must be a finite number >= 0, got {}", self.margin),
            });
        }
        if self.batch_images < 2 {
            return Err(StatsError::BadOption {
                name: "batch_images",
                why: format!(
                    "must be at least 2 so that a batch has negatives, got {}",
                    self.batch_images
                ),
            });
        }
        if !(1..=MAX_HISTOGRAM_BINS).contains(&self.histogram_bins) {
            return Err(StatsError::BadOption {
                name: "histogram_bins",
                why: format!(
                    "must be between 1 and {MAX_HISTOGRAM_BINS}, got {}",
                    self.histogram_bins
                ),
            });
        }
        Ok(())
    }
}

/// Sizes of the probe set a report was computed on.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, utoipa::ToSchema)]
pub struct ProbeCounts {
    /// Images (N).
    pub images: usize,
    /// True captions (M).
    pub captions: usize,
    /// Contrast captions (K).
    pub contrasts: usize,
    /// Vector length (d).
    pub dimension: usize,
}

/// Cosine distributions of the probe's pairs.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, utoipa::ToSchema)]
pub struct CosineReport {
    /// cos(image, caption) of every true pair (M values).
    pub true_pairs: Distribution,
    /// Per true pair (i, c): the largest cosine of image i with a caption of
    /// another image (M values; an image's value repeats once per caption).
    pub hardest_negatives: Distribution,
    /// cos(i, c') of every image with every caption of another image.
    pub all_negatives: Distribution,
    /// cos(image, contrast caption) of every contrast pair; null without contrasts.
    pub contrasts: Option<Distribution>,
}

/// An affine reward scale `a * c + b`, the shape of `{"kind": "affine"}` in
/// `POST /v1/rewards`.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, utoipa::ToSchema)]
pub struct AffineScale {
    /// Slope.
    pub a: f64,
    /// Offset.
    pub b: f64,
}

/// Reward scales that put this bundle's typical cosines at fixed points.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, utoipa::ToSchema)]
pub struct SuggestedCalibration {
    /// Median true-pair cosine (m_t).
    pub median_true: f64,
    /// Median hardest-negative cosine (m_h).
    pub median_hardest_negative: f64,
    /// a = 1 / (m_t - m_h), b = -a m_h: sends m_h to 0 and m_t to 1; null
    /// when m_t <= m_h (the bundle does not separate them).
    pub affine: Option<AffineScale>,
    /// CLIP-S weight w = 1 / m_t (CLIPScore, Hessel et al. 2021, eq. 1:
    /// w * max(c, 0)), putting the median true pair at reward 1; null when m_t <= 0.
    pub clip_s_weight: Option<f64>,
}

/// Every calibration figure of one bundle on one probe set.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, utoipa::ToSchema)]
pub struct CalibrationReport {
    /// The bundle, as named in [`ProbeVectors::bundle`].
    pub bundle: String,
    /// Probe sizes.
    pub counts: ProbeCounts,
    /// Settings used.
    pub options: CalibrationOptions,
    /// VSE++ hinge losses and margin violations.
    pub hinge: HingeReport,
    /// Cosine distributions.
    pub cosines: CosineReport,
    /// Retrieval by the standard protocol.
    pub retrieval: RetrievalReport,
    /// True caption against contrast, overall and per label.
    pub contrast: ContrastReport,
    /// Suggested reward scales.
    pub suggested: SuggestedCalibration,
    /// Pairs to look at.
    pub examples: Examples,
}

/// Calibrates one bundle: every figure of [`CalibrationReport`].
///
/// Needs at least 2 images (so that every true pair has negatives) and
/// L2-normalised rows (see [`ProbeVectors::check`]).
pub fn calibrate(
    vectors: &ProbeVectors,
    options: &CalibrationOptions,
) -> Result<CalibrationReport, StatsError> {
    options.validate()?;
    vectors.check()?;
    let sims = vectors.similarities();
    let range = cosine_range(&[&sims]);
    calibrate_checked(vectors, &sims, options, range)
}

/// The round histogram range ([`round_range`]) enclosing every cosine of
/// the given similarities: all image-caption pairs and all contrast pairs.
pub(crate) fn cosine_range(all: &[&Similarities]) -> (f64, f64) {
    let (min, max) = all
        .iter()
        .flat_map(|sims| sims.s.iter().chain(&sims.contrast_cos))
        .filter(|v| v.is_finite())
        .fold((f64::INFINITY, f64::NEG_INFINITY), |(lo, hi), &v| {
            (lo.min(v), hi.max(v))
        });
    round_range(min, max)
}

/// [`calibrate`] on vectors already checked, with their similarities and
/// the histograms' range.
pub(crate) fn calibrate_checked(
    v: &ProbeVectors,
    sims: &Similarities,
    options: &CalibrationOptions,
    range: (f64, f64),
) -> Result<CalibrationReport, StatsError> {
    let n = v.image_count();
    if n < 2 {
        return Err(StatsError::TooFewImages { images: n });
    }
    let s = &sims.s;
    let bins = options.histogram_bins;

    // Hardest negative of each image: the best caption of another image.
    let mut hardest = vec![f64::NEG_INFINITY; n];
    let mut all_negatives = Vec::with_capacity(n * v.caption_count());
    for (i, row) in s.outer_iter().enumerate() {
        for (&x, &owner) in row.iter().zip(&v.caption_image) {
            if owner != i {
                hardest[i] = hardest[i].max(x);
                all_negatives.push(x);
            }
        }
    }
    let hardest_per_pair: Vec<f64> = v.caption_image.iter().map(|&i| hardest[i]).collect();
    // Every image has a caption and there are two images, so every image has
    // a negative and no entry of `hardest` is left at -inf.
    let contrast_true: Vec<f64> = v.contrast_from.iter().map(|&c| sims.true_cos[c]).collect();

    let cosines = CosineReport {
        true_pairs: Distribution::of(sims.true_cos.clone(), bins, range, "true-pair cosines")?,
        hardest_negatives: Distribution::of(
            hardest_per_pair,
            bins,
            range,
            "hardest-negative cosines",
        )?,
        all_negatives: Distribution::of(all_negatives, bins, range, "negative cosines")?,
        contrasts: if sims.contrast_cos.is_empty() {
            None
        } else {
            Some(Distribution::of(
                sims.contrast_cos.clone(),
                bins,
                range,
                "contrast cosines",
            )?)
        },
    };
    let examples = examples(v, sims, &contrast_true);
    let suggested = suggest(
        cosines.true_pairs.quantiles.p50,
        cosines.hardest_negatives.quantiles.p50,
    );
    Ok(CalibrationReport {
        bundle: v.bundle.clone(),
        counts: ProbeCounts {
            images: n,
            captions: v.caption_count(),
            contrasts: v.contrast_count(),
            dimension: v.dimension(),
        },
        options: options.clone(),
        hinge: hinge_report(s, &v.caption_image, options.margin, options.batch_images),
        cosines,
        retrieval: retrieval_report(s, &v.caption_image),
        contrast: contrast_report(&contrast_true, &sims.contrast_cos, &v.contrast_labels),
        suggested,
        examples,
    })
}

fn examples(v: &ProbeVectors, sims: &Similarities, contrast_true: &[f64]) -> Examples {
    let true_pair = |c: usize| {
        let i = v.caption_image[c];
        ExamplePair {
            image: v.image_names[i].clone(),
            image_line: v.image_lines[i],
            caption: v.caption_texts[c].clone(),
            true_cos: sims.true_cos[c],
            contrast: None,
            changed: None,
            contrast_cos: None,
        }
    };
    let mut order: Vec<usize> = (0..sims.true_cos.len()).collect();
    order.sort_by(|&a, &b| {
        sims.true_cos[a]
            .total_cmp(&sims.true_cos[b])
            .then(a.cmp(&b))
    });
    let lowest_true = order
        .into_iter()
        .take(EXAMPLE_PAIRS)
        .map(true_pair)
        .collect();
    let gap = |k: usize| contrast_true[k] - sims.contrast_cos[k];
    let mut lost: Vec<usize> = (0..contrast_true.len())
        .filter(|&k| gap(k) <= 0.0)
        .collect();
    lost.sort_by(|&a, &b| gap(a).total_cmp(&gap(b)).then(a.cmp(&b)));
    let lost_contrasts = lost
        .into_iter()
        .take(EXAMPLE_PAIRS)
        .map(|k| ExamplePair {
            contrast: Some(v.contrast_texts[k].clone()),
            changed: Some(v.contrast_labels[k].clone()),
            contrast_cos: Some(sims.contrast_cos[k]),
            ..true_pair(v.contrast_from[k])
        })
        .collect();
    Examples {
        lowest_true,
        lost_contrasts,
    }
}

fn suggest(median_true: f64, median_hardest_negative: f64) -> SuggestedCalibration {
    let spread = median_true - median_hardest_negative;
    let affine = (spread > 0.0).then(|| {
        let a = 1.0 / spread;
        AffineScale {
            a,
            b: -a * median_hardest_negative,
        }
    });
    SuggestedCalibration {
        median_true,
        median_hardest_negative,
        affine,
        clip_s_weight: (median_true > 0.0).then(|| 1.0 / median_true),
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::stats::pairs::tests::from_similarity;
    use ndarray::array;

    #[test]
    fn suggested_scales_worked_by_hand() {
        // m_t = 0.3, m_h = 0.1: a = 1/0.2 = 5, b = -0.5; 5*0.1-0.5 = 0, 5*0.3-0.5 = 1.
        // CLIP-S w = 1/0.3.
        let s = suggest(0.3, 0.1);
        let affine = s.affine.unwrap();
        assert!((affine.a - 5.0).abs() < 1e-12);
        assert!((affine.b + 0.5).abs() < 1e-12);
        assert!((s.clip_s_weight.unwrap() - 1.0 / 0.3).abs() < 1e-12);
        // No separation, no affine scale; a negative median, no CLIP-S weight.
        let s = suggest(-0.1, 0.2);
        assert_eq!(s.affine, None);
        assert_eq!(s.clip_s_weight, None);
    }

    #[test]
    fn hardest_negatives_repeat_per_caption_and_exclude_own_captions() {
        // Worked by hand; c0, c1 describe image 0, c2 image 1:
        //   S = [[0.8, 0.65, 0.6],
        //        [0.4, 0.7,  0.3]]
        // image 0's negatives: {c2} -> hardest 0.6 (for c0 and c1);
        // image 1's negatives: {c0, c1} -> hardest 0.7 (for c2).
        // Hardest per pair [0.6, 0.6, 0.7]: median 0.6. True [0.8, 0.65, 0.3]:
        // median 0.65. All negatives {0.6, 0.4, 0.7}.
        let v = from_similarity(&array![[0.8, 0.65, 0.6], [0.4, 0.7, 0.3]], vec![0, 0, 1]);
        let r = calibrate(&v, &CalibrationOptions::default()).unwrap();
        let h = &r.cosines.hardest_negatives;
        assert_eq!(h.count, 3);
        assert!((h.quantiles.p50 - 0.6).abs() < 1e-12);
        assert!((h.max - 0.7).abs() < 1e-12);
        assert_eq!(r.cosines.all_negatives.count, 3);
        assert!((r.cosines.all_negatives.mean - 1.7 / 3.0).abs() < 1e-12);
        assert!((r.suggested.median_true - 0.65).abs() < 1e-12);
        // a = 1 / (0.65 - 0.6) = 20
        assert!((r.suggested.affine.as_ref().unwrap().a - 20.0).abs() < 1e-9);
        assert_eq!(r.counts.captions, 3);
        assert!(r.cosines.contrasts.is_none());
        // Lowest true pair: c2 (0.3), then c1 (0.65), then c0 (0.8).
        let lowest: Vec<f64> = r.examples.lowest_true.iter().map(|e| e.true_cos).collect();
        assert_eq!(lowest, vec![0.3, 0.65, 0.8]);
        assert!(r.examples.lost_contrasts.is_empty());
    }

    #[test]
    fn one_image_is_refused_with_a_reason() {
        let v = from_similarity(&array![[0.8]], vec![0]);
        let err = calibrate(&v, &CalibrationOptions::default()).unwrap_err();
        assert!(matches!(err, StatsError::TooFewImages { images: 1 }));
    }

    #[test]
    fn options_out_of_range_name_the_field() {
        let bad = CalibrationOptions {
            batch_images: 1,
            ..Default::default()
        };
        let err = bad.validate().unwrap_err().to_string();
        assert!(err.contains("batch_images"), "{err}");
    }
}

//! The bidirectional hinge ranking losses of VSE++ (Faghri et al. 2018,
//! "VSE++: Improving Visual-Semantic Embeddings with Hard Negatives", eq. 1
//! for the sum of hinges and eq. 2 for the max of hinges), evaluated on a
//! probe set: how far a bundle is from the margin its training asked for.
//!
//! For a positive pair (i, c), caption c describing image i, with cosine s:
//!
//! - the *caption negatives* are the captions c' of other images (captions of
//!   image i itself are never negatives of i, unlike the VSE++ reference code
//!   which only masks the diagonal of a batch);
//! - the *image negatives* are the images i' other than i;
//! - SH(i, c) = sum_c' [a - s(i,c) + s(i,c')]_+ + sum_i' [a - s(i,c) + s(i',c)]_+;
//! - MH(i, c) = max_c' [a - s(i,c) + s(i,c')]_+ + max_i' [a - s(i,c) + s(i',c)]_+,
//!   a max over no negatives being 0.
//!
//! Figures are means over positive pairs (the paper's batch loss is the sum;
//! the mean does not grow with the number of captions).

use ndarray::Array2;
use serde::{Deserialize, Serialize};

/// Default hinge margin (alpha), VSE++'s value.
pub const DEFAULT_MARGIN: f64 = 0.2;

/// Default images per batch for the batch-averaged losses, VSE++'s batch size.
pub const DEFAULT_BATCH_IMAGES: usize = 128;

/// Hinge losses of one set of images with their true captions.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, utoipa::ToSchema)]
pub struct HingeFigures {
    /// Positive pairs (true captions) the means are over.
    pub positives: usize,
    /// Mean SH, both directions.
    pub sum_of_hinges: f64,
    /// Mean of SH's caption-negative term.
    pub sum_of_hinges_caption_negatives: f64,
    /// Mean of SH's image-negative term.
    pub sum_of_hinges_image_negatives: f64,
    /// Mean MH, both directions.
    pub max_of_hinges: f64,
    /// Mean of MH's caption-negative term.
    pub max_of_hinges_caption_negatives: f64,
    /// Mean of MH's image-negative term.
    pub max_of_hinges_image_negatives: f64,
    /// Fraction of positive pairs with some negative (of either kind) within
    /// the margin: a - s(i,c) + s(negative) > 0.
    pub violation_rate: f64,
    /// Fraction of positive pairs with some caption negative within the margin.
    pub violation_rate_caption_negatives: f64,
    /// Fraction of positive pairs with some image negative within the margin.
    pub violation_rate_image_negatives: f64,
}

/// The hinge losses of a probe set, as one batch and as fixed-size batches.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, utoipa::ToSchema)]
pub struct HingeReport {
    /// The margin alpha.
    pub margin: f64,
    /// All probe images and captions as one batch: every other image and every
    /// caption of another image is a negative.
    pub whole_set: HingeFigures,
    /// The probe cut into batches as a training loop would see it.
    pub batched: BatchedHinge,
}

/// Hinge losses averaged over fixed-size batches.
///
/// Batches are consecutive runs of `batch_images` images in probe order, each
/// with its images' true captions; negatives come from the same batch only.
/// A final partial batch is dropped when there is at least one full batch (as
/// a loader with `drop_last` does, so every batch has the same number of
/// negatives); with fewer images than `batch_images`, the one batch is the
/// whole set.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, utoipa::ToSchema)]
pub struct BatchedHinge {
    /// Images per batch asked for.
    pub batch_images: usize,
    /// Batches evaluated.
    pub batches: usize,
    /// Images left out in the dropped final partial batch.
    pub dropped_images: usize,
    /// Each figure averaged over batches, every batch weighted equally;
    /// `positives` is the total over batches.
    pub mean: HingeFigures,
}

/// Hinge losses of the images `images` (rows of `s`) with the captions
/// `captions` (columns of `s`; all true captions of those images).
pub(crate) fn hinge_figures(
    s: &Array2<f64>,
    caption_image: &[usize],
    images: &[usize],
    captions: &[usize],
    margin: f64,
) -> HingeFigures {
    let mut sums = [0.0f64; 4]; // SH caption, SH image, MH caption, MH image
    let mut violations = [0usize; 3]; // any, caption, image
    for &c in captions {
        let i = caption_image[c];
        let pos = s[[i, c]];
        let (mut sh_c, mut mh_c) = (0.0f64, 0.0f64);
        for &c2 in captions {
            if caption_image[c2] != i {
                let h = margin - pos + s[[i, c2]];
                if h > 0.0 {
                    sh_c += h;
                    mh_c = mh_c.max(h);
                }
            }
        }
        let (mut sh_i, mut mh_i) = (0.0f64, 0.0f64);
        for &i2 in images {
            if i2 != i {
                let h = margin - pos + s[[i2, c]];
                if h > 0.0 {
                    sh_i += h;
                    mh_i = mh_i.max(h);
                }
            }
        }
        sums[0] += sh_c;
        sums[1] += sh_i;
        sums[2] += mh_c;
        sums[3] += mh_i;
        violations[0] += usize::from(mh_c > 0.0 || mh_i > 0.0);
        violations[1] += usize::from(mh_c > 0.0);
        violations[2] += usize::from(mh_i > 0.0);
    }
    let p = captions.len().max(1) as f64;
    HingeFigures {
        positives: captions.len(),
        sum_of_hinges: (sums[0] + sums[1]) / p,
        sum_of_hinges_caption_negatives: sums[0] / p,
        sum_of_hinges_image_negatives: sums[1] / p,
        max_of_hinges: (sums[2] + sums[3]) / p,
        max_of_hinges_caption_negatives: sums[2] / p,
        max_of_hinges_image_negatives: sums[3] / p,
        violation_rate: violations[0] as f64 / p,
        violation_rate_caption_negatives: violations[1] as f64 / p,
        violation_rate_image_negatives: violations[2] as f64 / p,
    }
}

/// The whole-set and batch-averaged hinge losses of a probe.
pub(crate) fn hinge_report(
    s: &Array2<f64>,
    caption_image: &[usize],
    margin: f64,
    batch_images: usize,
) -> HingeReport {
    let n = s.nrows();
    let all_images: Vec<usize> = (0..n).collect();
    let all_captions: Vec<usize> = (0..caption_image.len()).collect();
    let whole_set = hinge_figures(s, caption_image, &all_images, &all_captions, margin);

    let full = n / batch_images;
    let (batches, dropped_images): (Vec<(usize, usize)>, usize) = if full == 0 {
        (vec![(0, n)], 0)
    } else {
        (
            (0..full)
                .map(|b| (b * batch_images, (b + 1) * batch_images))
                .collect(),
            n - full * batch_images,
        )
    };
    let mut captions_of: Vec<Vec<usize>> = vec![Vec::new(); n];
    for (c, &i) in caption_image.iter().enumerate() {
        captions_of[i].push(c);
    }
    let per_batch: Vec<HingeFigures> = batches
        .iter()
        .map(|&(start, end)| {
            let images: Vec<usize> = (start..end).collect();
            let captions: Vec<usize> = images
                .iter()
                .flat_map(|&i| captions_of[i].iter().copied())
                .collect();
            hinge_figures(s, caption_image, &images, &captions, margin)
        })
        .collect();
    HingeReport {
        margin,
        whole_set,
        batched: BatchedHinge {
            batch_images,
            batches: per_batch.len(),
            dropped_images,
            mean: mean_of(&per_batch),
        },
    }
}

fn mean_of(figures: &[HingeFigures]) -> HingeFigures {
    let b = figures.len() as f64;
    let avg = |f: fn(&HingeFigures) -> f64| figures.iter().map(f).sum::<f64>() / b;
    HingeFigures {
        positives: figures.iter().map(|f| f.positives).sum(),
        sum_of_hinges: avg(|f| f.sum_of_hinges),
        sum_of_hinges_caption_negatives: avg(|f| f.sum_of_hinges_caption_negatives),
        sum_of_hinges_image_negatives: avg(|f| f.sum_of_hinges_image_negatives),
        max_of_hinges: avg(|f| f.max_of_hinges),
        max_of_hinges_caption_negatives: avg(|f| f.max_of_hinges_caption_negatives),
        max_of_hinges_image_negatives: avg(|f| f.max_of_hinges_image_negatives),
        violation_rate: avg(|f| f.violation_rate),
        violation_rate_caption_negatives: avg(|f| f.violation_rate_caption_negatives),
        violation_rate_image_negatives: avg(|f| f.violation_rate_image_negatives),
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use ndarray::array;

    const EPS: f64 = 1e-12;

    fn whole(s: &Array2<f64>, caption_image: &[usize]) -> HingeFigures {
        let images: Vec<usize> = (0..s.nrows()).collect();
        let captions: Vec<usize> = (0..s.ncols()).collect();
        hinge_figures(s, caption_image, &images, &captions, 0.2)
    }

    #[test]
    fn two_by_two_worked_by_hand() {
        // VSE++ eq. 1 and 2, alpha = 0.2, worked by hand:
        //   S = [[0.6, 0.5],    pair (0,0), s = 0.6: caption neg c1: 0.2-0.6+0.5 = 0.1
        //        [0.7, 0.4]]                         image neg i1:   0.2-0.6+0.7 = 0.3
        //                       pair (1,1), s = 0.4: caption neg c0: 0.2-0.4+0.7 = 0.5
        //                                            image neg i0:   0.2-0.4+0.5 = 0.3
        // One negative per direction, so SH = MH: per pair 0.4 and 0.8, mean 0.6;
        // caption side (0.1+0.5)/2 = 0.3, image side 0.3; both pairs violate.
        let f = whole(&array![[0.6, 0.5], [0.7, 0.4]], &[0, 1]);
        assert_eq!(f.positives, 2);
        assert!((f.sum_of_hinges - 0.6).abs() < EPS);
        assert!((f.max_of_hinges - 0.6).abs() < EPS);
        assert!((f.sum_of_hinges_caption_negatives - 0.3).abs() < EPS);
        assert!((f.sum_of_hinges_image_negatives - 0.3).abs() < EPS);
        assert_eq!(f.violation_rate, 1.0);
    }

    #[test]
    fn three_by_three_separates_sum_from_max() {
        // Worked by hand, alpha = 0.2, caption c describes image c:
        //   S = [[0.7,  0.6, 0.4 ],
        //        [0.45, 0.5, 0.65],
        //        [0.6,  0.1, 0.9 ]]
        // (0,0) s=0.7: caption negs row 0: 0.1, (-0.1)->0;  image negs col 0: (-0.05)->0, 0.1
        // (1,1) s=0.5: caption negs row 1: 0.15, 0.35;      image negs col 1: 0.3, (-0.2)->0
        // (2,2) s=0.9: caption negs row 2: (-0.1), (-0.6);  image negs col 2: (-0.3), (-0.05)
        // SH caption terms 0.1, 0.5, 0 -> mean 0.2; image terms 0.1, 0.3, 0 -> 0.4/3
        // MH caption terms 0.1, 0.35, 0 -> 0.15;    image terms 0.1, 0.3, 0 -> 0.4/3
        // SH = 1.0/3, MH = 0.85/3; pairs 0 and 1 violate on both sides: 2/3.
        let s = array![[0.7, 0.6, 0.4], [0.45, 0.5, 0.65], [0.6, 0.1, 0.9]];
        let f = whole(&s, &[0, 1, 2]);
        assert!((f.sum_of_hinges_caption_negatives - 0.2).abs() < EPS);
        assert!((f.sum_of_hinges_image_negatives - 0.4 / 3.0).abs() < EPS);
        assert!((f.sum_of_hinges - 1.0 / 3.0).abs() < EPS);
        assert!((f.max_of_hinges_caption_negatives - 0.15).abs() < EPS);
        assert!((f.max_of_hinges_image_negatives - 0.4 / 3.0).abs() < EPS);
        assert!((f.max_of_hinges - 0.85 / 3.0).abs() < EPS);
        assert!((f.violation_rate - 2.0 / 3.0).abs() < EPS);
        assert!((f.violation_rate_caption_negatives - 2.0 / 3.0).abs() < EPS);
        assert!((f.violation_rate_image_negatives - 2.0 / 3.0).abs() < EPS);
    }

    #[test]
    fn captions_of_the_same_image_are_not_negatives() {
        // Worked by hand, alpha = 0.2; captions c0, c1 describe image 0, c2 image 1:
        //   S = [[0.8, 0.75, 0.65],
        //        [0.4, 0.7,  0.3 ]]
        // (0,c0) s=0.8:  caption negs {c2}: 0.05            image negs {i1}: (-0.2)->0
        //                (c1 is not a negative: were it, 0.2-0.8+0.75 = 0.15 would be added)
        // (0,c1) s=0.75: caption negs {c2}: 0.1             image negs {i1}: 0.15
        // (1,c2) s=0.3:  caption negs {c0,c1}: 0.3, 0.6     image negs {i0}: 0.55
        // SH = (0.05 + 0.25 + 1.45)/3 = 1.75/3; MH = (0.05 + 0.25 + 1.15)/3 = 1.45/3;
        // SH caption side (0.05+0.1+0.9)/3 = 0.35; image side (0+0.15+0.55)/3 = 0.7/3.
        let s = array![[0.8, 0.75, 0.65], [0.4, 0.7, 0.3]];
        let f = whole(&s, &[0, 0, 1]);
        assert_eq!(f.positives, 3);
        assert!((f.sum_of_hinges - 1.75 / 3.0).abs() < EPS);
        assert!((f.max_of_hinges - 1.45 / 3.0).abs() < EPS);
        assert!((f.sum_of_hinges_caption_negatives - 0.35).abs() < EPS);
        assert!((f.sum_of_hinges_image_negatives - 0.7 / 3.0).abs() < EPS);
        // (0,c0) violates only on the caption side: all three pairs violate
        // somewhere, two of three on the image side.
        assert_eq!(f.violation_rate, 1.0);
        assert!((f.violation_rate_image_negatives - 2.0 / 3.0).abs() < EPS);
    }

    #[test]
    fn batches_drop_the_partial_tail_and_see_only_their_own_negatives() {
        // Worked by hand: 5 images, caption c describes image c, batches of 2:
        // batches {0,1} and {2,3}, image 4 dropped. Within {0,1} the only
        // negatives are each other: S[0..2, 0..2] = [[0.6, 0.5], [0.7, 0.4]] is
        // the 2x2 example above (SH 0.6); {2,3} has S = [[0.9, 0.1], [0.1, 0.9]]:
        // hinges 0.2-0.9+0.1 < 0, SH 0. Mean over batches (0.6 + 0)/2 = 0.3,
        // violation rates (1 + 0)/2 = 0.5.
        let mut s = Array2::from_elem((5, 5), 0.95);
        s.slice_mut(ndarray::s![0..2, 0..2])
            .assign(&array![[0.6, 0.5], [0.7, 0.4]]);
        s.slice_mut(ndarray::s![2..4, 2..4])
            .assign(&array![[0.9, 0.1], [0.1, 0.9]]);
        let r = hinge_report(&s, &[0, 1, 2, 3, 4], 0.2, 2);
        assert_eq!(r.batched.batches, 2);
        assert_eq!(r.batched.dropped_images, 1);
        assert_eq!(r.batched.mean.positives, 4);
        assert!((r.batched.mean.sum_of_hinges - 0.3).abs() < EPS);
        assert!((r.batched.mean.violation_rate - 0.5).abs() < EPS);
        // The whole set sees the 0.95 entries as negatives too.
        assert!(r.whole_set.sum_of_hinges > r.batched.mean.sum_of_hinges);
    }

    #[test]
    fn fewer_images_than_a_batch_make_one_batch_equal_to_the_whole_set() {
        let s = array![[0.6, 0.5], [0.7, 0.4]];
        let r = hinge_report(&s, &[0, 1], 0.2, 128);
        assert_eq!(r.batched.batches, 1);
        assert_eq!(r.batched.dropped_images, 0);
        assert_eq!(r.batched.mean, r.whole_set);
    }
}

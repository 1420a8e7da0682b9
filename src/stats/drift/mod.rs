//! Drift between two bundle versions over the same probe set: do they agree
//! on which pairs fit better, how alike are their spaces, which rewards moved,
//! and the continuity maps that carry the new bundle's cosines onto the old
//! one's scale. Every figure is defined in `docs/statistics.md`.

use std::collections::BTreeMap;

use ndarray::{concatenate, Array2, Axis};
use serde::{Deserialize, Serialize};

use super::agreement::{kendall_tau_b, ks_two_sample, spearman_rho, KsTest};
use super::calibration::{calibrate_checked, cosine_range, CalibrationOptions, CalibrationReport};
use super::continuity::{ContinuityMap, FittedMap};
use super::pairs::ProbeVectors;
use super::spaces::{linear_cka, procrustes, ProcrustesFit};
use super::StatsError;
use measures::{figure_changes, mean_jaccard, moved_pairs, same_probe, scatter};

mod measures;

/// Default k of the neighbour overlap.
pub const DEFAULT_NEIGHBOUR_K: usize = 10;
/// Default number of most-moved pairs listed.
pub const DEFAULT_MOVED_PAIRS: usize = 20;
/// Default most pairs drawn in the report's scatter plot; a few thousand
/// points keep the HTML file small and the plot readable.
pub const DEFAULT_SCATTER_POINTS: usize = 2000;

/// Settings of a drift comparison.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, utoipa::ToSchema)]
#[serde(default, deny_unknown_fields)]
pub struct DriftOptions {
    /// Settings of the two calibrations compared.
    pub calibration: CalibrationOptions,
    /// Captions per image compared by the neighbour overlap, at least 1.
    pub neighbour_k: usize,
    /// Pairs listed as moved most.
    pub moved_pairs: usize,
    /// Most pairs kept for the scatter plot (0 for none).
    pub scatter_points: usize,
}

impl Default for DriftOptions {
    fn default() -> Self {
        DriftOptions {
            calibration: CalibrationOptions::default(),
            neighbour_k: DEFAULT_NEIGHBOUR_K,
            moved_pairs: DEFAULT_MOVED_PAIRS,
            scatter_points: DEFAULT_SCATTER_POINTS,
        }
    }
}

impl DriftOptions {
    /// Refuses settings no figure can be computed with.
    pub fn validate(&self) -> Result<(), StatsError> {
        self.calibration.validate()?;
        if self.neighbour_k == 0 {
            return Err(StatsError::BadOption {
                name: "neighbour_k",
                why: "must be at least 1".into(),
            });
        }
        Ok(())
    }
}

/// Sizes of the probe and of the two spaces.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, utoipa::ToSchema)]
pub struct DriftCounts {
    /// Images (N).
    pub images: usize,
    /// True captions (M).
    pub captions: usize,
    /// Contrast captions (K).
    pub contrasts: usize,
    /// Pairs compared: M true pairs, then K contrast pairs.
    pub pairs: usize,
    /// Vector length of the old bundle.
    pub dimension_from: usize,
    /// Vector length of the new bundle.
    pub dimension_to: usize,
}

/// Rank agreement of the two bundles' cosines on the same pairs.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, utoipa::ToSchema)]
pub struct PairAgreement {
    /// Pairs compared.
    pub pairs: usize,
    /// Spearman's rho (`scipy.stats.spearmanr`); null when a side is constant.
    pub spearman_rho: Option<f64>,
    /// Kendall's tau-b (`scipy.stats.kendalltau`); null when a side is constant.
    pub kendall_tau_b: Option<f64>,
}

/// Rank agreement over all pairs and over true pairs only.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, utoipa::ToSchema)]
pub struct Agreement {
    /// True and contrast pairs together.
    pub all_pairs: PairAgreement,
    /// True pairs only.
    pub true_pairs: PairAgreement,
}

/// Linear CKA of the two bundles' vectors of the same rows.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, utoipa::ToSchema)]
pub struct CkaFigures {
    /// Over the N image vectors.
    pub images: Option<f64>,
    /// Over the M + K caption vectors (true captions, then contrasts).
    pub texts: Option<f64>,
}

/// Orthogonal Procrustes of the old bundle's rows onto the new one's; null
/// when the bundles' dimensions differ.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, utoipa::ToSchema)]
pub struct ProcrustesFigures {
    /// Over the N image vectors.
    pub images: Option<ProcrustesFit>,
    /// Over the M + K caption vectors.
    pub texts: Option<ProcrustesFit>,
}

/// Whether each image's nearest captions stayed the same.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, utoipa::ToSchema)]
pub struct NeighbourOverlap {
    /// Captions per image compared (at most M).
    pub k: usize,
    /// Mean over images of |top_k(old) & top_k(new)| / |top_k(old) | top_k(new)|,
    /// top_k by cosine among all probe true captions, ties by caption order.
    pub mean_jaccard: f64,
}

/// The two continuity maps from the new bundle's cosine to the old one's,
/// fitted on all pairs.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, utoipa::ToSchema)]
pub struct ContinuityFits {
    /// Least-squares line.
    pub affine: FittedMap,
    /// Isotonic (non-decreasing) regression.
    pub monotone: FittedMap,
}

/// Which kind of pair a cosine belongs to.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize, utoipa::ToSchema)]
#[serde(rename_all = "lowercase")]
pub enum PairKind {
    /// An image with one of its true captions.
    True,
    /// An image with a contrast of one of its captions.
    Contrast,
}

/// One pair whose reward moved much between the bundles.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, utoipa::ToSchema)]
pub struct MovedPair {
    /// Index of the pair: 0..M true captions, M..M+K contrasts.
    pub pair: usize,
    /// True or contrast pair.
    pub kind: PairKind,
    /// The contrast's label; null for a true pair.
    pub changed: Option<String>,
    /// The image, as named in the probe set.
    pub image: String,
    /// Line of the image's row in the probe file.
    pub image_line: usize,
    /// The caption scored.
    pub caption: String,
    /// For a contrast, the true caption it alters; null for a true pair.
    pub true_caption: Option<String>,
    /// Cosine under the old bundle.
    pub cos_from: f64,
    /// Cosine under the new bundle.
    pub cos_to: f64,
    /// cos_to - cos_from.
    pub raw_delta: f64,
    /// affine(cos_to) - cos_from, with the fitted affine continuity map: the
    /// move left once the new scale is mapped onto the old.
    pub mapped_delta: f64,
}

/// A sample of the pairs for the scatter plot.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, utoipa::ToSchema)]
pub struct Scatter {
    /// Every `stride`-th pair (in pair order) is kept.
    pub stride: usize,
    /// [cosine under the new bundle, cosine under the old bundle] per kept pair.
    pub points: Vec<[f64; 2]>,
}

/// One calibration figure under both bundles.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, utoipa::ToSchema)]
pub struct FigureChange {
    /// Under the old bundle (null when not defined there).
    pub from: Option<f64>,
    /// Under the new bundle.
    pub to: Option<f64>,
    /// to - from, when both are defined.
    pub delta: Option<f64>,
}

/// Every drift figure between two bundles over one probe set.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, utoipa::ToSchema)]
pub struct DriftReport {
    /// The old bundle.
    pub from_bundle: String,
    /// The new bundle.
    pub to_bundle: String,
    /// Probe sizes and dimensions.
    pub counts: DriftCounts,
    /// Settings used.
    pub options: DriftOptions,
    /// Rank agreement of the cosines of the same pairs.
    pub agreement: Agreement,
    /// Kolmogorov-Smirnov between the true-pair cosine distributions.
    pub true_cosine_ks: KsTest,
    /// Linear CKA of the spaces.
    pub cka: CkaFigures,
    /// Orthogonal Procrustes residuals.
    pub procrustes: ProcrustesFigures,
    /// Nearest-caption overlap per image.
    pub neighbour_overlap: NeighbourOverlap,
    /// Maps from the new cosine to the old.
    pub continuity: ContinuityFits,
    /// Pairs by decreasing |mapped_delta|, ties by pair index.
    pub moved: Vec<MovedPair>,
    /// Pairs for the scatter plot.
    pub scatter: Scatter,
    /// Every calibration figure, old and new, by dotted name
    /// (e.g. `retrieval.image_to_text.r_at_1`).
    pub changes: BTreeMap<String, FigureChange>,
    /// Calibration of the old bundle.
    pub from: CalibrationReport,
    /// Calibration of the new bundle.
    pub to: CalibrationReport,
}

/// Compares bundle `from` (old) with bundle `to` (new) over the same probe
/// rows: every figure of [`DriftReport`].
pub fn drift(
    from: &ProbeVectors,
    to: &ProbeVectors,
    options: &DriftOptions,
) -> Result<DriftReport, StatsError> {
    options.validate()?;
    from.check()?;
    to.check()?;
    same_probe(from, to)?;
    let (sa, sb) = (from.similarities(), to.similarities());
    // One histogram range for both, so their histograms share bins.
    let range = cosine_range(&[&sa, &sb]);
    let cal_from = calibrate_checked(from, &sa, &options.calibration, range)?;
    let cal_to = calibrate_checked(to, &sb, &options.calibration, range)?;

    let m = from.caption_count();
    let cos_a: Vec<f64> = sa
        .true_cos
        .iter()
        .chain(&sa.contrast_cos)
        .copied()
        .collect();
    let cos_b: Vec<f64> = sb
        .true_cos
        .iter()
        .chain(&sb.contrast_cos)
        .copied()
        .collect();

    let agreement = Agreement {
        all_pairs: PairAgreement {
            pairs: cos_a.len(),
            spearman_rho: spearman_rho(&cos_a, &cos_b),
            kendall_tau_b: kendall_tau_b(&cos_a, &cos_b),
        },
        true_pairs: PairAgreement {
            pairs: m,
            spearman_rho: spearman_rho(&sa.true_cos, &sb.true_cos),
            kendall_tau_b: kendall_tau_b(&sa.true_cos, &sb.true_cos),
        },
    };
    let texts = |v: &ProbeVectors| -> Array2<f64> {
        concatenate(Axis(0), &[v.captions.view(), v.contrasts.view()])
            .unwrap_or_else(|_| v.captions.clone())
    };
    let (texts_a, texts_b) = (texts(from), texts(to));
    let continuity = ContinuityFits {
        affine: ContinuityMap::fit_affine(&cos_b, &cos_a)?,
        monotone: ContinuityMap::fit_monotone(&cos_b, &cos_a)?,
    };
    let moved = moved_pairs(
        from,
        &cos_a,
        &cos_b,
        &continuity.affine.map,
        options.moved_pairs,
    );
    let k = options.neighbour_k.min(m);

    Ok(DriftReport {
        from_bundle: from.bundle.clone(),
        to_bundle: to.bundle.clone(),
        counts: DriftCounts {
            images: from.image_count(),
            captions: m,
            contrasts: from.contrast_count(),
            pairs: cos_a.len(),
            dimension_from: from.dimension(),
            dimension_to: to.dimension(),
        },
        options: options.clone(),
        agreement,
        true_cosine_ks: ks_two_sample(&sa.true_cos, &sb.true_cos),
        cka: CkaFigures {
            images: linear_cka(&from.images, &to.images),
            texts: linear_cka(&texts_a, &texts_b),
        },
        procrustes: ProcrustesFigures {
            images: procrustes(&from.images, &to.images),
            texts: procrustes(&texts_a, &texts_b),
        },
        neighbour_overlap: NeighbourOverlap {
            k,
            mean_jaccard: mean_jaccard(&sa.s, &sb.s, k),
        },
        continuity,
        moved,
        scatter: scatter(&cos_a, &cos_b, options.scatter_points),
        changes: figure_changes(&cal_from, &cal_to),
        from: cal_from,
        to: cal_to,
    })
}

#[cfg(test)]
mod tests;

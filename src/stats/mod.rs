//! Calibration and drift statistics, and their HTML reports.
//!
//! A calibration asks how one bundle's cosines behave on a labelled probe set
//! (true captions, contrasts); a drift comparison asks what changes when a
//! training run moves from one bundle version to the next. Both read
//! [`ProbeVectors`] (made by [`crate::probe::embed_probe`]) and return plain
//! serde structs; `docs/statistics.md` defines every field.
//!
//! - [`pairs`]: the input vectors and labels, and their similarity matrix.
//! - [`summary`]: mean, std, numpy-linear quantiles, histograms.
//! - [`hinge`]: VSE++ sum- and max-of-hinges losses, margin violations.
//! - [`retrieval`]: R@K, median and mean rank, rsum.
//! - [`contrast`]: true caption against its one-fact contrast.
//! - [`intervals`]: Wilson score intervals of rates and recalls.
//! - [`roc`]: ROC curve and AUC of true against contrast cosines.
//! - [`calibration`]: all of the above for one bundle, and suggested scales.
//! - [`agreement`]: Spearman, Kendall tau-b, two-sample Kolmogorov-Smirnov.
//! - [`spaces`]: linear CKA and orthogonal Procrustes, on [`svd`].
//! - [`continuity`]: maps from a new bundle's cosine to an old one's.
//! - [`reward_map`]: such a map tied to the two bundles it was fitted between.
//! - [`drift`](mod@drift): all of the above between two bundles.
//! - [`report`]: self-contained HTML reports (page frame, calibration, drift), drawn with `svg`.
//! - [`export`]: the JSON export the numpy/scipy cross-check reads.

use std::path::PathBuf;

pub mod agreement;
pub mod calibration;
pub mod continuity;
pub mod contrast;
pub mod drift;
pub mod export;
pub mod hinge;
pub mod intervals;
pub mod pairs;
pub mod report;
pub mod retrieval;
pub mod reward_map;
pub mod roc;
pub mod spaces;
pub mod summary;
pub mod svd;
pub(crate) mod svg;

pub use calibration::{calibrate, CalibrationOptions, CalibrationReport};
pub use continuity::{ContinuityError, ContinuityMap, FittedMap};
pub use drift::{drift, DriftOptions, DriftReport};
pub use export::{calibration_export, drift_export, write_json, CalibrationExport, DriftExport};
pub use pairs::ProbeVectors;
pub use report::{
    calibration_example_lines, calibration_html, drift_example_lines, drift_headline, drift_html,
    sha256_hex, HeadlineThresholds, Provenance, Thumbnails,
};
pub use reward_map::{MapBundle, RewardMap, RewardMapError};

/// Why a statistic could not be computed; each message says what to change.
#[derive(Debug, thiserror::Error)]
pub enum StatsError {
    /// The vectors and labels do not fit together.
    #[error("probe vectors are inconsistent: {why}")]
    Shape {
        /// What does not fit.
        why: String,
    },
    /// A row that is not unit length.
    #[error("{what} row {row} has L2 norm {norm}, not 1; normalise the vectors (ProbeVectors::normalise) before computing statistics")]
    NotNormalised {
        /// Which matrix.
        what: &'static str,
        /// Which row.
        row: usize,
        /// Its norm.
        norm: f64,
    },
    /// Fewer than two images: no true pair has a negative.
    #[error("calibration needs at least 2 images so that every true pair has negatives; this probe set has {images}; add rows to the probe set")]
    TooFewImages {
        /// Images in the probe.
        images: usize,
    },
    /// Nothing to summarise.
    #[error("no {what} to summarise; the probe set is too small")]
    Empty {
        /// Which list.
        what: &'static str,
    },
    /// A NaN or infinite cosine: the encoder produced broken vectors.
    #[error("{what} include the non-finite value {value}; check the bundle's encoders")]
    NotFinite {
        /// Which list.
        what: &'static str,
        /// The value.
        value: f64,
    },
    /// Two vector sets of different probe rows.
    #[error("the two bundles were not run on the same probe rows: {why}; embed the same probe file with both (with skip-bad, a row one bundle could not embed is dropped for that bundle only: fix or remove it)")]
    DifferentProbe {
        /// What differs.
        why: String,
    },
    /// An option out of range.
    #[error("option {name} {why}")]
    BadOption {
        /// The option's field name.
        name: &'static str,
        /// What is wrong with its value.
        why: String,
    },
    /// A continuity map could not be fitted.
    #[error(transparent)]
    Continuity(#[from] ContinuityError),
    /// An export or report could not be written.
    #[error("cannot write {path}: {source}; check that the folder is writable")]
    Write {
        /// The file.
        path: PathBuf,
        /// The cause.
        source: std::io::Error,
    },
}

/// Below this many probe images, figures move by whole points per image;
/// common practice, no source: the bundled probe set has 1,000.
pub const SMALL_PROBE_IMAGES: usize = 100;

/// A warning for a probe set too small for its figures to mean much.
pub fn small_probe_warning(images: usize) -> Option<String> {
    (images < SMALL_PROBE_IMAGES).then(|| {
        format!(
            "only {images} probe images: R@1 by chance alone is 1/{images} = {:.1}%, one image moves \
             R@K by {:.1} points, and the suggested scales rest on {images} true pairs; \
             use {SMALL_PROBE_IMAGES} or more images for figures to rely on",
            100.0 / images as f64,
            100.0 / images as f64,
        )
    })
}

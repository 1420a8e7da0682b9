//! Reward scales: how the cosine of a caption with its image becomes a reward.

use serde::{Deserialize, Serialize};

/// CLIP-S weight of Hessel et al. 2021 (CLIPScore), section 3: w = 2.5.
pub const DEFAULT_CLIP_S_WEIGHT: f32 = 2.5;

fn default_weight() -> f32 {
    DEFAULT_CLIP_S_WEIGHT
}

/// Largest magnitude of a scale parameter (`weight`, `a`, `b`): far above any
/// calibration, and small enough that every reward and advantage of cosines
/// in [-1, 1] stays a finite f32 (f32 reaches 3.4e38).
pub const MAX_SCALE_PARAMETER: f32 = 1.0e6;

/// Why a scale's parameters cannot be used.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum ScaleError {
    #[error("weight must be a positive number of at most {MAX_SCALE_PARAMETER}, got {0}")]
    Weight(f32),
    #[error("a and b must be numbers of magnitude at most {MAX_SCALE_PARAMETER}")]
    Affine,
    #[error("the ref-clip-s scale needs reference captions in each group")]
    NoReferences,
}

/// A reward scale, as requests name it.
#[derive(Debug, Clone, Copy, PartialEq, Default, Serialize, Deserialize, utoipa::ToSchema)]
#[serde(tag = "kind", rename_all = "kebab-case", deny_unknown_fields)]
pub enum Scale {
    /// The cosine itself.
    #[default]
    Cosine,
    /// `w * max(c, 0)`: CLIPScore, Hessel et al. 2021, eq. 1.
    ClipS {
        #[serde(default = "default_weight")]
        weight: f32,
    },
    /// Harmonic mean of CLIP-S and `max(max_r cos(caption, r), 0)`: RefCLIPScore, eq. 2.
    RefClipS {
        #[serde(default = "default_weight")]
        weight: f32,
    },
    /// `a * c + b`, for a calibration the caller fitted.
    Affine { a: f32, b: f32 },
}

impl Scale {
    /// Whether the scale needs the group's reference captions.
    pub fn needs_references(&self) -> bool {
        matches!(self, Scale::RefClipS { .. })
    }

    /// The problem with the scale's parameters, if any.
    pub fn check(&self) -> Result<(), ScaleError> {
        match self {
            Scale::ClipS { weight } | Scale::RefClipS { weight }
                if !(*weight > 0.0 && *weight <= MAX_SCALE_PARAMETER) =>
            {
                Err(ScaleError::Weight(*weight))
            }
            Scale::Affine { a, b }
                if !(a.abs() <= MAX_SCALE_PARAMETER && b.abs() <= MAX_SCALE_PARAMETER) =>
            {
                Err(ScaleError::Affine)
            }
            _ => Ok(()),
        }
    }

    /// The reward of a caption whose cosine with the image is `cosine`;
    /// `reference_cosine` is its best cosine with the group's references
    /// (used by RefCLIP-S only).
    pub fn reward(&self, cosine: f32, reference_cosine: Option<f32>) -> f32 {
        match *self {
            Scale::Cosine => cosine,
            Scale::ClipS { weight } => weight * cosine.max(0.0),
            Scale::RefClipS { weight } => {
                let clip_s = weight * cosine.max(0.0);
                let reference = reference_cosine.unwrap_or(0.0).max(0.0);
                harmonic_mean(clip_s, reference)
            }
            Scale::Affine { a, b } => a * cosine + b,
        }
    }
}

/// `2xy / (x + y)`, defined as 0 when both are 0.
fn harmonic_mean(x: f32, y: f32) -> f32 {
    if x + y == 0.0 {
        0.0
    } else {
        2.0 * x * y / (x + y)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn clip_s_follows_eq_1() {
        // CLIP-S(c, v) = w * max(cos(c, v), 0), w = 2.5 (Hessel et al. 2021, eq. 1).
        let s = Scale::ClipS { weight: 2.5 };
        assert!((s.reward(0.3, None) - 0.75).abs() < 1e-7);
        assert_eq!(s.reward(-0.2, None), 0.0);
    }

    #[test]
    fn ref_clip_s_is_the_harmonic_mean_of_eq_2() {
        // RefCLIP-S = H-Mean(CLIP-S(c, v), max(max_r cos(c, r), 0)) (Hessel et al. 2021, eq. 2).
        // With cos(c, v) = 0.3 -> CLIP-S 0.75, best reference cosine 0.5: 2 * 0.75 * 0.5 / 1.25 = 0.6.
        let s = Scale::RefClipS { weight: 2.5 };
        assert!((s.reward(0.3, Some(0.5)) - 0.6).abs() < 1e-6);
        // A negative reference cosine is clipped to 0, so the harmonic mean is 0.
        assert_eq!(s.reward(0.3, Some(-0.5)), 0.0);
        assert_eq!(s.reward(-0.3, Some(-0.5)), 0.0);
    }

    #[test]
    fn parameters_that_could_overflow_are_refused() {
        // a = b = 3e38 gave a reward of inf, sent as null in a 200.
        assert_eq!(
            Scale::Affine { a: 3e38, b: 3e38 }.check(),
            Err(ScaleError::Affine)
        );
        assert_eq!(
            Scale::Affine {
                a: f32::NAN,
                b: 0.0
            }
            .check(),
            Err(ScaleError::Affine)
        );
        assert!(Scale::ClipS { weight: 2e6 }.check().is_err());
        // At the bound every reward of a cosine in [-1, 1] is finite, and so is
        // a difference of two of them (an advantage).
        let edge = Scale::Affine {
            a: MAX_SCALE_PARAMETER,
            b: -MAX_SCALE_PARAMETER,
        };
        assert!(edge.check().is_ok());
        let (hi, lo) = (edge.reward(1.0, None), edge.reward(-1.0, None));
        assert!(hi.is_finite() && lo.is_finite() && (hi - lo).is_finite());
    }

    #[test]
    fn affine_and_parsing() {
        assert!((Scale::Affine { a: 2.0, b: -0.5 }.reward(0.25, None)).abs() < 1e-7);
        let s: Scale = serde_json::from_str(r#"{"kind": "clip-s"}"#).unwrap();
        assert_eq!(s, Scale::ClipS { weight: 2.5 });
        let s: Scale = serde_json::from_str(r#"{"kind": "ref-clip-s", "weight": 1.0}"#).unwrap();
        assert_eq!(s, Scale::RefClipS { weight: 1.0 });
        assert!(serde_json::from_str::<Scale>(r#"{"kind": "affine", "a": 1}"#).is_err());
        assert!(Scale::ClipS { weight: -1.0 }.check().is_err());
    }
}

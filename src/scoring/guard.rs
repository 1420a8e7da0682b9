//! Reward guards: per-sample signals that a policy is gaming the embedding
//! reward (repetition, length, unknown tokens, closeness to a bank caption,
//! and a fluency probability when a bundle has a head), and the combined
//! reward `scale(c) + lambda * fluency - penalties` (the form of Cho et al.
//! 2022, "Fine-grained Image Captioning with CLIP Reward"), applied before the
//! baseline so advantages compare guarded rewards with guarded rewards.

use std::sync::Arc;

use serde::{Deserialize, Serialize};

use super::signals::{repeated_bigrams, repeated_words, words};
use crate::intake::validation::{Invalid, Problem};

/// Largest weight of a penalty or of the fluency term: rewards of every scale
/// stay comparable to a penalty's size, and none can overflow.
pub const MAX_GUARD_WEIGHT: f32 = 10.0;

/// Largest `length.below`: no caption has more tokens than a bundle's limit,
/// and no bundle here allows more than this.
pub const MAX_LENGTH_BELOW: u32 = 512;

/// Why a guard cannot be used.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum GuardError {
    #[error("weight must be a number from 0 to {MAX_GUARD_WEIGHT}, got {0}")]
    Weight(f32),
    #[error("above must be a number from {min} up to (not including) 1, got {got}")]
    Above { min: f32, got: f32 },
    #[error("below must be a whole number of tokens from 1 to {MAX_LENGTH_BELOW}, got {0}")]
    Below(u32),
    #[error("this model has no fluency head, so fluency_weight must be 0")]
    NoFluencyHead,
    #[error("a bank_cosine penalty needs \"nearest_bank\": true")]
    NeedsNearest,
}

/// A penalty on a share or cosine: `weight * max(0, s - above) / (1 - above)`,
/// so it grows from 0 at the threshold to `weight` at 1.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize, utoipa::ToSchema)]
#[serde(deny_unknown_fields)]
pub struct OverPenalty {
    pub above: f32,
    pub weight: f32,
}

/// A penalty on short captions: `weight * max(0, below - tokens) / below`.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize, utoipa::ToSchema)]
#[serde(deny_unknown_fields)]
pub struct LengthPenalty {
    pub below: u32,
    pub weight: f32,
}

/// The penalties a request asks for, each optional.
#[derive(Debug, Clone, Default, PartialEq, Serialize, Deserialize, utoipa::ToSchema)]
#[serde(deny_unknown_fields)]
pub struct Penalties {
    #[serde(skip_serializing_if = "Option::is_none")]
    pub repeated_words: Option<OverPenalty>,
    #[serde(skip_serializing_if = "Option::is_none")]
    pub repeated_bigrams: Option<OverPenalty>,
    #[serde(skip_serializing_if = "Option::is_none")]
    pub unknown_tokens: Option<OverPenalty>,
    #[serde(skip_serializing_if = "Option::is_none")]
    pub bank_cosine: Option<OverPenalty>,
    #[serde(skip_serializing_if = "Option::is_none")]
    pub length: Option<LengthPenalty>,
}

/// The `guard` object of a request, and of its answer (the echo).
#[derive(Debug, Clone, Default, PartialEq, Serialize, Deserialize, utoipa::ToSchema)]
#[serde(deny_unknown_fields)]
pub struct GuardJson {
    /// lambda of the fluency term; needs a bundle with a fluency head.
    #[serde(default)]
    pub fluency_weight: f32,
    /// Measure each caption's cosine to its nearest bank caption.
    #[serde(default)]
    pub nearest_bank: bool,
    #[serde(default)]
    pub penalties: Penalties,
}

/// The nearest bank caption's cosine for each vector (none when the bank has
/// no caption for this bundle). Blocking: called off the async runtime.
pub trait NearestCaption: Send + Sync + std::fmt::Debug {
    fn nearest(&self, vectors: &[&[f32]]) -> Result<Vec<Option<f32>>, String>;
}

/// A bundle's fluency head: for each caption, from the token ids the text
/// tower got, the probability that it is well-formed. Blocking: called off
/// the async runtime. A guard with a fluency weight needs one.
pub trait FluencyHead: Send + Sync + std::fmt::Debug {
    fn probabilities(&self, ids: &[&[i64]]) -> Result<Vec<f32>, String>;
}

/// A checked guard, with the bank it measures against when asked.
#[derive(Debug, Clone)]
pub struct Guard {
    json: GuardJson,
    nearest: Option<Arc<dyn NearestCaption>>,
    fluency: Option<Arc<dyn FluencyHead>>,
}

fn check_weight(w: f32) -> Result<(), GuardError> {
    if (0.0..=MAX_GUARD_WEIGHT).contains(&w) {
        Ok(())
    } else {
        Err(GuardError::Weight(w))
    }
}

fn check_over(p: &OverPenalty, min: f32) -> Result<(), GuardError> {
    check_weight(p.weight)?;
    if p.above >= min && p.above < 1.0 {
        Ok(())
    } else {
        Err(GuardError::Above { min, got: p.above })
    }
}

impl Guard {
    /// Checks the guard against what the model has; the error blames the
    /// field under `guard`. `nearest` is the bundle's bank, when the server
    /// has one; `nearest_bank` without it measures nothing.
    pub fn new(
        json: GuardJson,
        fluency: Option<Arc<dyn FluencyHead>>,
        nearest: Option<Arc<dyn NearestCaption>>,
    ) -> Result<Guard, Invalid> {
        Guard::check(&json, fluency.is_some())
            .map_err(|(field, e)| Invalid::new(format!("guard.{field}"), Problem::Guard(e)))?;
        let nearest = if json.nearest_bank { nearest } else { None };
        Ok(Guard {
            json,
            nearest,
            fluency,
        })
    }

    fn check(json: &GuardJson, has_fluency_head: bool) -> Result<(), (String, GuardError)> {
        let at = |name: &str| name.to_string();
        check_weight(json.fluency_weight).map_err(|e| (at("fluency_weight"), e))?;
        if json.fluency_weight > 0.0 && !has_fluency_head {
            return Err((at("fluency_weight"), GuardError::NoFluencyHead));
        }
        let p = &json.penalties;
        for (name, over, min) in [
            ("repeated_words", &p.repeated_words, 0.0),
            ("repeated_bigrams", &p.repeated_bigrams, 0.0),
            ("unknown_tokens", &p.unknown_tokens, 0.0),
            ("bank_cosine", &p.bank_cosine, -1.0),
        ] {
            if let Some(over) = over {
                check_over(over, min).map_err(|e| (format!("penalties.{name}"), e))?;
            }
        }
        if p.bank_cosine.is_some() && !json.nearest_bank {
            return Err((at("penalties.bank_cosine"), GuardError::NeedsNearest));
        }
        if let Some(l) = &p.length {
            check_weight(l.weight).map_err(|e| (at("penalties.length"), e))?;
            if !(1..=MAX_LENGTH_BELOW).contains(&l.below) {
                return Err((at("penalties.length"), GuardError::Below(l.below)));
            }
        }
        Ok(())
    }

    /// The guard as the answer echoes it.
    pub fn echo(&self) -> &GuardJson {
        &self.json
    }

    /// The bundle's fluency head, when it has one.
    pub fn fluency(&self) -> Option<&Arc<dyn FluencyHead>> {
        self.fluency.as_ref()
    }

    /// The bank to measure against, when asked and present.
    pub fn nearest(&self) -> Option<&Arc<dyn NearestCaption>> {
        self.nearest.as_ref()
    }

    /// The penalties and flags of a caption's signals; `scaled` is its reward
    /// on the spec's scale. The fluency term counts only when measured.
    pub fn apply(&self, signals: Signals, scaled: f32) -> Guarded {
        let p = &self.json.penalties;
        let mut penalty = 0.0f32;
        let mut flagged = Vec::new();
        let mut over = |name: &'static str, rule: &Option<OverPenalty>, value: Option<f32>| {
            if let (Some(rule), Some(value)) = (rule, value) {
                if value > rule.above {
                    flagged.push(name);
                    penalty += rule.weight * (value - rule.above) / (1.0 - rule.above);
                }
            }
        };
        over(
            "repeated_words",
            &p.repeated_words,
            Some(signals.repeated_words),
        );
        over(
            "repeated_bigrams",
            &p.repeated_bigrams,
            Some(signals.repeated_bigrams),
        );
        over(
            "unknown_tokens",
            &p.unknown_tokens,
            Some(signals.unknown_tokens),
        );
        over("bank_cosine", &p.bank_cosine, signals.bank_cosine);
        if let Some(rule) = &p.length {
            let tokens = signals.tokens as f32;
            let below = rule.below as f32;
            if tokens < below {
                flagged.push("length");
                penalty += rule.weight * (below - tokens) / below;
            }
        }
        let fluency = signals
            .fluency
            .map_or(0.0, |f| self.json.fluency_weight * f);
        Guarded {
            reward: scaled + fluency - penalty,
            scaled,
            penalty,
            flagged,
            signals,
        }
    }
}

/// What the guard measured of one caption.
#[derive(Debug, Clone, PartialEq, Serialize, utoipa::ToSchema)]
pub struct Signals {
    /// Share of word tokens repeating an earlier word of the caption.
    pub repeated_words: f32,
    /// Share of word bigrams repeating an earlier bigram of the caption.
    pub repeated_bigrams: f32,
    /// Token ids the text tower received (the bundle's tokenizer, after truncation).
    pub tokens: usize,
    /// Share of those ids that are the tokenizer's unknown token.
    pub unknown_tokens: f32,
    /// Probability the caption is well-formed, from the bundle's fluency head.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub fluency: Option<f32>,
    /// Cosine to the nearest caption of the bank, when asked and the bank has one.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub bank_cosine: Option<f32>,
}

impl Signals {
    /// The text signals of a caption from its token ids and the tokenizer's
    /// unknown id (none when the tokenizer has no unknown token).
    pub fn of_text(text: &str, ids: &[i64], unknown_id: Option<i64>) -> Signals {
        let w = words(text);
        let unknown = unknown_id.map_or(0, |u| ids.iter().filter(|&&id| id == u).count());
        Signals {
            repeated_words: repeated_words(&w),
            repeated_bigrams: repeated_bigrams(&w),
            tokens: ids.len(),
            unknown_tokens: if ids.is_empty() {
                0.0
            } else {
                unknown as f32 / ids.len() as f32
            },
            fluency: None,
            bank_cosine: None,
        }
    }
}

/// A caption's signals, its reward before and after the guard, and which
/// penalties it crossed.
#[derive(Debug, Clone, PartialEq, Serialize, utoipa::ToSchema)]
pub struct Guarded {
    #[serde(flatten)]
    pub signals: Signals,
    /// The reward on the spec's scale, before the guard.
    pub scaled: f32,
    /// The sum of the penalties (0 when none crossed its threshold).
    pub penalty: f32,
    /// The penalties whose thresholds the caption crossed, in request order.
    pub flagged: Vec<&'static str>,
    /// `scaled + fluency_weight * fluency - penalty`.
    #[serde(skip)]
    pub reward: f32,
}

#[cfg(test)]
mod tests {
    use super::*;

    fn guard(json: serde_json::Value) -> Result<Guard, (String, GuardError)> {
        Guard::new(serde_json::from_value(json).unwrap(), None, None).map_err(|e| match e.problem {
            Problem::Guard(g) => (e.field, g),
            other => panic!("not a guard problem: {other}"),
        })
    }

    #[test]
    fn bounds_are_checked_with_the_field() {
        let e = guard(serde_json::json!({"fluency_weight": 0.5})).unwrap_err();
        assert_eq!(
            e,
            ("guard.fluency_weight".into(), GuardError::NoFluencyHead)
        );
        let e = guard(
            serde_json::json!({"penalties": {"repeated_words": {"above": 1.0, "weight": 1}}}),
        )
        .unwrap_err();
        assert_eq!(e.0, "guard.penalties.repeated_words");
        let e = guard(
            serde_json::json!({"penalties": {"unknown_tokens": {"above": 0.1, "weight": 11}}}),
        )
        .unwrap_err();
        assert_eq!(e.1, GuardError::Weight(11.0));
        let e =
            guard(serde_json::json!({"penalties": {"bank_cosine": {"above": 0.9, "weight": 1}}}))
                .unwrap_err();
        assert_eq!(e.1, GuardError::NeedsNearest);
        let e = guard(serde_json::json!({"penalties": {"length": {"below": 0, "weight": 1}}}))
            .unwrap_err();
        assert_eq!(e.1, GuardError::Below(0));
        let nan = GuardJson {
            fluency_weight: f32::NAN,
            ..GuardJson::default()
        };
        let e = Guard::new(nan, None, None).unwrap_err();
        assert_eq!(e.field, "guard.fluency_weight");
    }

    #[test]
    fn combined_reward_by_hand() {
        // "red cube red cube red": repeated words 0.6, bigrams 0.5 (see signals).
        // repeated_words above 0.2 weight 2: 2 * (0.6 - 0.2) / 0.8 = 1.0.
        // repeated_bigrams above 0.5: not crossed (0.5 is not above 0.5).
        // length below 8 weight 1: (8 - 5) / 8 = 0.375. reward = 2 - 1.375.
        let g = guard(serde_json::json!({"penalties": {
            "repeated_words": {"above": 0.2, "weight": 2},
            "repeated_bigrams": {"above": 0.5, "weight": 3},
            "length": {"below": 8, "weight": 1}}}))
        .unwrap();
        let s = Signals::of_text("red cube red cube red", &[5, 6, 5, 6, 5], Some(1));
        let out = g.apply(s, 2.0);
        assert!((out.penalty - 1.375).abs() < 1e-6, "{out:?}");
        assert!((out.reward - 0.625).abs() < 1e-6);
        assert_eq!(out.flagged, ["repeated_words", "length"]);
    }

    /// A head answering a fixed probability: what the guard does with one.
    #[derive(Debug)]
    struct Fixed(f32);

    impl FluencyHead for Fixed {
        fn probabilities(&self, ids: &[&[i64]]) -> Result<Vec<f32>, String> {
            Ok(vec![self.0; ids.len()])
        }
    }

    #[test]
    fn the_fluency_term_is_weighted_and_counts_only_when_measured() {
        let json: GuardJson = serde_json::from_value(serde_json::json!({
            "fluency_weight": 0.5,
            "penalties": {"length": {"below": 4, "weight": 1}}}))
        .unwrap();
        let g = Guard::new(json, Some(Arc::new(Fixed(0.8))), None).unwrap();
        assert!(g.fluency().is_some());
        // 3 tokens below 4: penalty 1/4; reward = 1.5 + 0.5 * 0.8 - 0.25 (Cho et al. 2022 form).
        let mut s = Signals::of_text("a red ring", &[2, 16, 28], Some(1));
        s.fluency = Some(0.8);
        let out = g.apply(s.clone(), 1.5);
        assert!((out.reward - 1.65).abs() < 1e-6, "{out:?}");
        s.fluency = None;
        assert!((g.apply(s, 1.5).reward - 1.25).abs() < 1e-6);
    }

    #[test]
    fn unknown_share_counts_the_unknown_id() {
        let s = Signals::of_text("a zorb cube", &[5, 1, 7], Some(1));
        assert!((s.unknown_tokens - 1.0 / 3.0).abs() < 1e-6);
        assert_eq!(s.tokens, 3);
        assert_eq!(Signals::of_text("x", &[1], None).unknown_tokens, 0.0);
    }
}

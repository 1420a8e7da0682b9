//! Scoring one group from its vectors: cosines, rewards on the spec's scale,
//! advantages against its baseline. Pure arithmetic; the vectors come from
//! [`super::run`].

use serde::Serialize;

use super::advantages;
use super::guard::{Guarded, Signals};
use super::spec::RewardSpec;
use crate::encoders::CaptionVector;
use crate::vectors::dot;

/// A sampled caption's cosine with its image, reward and advantage.
#[derive(Debug, Clone, PartialEq, Serialize, utoipa::ToSchema)]
pub struct Sample {
    pub cosine: f32,
    pub reward: f32,
    pub advantage: f32,
    pub truncated: bool,
    /// Signals and penalties, when the request has a guard.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub guard: Option<Guarded>,
}

/// The greedy caption's cosine and reward (its reward is the greedy baseline).
#[derive(Debug, Clone, PartialEq, Serialize, utoipa::ToSchema)]
pub struct Scored {
    pub cosine: f32,
    pub reward: f32,
    pub truncated: bool,
    /// Signals and penalties, when the request has a guard.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub guard: Option<Guarded>,
}

/// One group's answer.
#[derive(Debug, Clone, PartialEq, Serialize, utoipa::ToSchema)]
pub struct GroupScores {
    /// Content id of the group's image.
    pub image: String,
    pub samples: Vec<Sample>,
    pub greedy: Option<Scored>,
}

/// The vectors of one group, as encoded.
pub struct GroupVectors<'a> {
    pub image: &'a [f32],
    pub samples: &'a [std::sync::Arc<CaptionVector>],
    pub references: &'a [std::sync::Arc<CaptionVector>],
    pub greedy: Option<&'a CaptionVector>,
    /// With a guard: the signals of the samples, then of the greedy caption.
    pub signals: Option<&'a [Signals]>,
}

/// Rewards and advantages of one group. The groups were checked by
/// [`super::check_groups`], so the baseline always has what it needs.
pub fn score_group(spec: &RewardSpec, image_id: String, v: &GroupVectors<'_>) -> GroupScores {
    // The reward on the spec's scale, then the guard's reward when there is one.
    let score_one = |caption: &[f32], at: usize| {
        let cosine = dot(caption, v.image);
        let reference = v
            .references
            .iter()
            .map(|r| dot(caption, &r.vector))
            .reduce(f32::max);
        let scaled = spec.scale().reward(spec.on_scale(cosine), reference);
        let guarded = match (spec.guard(), v.signals.and_then(|s| s.get(at))) {
            (Some(guard), Some(signals)) => Some(guard.apply(signals.clone(), scaled)),
            _ => None,
        };
        let reward = guarded.as_ref().map_or(scaled, |g| g.reward);
        (cosine, reward, guarded)
    };
    let scored: Vec<(f32, f32, Option<Guarded>)> = v
        .samples
        .iter()
        .enumerate()
        .map(|(i, s)| score_one(&s.vector, i))
        .collect();
    let greedy = v.greedy.map(|g| {
        let (cosine, reward, guard) = score_one(&g.vector, v.samples.len());
        Scored {
            cosine,
            reward,
            truncated: g.truncated,
            guard,
        }
    });
    let rewards: Vec<f32> = scored.iter().map(|(_, r, _)| *r).collect();
    // Checked groups always have what their baseline needs; a group that does
    // not is answered with its rewards as advantages rather than a panic.
    let advantage = advantages(&rewards, spec.baseline(), greedy.as_ref().map(|g| g.reward))
        .unwrap_or_else(|_| rewards.clone());
    let samples = scored
        .into_iter()
        .zip(v.samples)
        .zip(advantage)
        .map(|(((cosine, reward, guard), s), advantage)| Sample {
            cosine,
            reward,
            advantage,
            truncated: s.truncated,
            guard,
        })
        .collect();
    GroupScores {
        image: image_id,
        samples,
        greedy,
    }
}

#[cfg(test)]
mod tests {
    use std::sync::Arc;

    use super::*;
    use crate::scoring::{Baseline, Remap, Scale};

    fn caption(v: [f32; 2]) -> Arc<CaptionVector> {
        Arc::new(CaptionVector {
            vector: v.to_vec(),
            tokens: 3,
            truncated: false,
        })
    }

    /// One group over the image (1, 0), no references.
    fn score_on_x(
        spec: &RewardSpec,
        samples: &[Arc<CaptionVector>],
        greedy: Option<&Arc<CaptionVector>>,
        signals: Option<&[Signals]>,
    ) -> GroupScores {
        let vectors = GroupVectors {
            image: &[1.0, 0.0],
            samples,
            references: &[],
            greedy: greedy.map(|v| &**v),
            signals,
        };
        score_group(spec, "img".into(), &vectors)
    }

    #[derive(Debug)]
    struct Halve;
    impl Remap for Halve {
        fn apply(&self, c: f32) -> f32 {
            c / 2.0
        }
    }

    #[test]
    fn clip_s_with_mean_of_others_by_hand() {
        // Image (1, 0); captions at cosines 0.8, 0.6, 0 (their first coordinate).
        // CLIP-S, w = 2.5 (Hessel et al. 2021, eq. 1): 2.0, 1.5, 0.0.
        // Mean of others (Luo 2020): b = (1.5 + 0)/2 = 0.75, (2 + 0)/2 = 1, (2 + 1.5)/2 = 1.75.
        let spec =
            RewardSpec::new(Scale::ClipS { weight: 2.5 }, Baseline::MeanOfOthers, None).unwrap();
        let samples = [
            caption([0.8, 0.6]),
            caption([0.6, 0.8]),
            caption([0.0, 1.0]),
        ];
        let out = score_on_x(&spec, &samples, None, None);
        let want = [(2.0, 1.25), (1.5, 0.5), (0.0, -1.75)];
        for (s, (reward, advantage)) in out.samples.iter().zip(want) {
            assert!(
                (s.reward - reward).abs() < 1e-6 && (s.advantage - advantage).abs() < 1e-6,
                "{s:?}"
            );
        }
    }

    #[test]
    fn remap_applies_before_the_scale_and_greedy_is_the_baseline() {
        let spec = RewardSpec::new(Scale::Cosine, Baseline::Greedy, Some(Arc::new(Halve))).unwrap();
        let samples = [caption([0.8, 0.6])];
        let greedy = caption([0.6, 0.8]);
        let out = score_on_x(&spec, &samples, Some(&greedy), None);
        // cosine stays raw (0.8); reward 0.4; greedy reward 0.3; advantage 0.1.
        assert!((out.samples[0].cosine - 0.8).abs() < 1e-6);
        assert!((out.samples[0].reward - 0.4).abs() < 1e-6);
        assert!((out.samples[0].advantage - 0.1).abs() < 1e-6);
        assert!((out.greedy.unwrap().reward - 0.3).abs() < 1e-6);
    }

    #[test]
    fn the_guard_applies_before_the_baseline() {
        // Cosines 0.8 and 0.6; a length penalty below 4 tokens of weight 1:
        // the 2-token caption loses (4 - 2) / 4 = 0.5, the 4-token one nothing.
        // Guarded rewards 0.3 and 0.6; mean of others: -0.3 and 0.3.
        let guard = crate::scoring::Guard::new(
            serde_json::from_value(
                serde_json::json!({"penalties": {"length": {"below": 4, "weight": 1}}}),
            )
            .unwrap(),
            None,
            None,
        )
        .unwrap();
        let spec = RewardSpec::new(Scale::Cosine, Baseline::MeanOfOthers, None)
            .unwrap()
            .with_guard(guard);
        let samples = [caption([0.8, 0.6]), caption([0.6, 0.8])];
        let signals = [
            Signals::of_text("red cube", &[1, 2], None),
            Signals::of_text("a red cube here", &[1, 2, 3, 4], None),
        ];
        let out = score_on_x(&spec, &samples, None, Some(&signals));
        let got: Vec<(f32, f32)> = out
            .samples
            .iter()
            .map(|s| (s.reward, s.advantage))
            .collect();
        for ((r, a), (wr, wa)) in got.iter().zip([(0.3, -0.3), (0.6, 0.3)]) {
            assert!((r - wr).abs() < 1e-6 && (a - wa).abs() < 1e-6, "{got:?}");
        }
        let g = out.samples[0].guard.as_ref().unwrap();
        assert_eq!((g.scaled, g.flagged.clone()), (0.8, vec!["length"]));
    }
}

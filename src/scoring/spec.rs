//! A reward request in domain terms: the validated spec (scale, baseline,
//! remap) and the groups to score, checked once for every caller (the HTTP
//! route and `befit score`).

use std::sync::Arc;

use serde::Deserialize;

use super::guard::Guard;
use super::{Baseline, BaselineError, Scale, ScaleError};
use crate::intake::image_source::ImageSource;
use crate::intake::limits::{Limit, Limits};
use crate::intake::validation::{Invalid, Problem};

/// Moves a cosine of the model being scored onto another model's scale.
pub trait Remap: Send + Sync + std::fmt::Debug {
    fn apply(&self, cosine: f32) -> f32;
}

/// How cosines become rewards and advantages, checked.
#[derive(Debug, Clone)]
pub struct RewardSpec {
    scale: Scale,
    baseline: Baseline,
    remap: Option<Arc<dyn Remap>>,
    guard: Option<Guard>,
}

impl RewardSpec {
    /// Refuses a scale whose parameters make no reward.
    pub fn new(
        scale: Scale,
        baseline: Baseline,
        remap: Option<Arc<dyn Remap>>,
    ) -> Result<RewardSpec, Invalid> {
        scale
            .check()
            .map_err(|e| Invalid::new("scale", Problem::Scale(e)))?;
        Ok(RewardSpec {
            scale,
            baseline,
            remap,
            guard: None,
        })
    }

    /// The spec with a checked guard: rewards become guarded rewards.
    pub fn with_guard(mut self, guard: Guard) -> RewardSpec {
        self.guard = Some(guard);
        self
    }

    /// The guard, when the request has one.
    pub fn guard(&self) -> Option<&Guard> {
        self.guard.as_ref()
    }

    pub fn scale(&self) -> Scale {
        self.scale
    }

    pub fn baseline(&self) -> Baseline {
        self.baseline
    }

    /// The cosine on the scale rewards are computed on (remapped when asked).
    pub fn on_scale(&self, cosine: f32) -> f32 {
        self.remap.as_ref().map_or(cosine, |m| m.apply(cosine))
    }
}

/// One image and the captions sampled for it.
#[derive(Debug, Clone)]
pub struct RewardGroup {
    pub image: ImageSource,
    pub captions: Vec<String>,
    pub references: Vec<String>,
    pub greedy: Option<String>,
}

/// A group as JSON carries it (the `/v1/rewards` group and a `befit score` line).
#[derive(Debug, Clone, Deserialize, utoipa::ToSchema)]
#[serde(deny_unknown_fields)]
pub struct GroupJson {
    pub image: crate::intake::image_source::ImageRef,
    pub captions: Vec<String>,
    #[serde(default)]
    pub references: Vec<String>,
    pub greedy: Option<String>,
}

impl GroupJson {
    /// The domain group; `field` (say `groups[3]`) is blamed in errors.
    pub fn into_group(self, field: &str) -> Result<RewardGroup, Invalid> {
        Ok(RewardGroup {
            image: self.image.source(&format!("{field}.image"))?,
            captions: self.captions,
            references: self.references,
            greedy: self.greedy,
        })
    }
}

impl RewardGroup {
    /// Texts of the group in the order they are encoded: samples, references, greedy.
    pub fn texts(&self) -> impl Iterator<Item = &String> {
        self.captions
            .iter()
            .chain(&self.references)
            .chain(self.greedy.as_ref())
    }

    /// How many texts the group sends to the encoder.
    pub fn text_count(&self) -> usize {
        self.captions.len() + self.references.len() + usize::from(self.greedy.is_some())
    }
}

/// Refuses what no scoring could answer, before any encoder work: `field`
/// prefixes every blamed field (`groups`).
pub fn check_groups(
    groups: &[RewardGroup],
    spec: &RewardSpec,
    limits: &Limits,
    field: &str,
) -> Result<(), Invalid> {
    if groups.is_empty() {
        return Err(Invalid::new(field, Problem::Missing("group")));
    }
    limits.check(Limit::Groups, groups.len(), field)?;
    let total: usize = groups.iter().map(RewardGroup::text_count).sum();
    limits.check(Limit::Captions, total, field)?;
    for (g, group) in groups.iter().enumerate() {
        check_group(group, spec, limits, &format!("{field}[{g}]"))?;
    }
    Ok(())
}

/// One group's checks; `at` (say `groups[3]`) prefixes its fields.
pub fn check_group(
    group: &RewardGroup,
    spec: &RewardSpec,
    limits: &Limits,
    at: &str,
) -> Result<(), Invalid> {
    let field = |name: &str| format!("{at}.{name}");
    limits.check_captions(&group.captions, &field("captions"))?;
    if spec.scale.needs_references() && group.references.is_empty() {
        return Err(Invalid::new(
            field("references"),
            Problem::Scale(ScaleError::NoReferences),
        ));
    }
    for (i, text) in group.references.iter().enumerate() {
        limits.check_caption(text, &format!("{}[{i}]", field("references")))?;
    }
    if let Some(greedy) = &group.greedy {
        limits.check_caption(greedy, &field("greedy"))?;
    }
    match spec.baseline {
        Baseline::MeanOfOthers if group.captions.len() < 2 => Err(Invalid::new(
            field("captions"),
            Problem::Baseline(BaselineError::TooFewSamples),
        )),
        Baseline::Greedy if group.greedy.is_none() => Err(Invalid::new(
            field("greedy"),
            Problem::Baseline(BaselineError::NoGreedy),
        )),
        _ => Ok(()),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn group(captions: &[&str]) -> RewardGroup {
        RewardGroup {
            image: ImageSource::Id("0".repeat(64)),
            captions: captions.iter().map(|c| c.to_string()).collect(),
            references: Vec::new(),
            greedy: None,
        }
    }

    #[test]
    fn checks_blame_the_group_and_field() {
        let limits = Limits::default();
        let spec = RewardSpec::new(Scale::Cosine, Baseline::MeanOfOthers, None).unwrap();
        let ok = [group(&["a red cube", "a blue ring"])];
        assert!(check_groups(&ok, &spec, &limits, "groups").is_ok());
        let bad = [group(&["a red cube", "a blue ring"]), group(&["one"])];
        let e = check_groups(&bad, &spec, &limits, "groups").unwrap_err();
        assert_eq!(e.field, "groups[1].captions");
        assert_eq!(e.problem, Problem::Baseline(BaselineError::TooFewSamples));
        let spec = RewardSpec::new(Scale::RefClipS { weight: 2.5 }, Baseline::None, None).unwrap();
        let e = check_groups(&ok, &spec, &limits, "groups").unwrap_err();
        assert_eq!(e.field, "groups[0].references");
        let spec = RewardSpec::new(Scale::Cosine, Baseline::Greedy, None).unwrap();
        assert_eq!(
            check_groups(&ok, &spec, &limits, "groups")
                .unwrap_err()
                .field,
            "groups[0].greedy"
        );
        let e = RewardSpec::new(Scale::ClipS { weight: 0.0 }, Baseline::None, None).unwrap_err();
        assert_eq!(
            (e.field.as_str(), e.problem),
            ("scale", Problem::Scale(ScaleError::Weight(0.0)))
        );
        let few = Limits {
            max_captions: 3,
            ..Limits::default()
        };
        let spec = RewardSpec::new(Scale::Cosine, Baseline::None, None).unwrap();
        let two = [group(&["a", "b"]), group(&["c", "d"])];
        assert!(check_groups(&two, &spec, &few, "groups")
            .unwrap_err()
            .problem
            .is_over_limit());
    }
}

//! `POST /v1/rewards`: rewards and advantages for sampled captions, grouped by image.

use axum::extract::State;
use axum::http::StatusCode;
use axum::Json;
use serde::{Deserialize, Serialize};

use super::ModelRef;
use crate::scoring::{advantages, Baseline, BaselineError, Scale};
use crate::server::error::ApiError;
use crate::server::image_ref::ImageRef;
use crate::server::json::ApiJson;
use crate::server::limits::Limits;
use crate::server::state::AppState;
use crate::vectors::dot;

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RewardsRequest {
    pub model: Option<String>,
    #[serde(default)]
    pub scale: Scale,
    #[serde(default)]
    pub baseline: Baseline,
    pub remap: Option<String>,
    pub groups: Vec<GroupIn>,
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct GroupIn {
    pub image: ImageRef,
    pub captions: Vec<String>,
    #[serde(default)]
    pub references: Vec<String>,
    pub greedy: Option<String>,
}

#[derive(Debug, Serialize)]
pub struct RewardsResponse {
    pub model: ModelRef,
    pub scale: Scale,
    pub baseline: Baseline,
    pub remap: Option<String>,
    pub groups: Vec<GroupOut>,
}

#[derive(Debug, Serialize)]
pub struct GroupOut {
    pub image: String,
    pub samples: Vec<Sample>,
    pub greedy: Option<Scored>,
}

#[derive(Debug, Serialize)]
pub struct Sample {
    pub cosine: f32,
    pub reward: f32,
    pub advantage: f32,
    pub truncated: bool,
}

#[derive(Debug, Serialize)]
pub struct Scored {
    pub cosine: f32,
    pub reward: f32,
    pub truncated: bool,
}

/// Refuses what no scoring could answer, before any encoder work.
fn validate(request: &RewardsRequest, limits: &Limits) -> Result<(), ApiError> {
    if request.groups.is_empty() {
        return Err(ApiError::invalid("groups", "give at least one group"));
    }
    if request.groups.len() > limits.max_groups {
        return Err(ApiError::over_limit(
            "groups",
            "number of groups",
            limits.max_groups,
            "--max-groups",
        ));
    }
    request
        .scale
        .check()
        .map_err(|m| ApiError::invalid("scale", m))?;
    let mut total = 0usize;
    for (g, group) in request.groups.iter().enumerate() {
        let field = |name: &str| format!("groups[{g}].{name}");
        if group.captions.is_empty() {
            return Err(ApiError::invalid(
                field("captions"),
                "give at least one caption",
            ));
        }
        if request.scale.needs_references() && group.references.is_empty() {
            return Err(ApiError::invalid(
                field("references"),
                "the ref-clip-s scale needs reference captions",
            ));
        }
        match request.baseline {
            Baseline::MeanOfOthers if group.captions.len() < 2 => {
                return Err(ApiError::invalid(
                    field("captions"),
                    BaselineError::TooFewSamples.to_string(),
                ));
            }
            Baseline::Greedy if group.greedy.is_none() => {
                return Err(ApiError::invalid(
                    field("greedy"),
                    BaselineError::NoGreedy.to_string(),
                ));
            }
            _ => {}
        }
        let texts = group.captions.iter().map(|c| ("captions", c));
        let texts = texts.chain(group.references.iter().map(|c| ("references", c)));
        let texts = texts.chain(group.greedy.iter().map(|c| ("greedy", c)));
        for (i, (kind, text)) in texts.enumerate() {
            total += 1;
            let at = if kind == "greedy" {
                field(kind)
            } else {
                format!("{}[{}]", field(kind), position(group, kind, i))
            };
            if text.trim().is_empty() {
                return Err(ApiError::invalid(at, "captions must not be empty"));
            }
            if text.len() > limits.max_caption_bytes {
                return Err(ApiError::over_limit(
                    at,
                    "caption length in bytes",
                    limits.max_caption_bytes,
                    "--max-caption-bytes",
                ));
            }
        }
    }
    if total > limits.max_captions {
        return Err(ApiError::over_limit(
            "groups",
            "number of captions",
            limits.max_captions,
            "--max-captions",
        ));
    }
    Ok(())
}

/// Index of the `i`-th text of a group within its own list.
fn position(group: &GroupIn, kind: &str, i: usize) -> usize {
    match kind {
        "references" => i - group.captions.len(),
        _ => i,
    }
}

pub async fn score(
    State(state): State<AppState>,
    ApiJson(request): ApiJson<RewardsRequest>,
) -> Result<Json<RewardsResponse>, ApiError> {
    let engine = state.engine()?;
    validate(&request, state.limits())?;
    let model = engine.model(request.model.as_deref())?;
    let remap = match &request.remap {
        None => None,
        Some(name) => Some(state.map(name).ok_or_else(|| {
            let known = state.map_names();
            let known = if known.is_empty() {
                "none is registered".to_string()
            } else {
                format!("known: {}", known.join(", "))
            };
            ApiError::new(
                StatusCode::NOT_FOUND,
                "unknown_map",
                format!("no reward map named {name:?}; {known}"),
            )
            .at("remap")
        })?),
    };
    let sources = request
        .groups
        .iter()
        .enumerate()
        .map(|(g, group)| group.image.source(&format!("groups[{g}].image")))
        .collect::<Result<Vec<_>, _>>()?;
    let images =
        futures::future::try_join_all(sources.iter().enumerate().map(|(g, source)| async move {
            engine
                .image_vector(model, source)
                .await
                .map_err(|e| ApiError::from(e).at(format!("groups[{g}].image")))
        }));
    // Every caption of the request in one submission, so they share encoder batches.
    let mut texts: Vec<String> = Vec::new();
    for group in &request.groups {
        texts.extend(group.captions.iter().cloned());
        texts.extend(group.references.iter().cloned());
        texts.extend(group.greedy.iter().cloned());
    }
    let captions = async { model.caption_vectors(&texts).await.map_err(ApiError::from) };
    let (images, captions) = futures::future::try_join(images, captions).await?;

    let mut at = 0usize;
    let mut groups = Vec::with_capacity(request.groups.len());
    for (group, (image_id, image)) in request.groups.iter().zip(images) {
        let samples = &captions[at..at + group.captions.len()];
        at += group.captions.len();
        let references = &captions[at..at + group.references.len()];
        at += group.references.len();
        let greedy = group.greedy.as_ref().map(|_| {
            at += 1;
            &captions[at - 1]
        });
        let score_one = |v: &[f32]| {
            let cosine = dot(v, &image);
            // The map moves this bundle's image-caption cosine onto the old bundle's scale.
            let on_scale = remap.as_ref().map_or(cosine, |m| m.apply(cosine));
            let reference = references
                .iter()
                .map(|r| dot(v, &r.vector))
                .reduce(f32::max);
            (cosine, request.scale.reward(on_scale, reference))
        };
        let scored: Vec<(f32, f32)> = samples.iter().map(|s| score_one(&s.vector)).collect();
        let greedy_out = greedy.map(|g| {
            let (cosine, reward) = score_one(&g.vector);
            Scored {
                cosine,
                reward,
                truncated: g.truncated,
            }
        });
        let rewards: Vec<f32> = scored.iter().map(|(_, r)| *r).collect();
        let advantage = advantages(
            &rewards,
            request.baseline,
            greedy_out.as_ref().map(|g| g.reward),
        )
        .map_err(|e| ApiError::invalid("baseline", e.to_string()))?;
        groups.push(GroupOut {
            image: image_id,
            samples: scored
                .iter()
                .zip(samples)
                .zip(advantage)
                .map(|(((cosine, reward), s), advantage)| Sample {
                    cosine: *cosine,
                    reward: *reward,
                    advantage,
                    truncated: s.truncated,
                })
                .collect(),
            greedy: greedy_out,
        });
    }
    Ok(Json(RewardsResponse {
        model: ModelRef::of(model),
        scale: request.scale,
        baseline: request.baseline,
        remap: request.remap,
        groups,
    }))
}

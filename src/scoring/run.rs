//! Scoring whole requests through the engine: every image of the request
//! resolved (caches first) while every caption goes to the text encoder in
//! one submission, so a request's captions share encoder batches.

use std::sync::Arc;

use super::group::{score_group, GroupScores, GroupVectors};
use super::spec::{RewardGroup, RewardSpec};
use crate::encoders::{Engine, EngineError, Model};

/// Why scoring failed, with the field to blame when one image is at fault.
#[derive(Debug, thiserror::Error)]
#[error("{source}")]
pub struct ScoreError {
    /// `groups[3].image` when one group's image failed; none for the text encoder.
    pub field: Option<String>,
    #[source]
    pub source: EngineError,
}

/// Rewards of checked groups (see [`super::check_groups`]), in order.
pub async fn score_groups(
    engine: &Engine,
    model: &Arc<Model>,
    spec: &RewardSpec,
    groups: &[RewardGroup],
    field: &str,
) -> Result<Vec<GroupScores>, ScoreError> {
    let images =
        futures::future::try_join_all(groups.iter().enumerate().map(|(g, group)| async move {
            engine
                .image_vector(model, &group.image)
                .await
                .map_err(|source| ScoreError {
                    field: Some(format!("{field}[{g}].image")),
                    source,
                })
        }));
    let texts: Vec<String> = groups
        .iter()
        .flat_map(RewardGroup::texts)
        .cloned()
        .collect();
    let captions = async {
        model.caption_vectors(&texts).await.map_err(|e| ScoreError {
            field: None,
            source: EngineError::from(e),
        })
    };
    let (images, captions) = futures::future::try_join(images, captions).await?;
    let mut at = 0usize;
    let mut take = |n: usize| {
        let slice = &captions[at..at + n];
        at += n;
        slice
    };
    Ok(groups
        .iter()
        .zip(images)
        .map(|(group, (image_id, image))| {
            let samples = take(group.captions.len());
            let references = take(group.references.len());
            let greedy = take(usize::from(group.greedy.is_some())).first();
            let vectors = GroupVectors {
                image: &image,
                samples,
                references,
                greedy: greedy.map(|g| g.as_ref()),
            };
            score_group(spec, image_id, &vectors)
        })
        .collect())
}

//! Scoring whole requests through the engine: every image of the request
//! resolved (caches first) while every caption goes to the text encoder in
//! one submission, so a request's captions share encoder batches.

use std::sync::Arc;

use super::group::{score_group, GroupScores, GroupVectors};
use super::guard::{Guard, Signals};
use super::spec::{RewardGroup, RewardSpec};
use crate::encoders::{CaptionVector, Engine, EngineError, Model};

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
    let signals = match spec.guard() {
        Some(guard) => Some(guard_signals(guard, model, groups, &captions).await?),
        None => None,
    };
    let mut signals_of = signals.as_deref().map(|all| {
        let mut at = 0usize;
        move |n: usize| {
            let slice = &all[at..at + n];
            at += n;
            slice
        }
    });
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
            let guarded = group.captions.len() + usize::from(group.greedy.is_some());
            let vectors = GroupVectors {
                image: &image,
                samples,
                references,
                greedy: greedy.map(|g| g.as_ref()),
                signals: signals_of.as_mut().map(|take| take(guarded)),
            };
            score_group(spec, image_id, &vectors)
        })
        .collect())
}

/// The guard's signals of every sample and greedy caption of the groups, in
/// order (each group's samples, then its greedy caption); the fluency head
/// and the bank run off the async runtime.
async fn guard_signals(
    guard: &Guard,
    model: &Arc<Model>,
    groups: &[RewardGroup],
    captions: &[Arc<CaptionVector>],
) -> Result<Vec<Signals>, ScoreError> {
    let unknown = model.unknown_token_id();
    let mut texts: Vec<(&String, Arc<CaptionVector>)> = Vec::new();
    let mut at = 0usize;
    for group in groups {
        let encoded = &captions[at..at + group.text_count()];
        at += group.text_count();
        texts.extend(group.captions.iter().zip(encoded.iter().cloned()));
        if let (Some(greedy), Some(vector)) = (&group.greedy, encoded.last()) {
            texts.push((greedy, Arc::clone(vector)));
        }
    }
    let mut signals = Vec::with_capacity(texts.len());
    let mut ids = Vec::with_capacity(texts.len());
    for (text, vector) in &texts {
        // Checked captions were encoded, so they tokenise; the ids are the
        // ones the text tower saw (truncated at the bundle's limit).
        let tokens = model.tokenize(text).map_err(|e| ScoreError {
            field: None,
            source: EngineError::Task(format!("guard tokenising an encoded caption: {e}")),
        })?;
        let mut s = Signals::of_text(text, &tokens.ids, unknown);
        s.tokens = vector.tokens;
        signals.push(s);
        ids.push(tokens.ids);
    }
    if let Some(head) = guard.fluency() {
        let head = Arc::clone(head);
        let probabilities = off_runtime(move || {
            let rows: Vec<&[i64]> = ids.iter().map(Vec::as_slice).collect();
            head.probabilities(&rows)
        })
        .await
        .map_err(|message| ScoreError {
            field: None,
            source: EngineError::Task(format!("fluency head: {message}")),
        })?;
        if probabilities.len() != signals.len() {
            return Err(ScoreError {
                field: None,
                source: EngineError::Task(format!(
                    "fluency head gave {} probabilities for {} captions",
                    probabilities.len(),
                    signals.len()
                )),
            });
        }
        for (s, p) in signals.iter_mut().zip(probabilities) {
            s.fluency = Some(p);
        }
    }
    if let Some(bank) = guard.nearest() {
        let bank = Arc::clone(bank);
        let vectors: Vec<Arc<CaptionVector>> = texts.iter().map(|(_, v)| Arc::clone(v)).collect();
        let nearest = off_runtime(move || {
            let rows: Vec<&[f32]> = vectors.iter().map(|v| v.vector.as_slice()).collect();
            bank.nearest(&rows)
        })
        .await
        .map_err(|message| ScoreError {
            field: None,
            source: EngineError::Task(format!("guard asking the bank: {message}")),
        })?;
        for (s, cosine) in signals.iter_mut().zip(nearest) {
            s.bank_cosine = cosine;
        }
    }
    Ok(signals)
}

/// Runs a blocking measure of the guard on a blocking thread.
async fn off_runtime<T: Send + 'static>(
    work: impl FnOnce() -> Result<T, String> + Send + 'static,
) -> Result<T, String> {
    tokio::task::spawn_blocking(work)
        .await
        .map_err(|e| e.to_string())
        .and_then(|r| r)
}

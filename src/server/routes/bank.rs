//! `POST /v1/bank`, `GET /v1/bank`, `POST /v1/neighbors`: the caption bank
//! over HTTP (`docs/bank.md` has the shapes and the index's behaviour).

use std::sync::Arc;

use axum::extract::{Query, State};
use axum::http::StatusCode;
use axum::Json;
use serde::{Deserialize, Serialize};
use serde_json::{json, Value};

use super::ModelRef;
use crate::bank::{check_tag, BankAnswer, BankError, BankQuery, ModelBank, NewCaption, SearchMode};
use crate::encoders::Model;
use crate::server::error::ApiError;
use crate::server::image_ref::ImageRef;
use crate::server::json::ApiJson;
use crate::server::state::AppState;
use crate::vectors::dot;

/// Most neighbours one query may ask for.
pub const MAX_K: usize = 1000;

#[derive(Deserialize)]
#[serde(untagged)]
enum CaptionIn {
    Text(String),
    Tagged { text: String, tag: Option<String> },
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
pub struct AppendRequest {
    model: Option<String>,
    tag: Option<String>,
    captions: Vec<CaptionIn>,
}

#[derive(Serialize)]
struct AppendedOut {
    id: u64,
    new: bool,
}

fn bank_error(e: BankError) -> ApiError {
    match e {
        BankError::Invalid { position, problem } => {
            ApiError::invalid(format!("captions[{position}]"), problem)
        }
        BankError::TooMany { .. } => {
            ApiError::new(StatusCode::BAD_REQUEST, "over_limit", e.to_string()).at("captions")
        }
        BankError::NotLoaded(_) => ApiError::not_ready(),
        other => ApiError::internal(other),
    }
}

async fn blocking<T: Send + 'static>(
    f: impl FnOnce() -> Result<T, ApiError> + Send + 'static,
) -> Result<T, ApiError> {
    tokio::task::spawn_blocking(f)
        .await
        .map_err(ApiError::internal)?
}

fn model_bank(state: &AppState, model: &Model) -> Result<Arc<ModelBank>, ApiError> {
    state
        .bank()?
        .loaded(&model.bundle.digest)
        .ok_or_else(ApiError::not_ready)
}

pub async fn append(
    State(state): State<AppState>,
    ApiJson(request): ApiJson<AppendRequest>,
) -> Result<Json<Value>, ApiError> {
    let engine = state.engine()?;
    let limits = state.limits();
    let model = engine.model(request.model.as_deref())?;
    let bank = model_bank(&state, model)?;
    if request.captions.is_empty() {
        return Err(ApiError::invalid("captions", "give at least one caption"));
    }
    if request.captions.len() > limits.max_captions {
        return Err(ApiError::over_limit(
            "captions",
            "number of captions",
            limits.max_captions,
            "--max-captions",
        ));
    }
    if let Some(tag) = &request.tag {
        check_tag(tag).map_err(|m| ApiError::invalid("tag", m))?;
    }
    let mut texts = Vec::with_capacity(request.captions.len());
    let mut tags = Vec::with_capacity(request.captions.len());
    for (i, caption) in request.captions.into_iter().enumerate() {
        let (text, tag) = match caption {
            CaptionIn::Text(text) => (text, None),
            CaptionIn::Tagged { text, tag } => (text, tag),
        };
        if text.trim().is_empty() {
            return Err(ApiError::invalid(
                format!("captions[{i}]"),
                "captions must not be empty",
            ));
        }
        if text.len() > limits.max_caption_bytes {
            return Err(ApiError::over_limit(
                format!("captions[{i}]"),
                "caption length in bytes",
                limits.max_caption_bytes,
                "--max-caption-bytes",
            ));
        }
        if let Some(t) = &tag {
            check_tag(t).map_err(|m| ApiError::invalid(format!("captions[{i}].tag"), m))?;
        }
        texts.push(text);
        tags.push(tag.or_else(|| request.tag.clone()));
    }
    let vectors = model.caption_vectors(&texts).await?;
    let new: Vec<NewCaption> = texts
        .into_iter()
        .zip(tags)
        .zip(vectors)
        .map(|((text, tag), v)| NewCaption {
            text,
            tag,
            vector: v.vector.clone(),
        })
        .collect();
    // Answers only after the commit: the store syncs fully before append returns.
    let appended = blocking(move || bank.append(&new).map_err(bank_error)).await?;
    let out: Vec<AppendedOut> = appended
        .iter()
        .map(|a| AppendedOut {
            id: a.id,
            new: a.new,
        })
        .collect();
    Ok(Json(json!({"model": ModelRef::of(model), "captions": out})))
}

#[derive(Deserialize)]
pub struct StatsQuery {
    id: Option<u64>,
}

pub async fn stats(
    State(state): State<AppState>,
    Query(query): Query<StatsQuery>,
) -> Result<Json<Value>, ApiError> {
    let engine = Arc::clone(state.engine()?);
    let bank = state.bank()?.clone();
    if let Some(id) = query.id {
        let caption = blocking(move || bank.caption(id).map_err(bank_error)).await?;
        return match caption {
            Some(c) => Ok(Json(
                json!({"id": c.id, "text": c.text, "tags": c.tags, "added_unix_ms": c.added_unix_ms}),
            )),
            None => Err(ApiError::new(
                StatusCode::NOT_FOUND,
                "not_found",
                format!("no caption with id {id} in the bank"),
            )),
        };
    }
    let stats = blocking(move || bank.stats().map_err(bank_error)).await?;
    let models: Vec<Value> = stats
        .models
        .iter()
        .map(|index| {
            let model = engine
                .models()
                .iter()
                .find(|m| m.bundle.digest == index.digest)
                .map(|m| ModelRef::of(m));
            json!({"model": model, "index": index})
        })
        .collect();
    let tags: serde_json::Map<String, Value> = stats
        .tags
        .iter()
        .map(|(t, n)| (t.clone(), json!(n)))
        .collect();
    Ok(Json(
        json!({"captions": stats.captions, "file_bytes": stats.file_bytes, "tags": tags, "models": models}),
    ))
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
pub struct NeighborsRequest {
    model: Option<String>,
    text: Option<String>,
    image: Option<ImageRef>,
    vector: Option<Vec<f32>>,
    k: usize,
    tag: Option<String>,
    ef_search: Option<usize>,
    #[serde(default)]
    exact: bool,
    #[serde(default)]
    among: Among,
}

/// What a neighbour query searches.
#[derive(Deserialize, Default, Clone, Copy, PartialEq, Eq)]
#[serde(rename_all = "lowercase")]
enum Among {
    #[default]
    Captions,
    Images,
}

pub async fn neighbors(
    State(state): State<AppState>,
    ApiJson(request): ApiJson<NeighborsRequest>,
) -> Result<Json<Value>, ApiError> {
    let engine = state.engine()?;
    let model = engine.model(request.model.as_deref())?;
    if request.k == 0 || request.k > MAX_K {
        return Err(ApiError::invalid(
            "k",
            format!("k must be between 1 and {MAX_K}"),
        ));
    }
    if let Some(ef) = request.ef_search {
        if ef == 0 || ef > 10_000 {
            return Err(ApiError::invalid(
                "ef_search",
                "ef_search must be between 1 and 10000",
            ));
        }
    }
    let query: Vec<f32> = match (&request.text, &request.image, &request.vector) {
        (Some(text), None, None) => {
            if text.trim().is_empty() {
                return Err(ApiError::invalid("text", "the text must not be empty"));
            }
            model.caption_vectors(std::slice::from_ref(text)).await?[0]
                .vector
                .clone()
        }
        (None, Some(image), None) => {
            let source = image.source("image")?;
            engine
                .image_vector(model, &source)
                .await
                .map_err(|e| ApiError::from(e).at("image"))?
                .1
                .to_vec()
        }
        (None, None, Some(vector)) => {
            if vector.len() != model.dimension() {
                return Err(ApiError::invalid(
                    "vector",
                    format!(
                        "the vector has {} numbers, the model's dimension is {}",
                        vector.len(),
                        model.dimension()
                    ),
                ));
            }
            let mut v = vector.clone();
            if v.iter().any(|x| !x.is_finite()) || v.iter().all(|x| *x == 0.0) {
                return Err(ApiError::invalid(
                    "vector",
                    "the vector must be finite and not all zeros",
                ));
            }
            crate::vectors::normalise(&mut v);
            v
        }
        _ => {
            return Err(ApiError::invalid(
                "text",
                "give exactly one of `text`, `image` or `vector`",
            ))
        }
    };
    if request.among == Among::Images {
        let store = Arc::clone(engine.store());
        let digest = model.bundle.digest.clone();
        let k = request.k;
        let hits = blocking(move || {
            let all = store.vectors(&digest).map_err(ApiError::internal)?;
            let mut scored: Vec<(f32, String)> = all
                .into_iter()
                .map(|(id, v)| (dot(&query, &v), id))
                .collect();
            scored.sort_by(|a, b| b.0.total_cmp(&a.0).then_with(|| a.1.cmp(&b.1)));
            scored.truncate(k);
            Ok(scored)
        })
        .await?;
        let neighbors: Vec<Value> = hits
            .iter()
            .map(|(c, id)| json!({"id": id, "cosine": c}))
            .collect();
        return Ok(Json(
            json!({"model": ModelRef::of(model), "answered": "exact", "ef_search": 0, "neighbors": neighbors}),
        ));
    }
    let bank = model_bank(&state, model)?;
    let mode = if request.exact {
        SearchMode::Exact
    } else {
        SearchMode::Auto
    };
    let q = BankQuery {
        k: request.k,
        ef_search: request.ef_search,
        tag: request.tag.clone(),
        mode,
    };
    let answer: BankAnswer = blocking(move || bank.search(&query, &q).map_err(bank_error)).await?;
    Ok(Json(json!({
        "model": ModelRef::of(model),
        "answered": answer.answered,
        "ef_search": answer.ef_search,
        "neighbors": answer.hits,
    })))
}

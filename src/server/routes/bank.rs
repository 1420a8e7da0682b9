//! `POST /v1/bank`, `GET /v1/bank`, `POST /v1/neighbors`: the caption bank
//! over HTTP (`docs/bank.md` has the shapes and the index's behaviour).

use std::sync::Arc;

use axum::extract::rejection::QueryRejection;
use axum::extract::{Query, State};
use axum::Extension;
use axum::Json;
use serde::{Deserialize, Serialize};
use utoipa::{IntoParams, ToSchema};

use super::ModelRef;
use crate::bank::index::{check_query_count, unit_vector};
use crate::bank::index::{Answered, IndexStats};
use crate::bank::store::Caption;
use crate::bank::{
    check_tag, BankAnswer, BankHit, BankQuery, IndexError, ModelBank, NewCaption, SearchMode,
};
use crate::encoders::Model;
use crate::intake::image_source::{sources, ImageRef};
use crate::intake::limits::Limit;
use crate::intake::validation::{Invalid, Problem};
use crate::server::access::{self, Caller};
use crate::server::error::{ApiError, ErrorCode};
use crate::server::json::{unreadable, ApiJson};
use crate::service::backfill::Progress;
use crate::service::Service;

/// A tag of the request, checked by the bank's rule before any embedding.
fn tag_ok(tag: &str, field: &str) -> Result<(), Invalid> {
    check_tag(tag).map_err(|_| {
        Invalid::new(
            field,
            Problem::Tag {
                max: crate::bank::MAX_TAG_BYTES,
            },
        )
    })
}

/// A caption to add: its text alone, or with a tag of its own.
#[derive(Deserialize, ToSchema)]
#[serde(untagged)]
enum CaptionIn {
    Text(String),
    Tagged { text: String, tag: Option<String> },
}

#[derive(Deserialize, ToSchema)]
#[serde(deny_unknown_fields)]
pub struct AppendRequest {
    model: Option<String>,
    tag: Option<String>,
    captions: Vec<CaptionIn>,
}

#[derive(Serialize, ToSchema)]
struct AppendedOut {
    id: u64,
    /// False when the bank already had the text with a vector for this model.
    new: bool,
}

/// The captions appended, in the request's order.
#[derive(Serialize, ToSchema)]
pub struct AppendAnswer {
    model: ModelRef,
    captions: Vec<AppendedOut>,
}

async fn blocking<T: Send + 'static>(
    f: impl FnOnce() -> Result<T, ApiError> + Send + 'static,
) -> Result<T, ApiError> {
    tokio::task::spawn_blocking(f)
        .await
        .map_err(ApiError::internal)?
}

fn model_bank(service: &Service, model: &Model) -> Result<Arc<ModelBank>, ApiError> {
    service
        .bank()?
        .loaded(&model.bundle.digest)
        .ok_or_else(ApiError::not_ready)
}

#[utoipa::path(post, path = "/v1/bank", operation_id = "append_captions", tag = "bank", request_body = AppendRequest,
    responses((status = 200, body = AppendAnswer), super::Failure))]
pub async fn append(
    State(service): State<Service>,
    caller: Option<Extension<Caller>>,
    ApiJson(request): ApiJson<AppendRequest>,
) -> Result<Json<AppendAnswer>, ApiError> {
    let engine = service.engine()?;
    let limits = service.limits();
    let model = engine.model(request.model.as_deref())?;
    let bank = model_bank(&service, model)?;
    if let Some(tag) = &request.tag {
        tag_ok(tag, "tag")?;
    }
    let mut texts = Vec::with_capacity(request.captions.len());
    let mut tags = Vec::with_capacity(request.captions.len());
    for (i, caption) in request.captions.into_iter().enumerate() {
        let (text, tag) = match caption {
            CaptionIn::Text(text) => (text, None),
            CaptionIn::Tagged { text, tag } => (text, tag),
        };
        if let Some(t) = &tag {
            tag_ok(t, &format!("captions[{i}].tag"))?;
        }
        texts.push(text);
        tags.push(tag.or_else(|| request.tag.clone()));
    }
    limits.check_captions(&texts, "captions")?;
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
    let appended = blocking(move || bank.append(&new).map_err(ApiError::from)).await?;
    access::audit(caller.as_deref(), "bank.append", appended.len());
    let out: Vec<AppendedOut> = appended
        .iter()
        .map(|a| AppendedOut {
            id: a.id,
            new: a.new,
        })
        .collect();
    Ok(Json(AppendAnswer {
        model: ModelRef::of(model),
        captions: out,
    }))
}

#[derive(Deserialize, IntoParams)]
#[into_params(parameter_in = Query)]
pub struct StatsQuery {
    /// A caption's id: answer that caption instead of the bank's numbers.
    id: Option<u64>,
}

/// `GET /v1/bank`: the bank's numbers, or one caption when `id` is given.
#[derive(Serialize, ToSchema)]
#[serde(untagged)]
pub enum BankView {
    Summary(BankSummary),
    Caption(Caption),
}

/// The bank's numbers (also the live page's bank section).
#[derive(Serialize, ToSchema)]
pub struct BankSummary {
    /// Distinct captions in the store.
    captions: u64,
    /// Size of `bank.sqlite`, in bytes.
    file_bytes: u64,
    /// Captions per tag.
    tags: std::collections::BTreeMap<String, u64>,
    /// One entry per loaded model index.
    models: Vec<BankModel>,
}

/// One model's index of the bank.
#[derive(Serialize, ToSchema)]
pub struct BankModel {
    /// The loaded model with this digest (none when no loaded bundle has it).
    model: Option<ModelRef>,
    index: IndexStats,
    /// Its backfill, when captions lacked its vectors at start.
    backfill: Option<Progress>,
}

#[utoipa::path(get, path = "/v1/bank", operation_id = "bank", tag = "bank", params(StatsQuery),
    responses((status = 200, body = BankView), super::Failure))]
pub async fn stats(
    State(service): State<Service>,
    query: Result<Query<StatsQuery>, QueryRejection>,
) -> Result<Json<BankView>, ApiError> {
    let Query(query) = query
        .map_err(|e| unreadable("id", "a caption id (a whole number from 0)", e.body_text()))?;
    let Some(id) = query.id else {
        return Ok(Json(BankView::Summary(summary(&service).await?)));
    };
    let bank = service.bank()?.clone();
    let caption = blocking(move || bank.caption(id).map_err(ApiError::from)).await?;
    match caption {
        Some(c) => Ok(Json(BankView::Caption(c))),
        None => Err(ApiError::new(
            ErrorCode::NotFound,
            format!("no caption with id {id} in the bank"),
        )),
    }
}

/// The bank's numbers as `GET /v1/bank` answers them (also the live page's bank section).
pub async fn summary(service: &Service) -> Result<BankSummary, ApiError> {
    let engine = Arc::clone(service.engine()?);
    let bank = service.bank()?.clone();
    let backfills = service.backfills();
    let stats = blocking(move || bank.stats().map_err(ApiError::from)).await?;
    let models = stats
        .models
        .into_iter()
        .map(|index| BankModel {
            model: engine
                .models()
                .iter()
                .find(|m| m.bundle.digest == index.digest)
                .map(|m| ModelRef::of(m)),
            backfill: backfills.progress(&index.digest),
            index,
        })
        .collect();
    Ok(BankSummary {
        captions: stats.captions,
        file_bytes: stats.file_bytes,
        tags: stats.tags.into_iter().collect(),
        models,
    })
}

/// One query (`text`, `image` or `vector`) or a batch (`texts`, `images` or `vectors`).
#[derive(Deserialize, ToSchema)]
#[serde(deny_unknown_fields)]
pub struct NeighborsRequest {
    model: Option<String>,
    text: Option<String>,
    image: Option<ImageRef>,
    vector: Option<Vec<f32>>,
    texts: Option<Vec<String>>,
    images: Option<Vec<ImageRef>>,
    vectors: Option<Vec<Vec<f32>>>,
    k: usize,
    tag: Option<String>,
    ef_search: Option<usize>,
    #[serde(default)]
    exact: bool,
    #[serde(default)]
    among: Among,
}

/// What a neighbour query searches.
#[derive(Deserialize, Default, Clone, Copy, PartialEq, Eq, ToSchema)]
#[serde(rename_all = "lowercase")]
enum Among {
    #[default]
    Captions,
    Images,
}

/// The query vectors of a request, and whether it used a batch field
/// (`texts`, `images`, `vectors`), which shapes the answer as `results`.
struct Queries {
    vectors: Vec<Vec<f32>>,
    batch: bool,
}

const ONE_OF: &str = "`text`, `image`, `vector`, `texts`, `images` or `vectors`";

/// Embeds (or checks) the request's queries, in order.
async fn queries(
    service: &Service,
    model: &Arc<Model>,
    request: &NeighborsRequest,
) -> Result<Queries, ApiError> {
    let engine = service.engine()?;
    let limits = service.limits();
    let given = [
        request.text.is_some(),
        request.image.is_some(),
        request.vector.is_some(),
        request.texts.is_some(),
        request.images.is_some(),
        request.vectors.is_some(),
    ];
    if given.iter().filter(|g| **g).count() != 1 {
        return Err(Invalid::new("text", Problem::OneOf(ONE_OF)).into());
    }
    let single = |vector| Queries {
        vectors: vec![vector],
        batch: false,
    };
    let batch = |vectors| Queries {
        vectors,
        batch: true,
    };
    if let Some(text) = &request.text {
        limits.check_caption(text, "text")?;
        let v = model.caption_vectors(std::slice::from_ref(text)).await?;
        return Ok(single(v[0].vector.clone()));
    }
    if let Some(image) = &request.image {
        let source = image.source("image")?;
        let (_, v) = engine
            .image_vector(model, &source)
            .await
            .map_err(|e| ApiError::from(e).at("image"))?;
        return Ok(single(v.to_vec()));
    }
    if let Some(vector) = &request.vector {
        return Ok(single(unit_vector(
            vector,
            model.dimension(),
            &model.bundle.digest,
        )?));
    }
    if let Some(texts) = &request.texts {
        check_query_count("texts", texts.len())?;
        limits.check_captions(texts, "texts")?;
        let vs = model.caption_vectors(texts).await?;
        return Ok(batch(vs.iter().map(|v| v.vector.clone()).collect()));
    }
    if let Some(images) = &request.images {
        check_query_count("images", images.len())?;
        limits.check(Limit::Images, images.len(), "images")?;
        let sources = sources(images, "images")?;
        let vs = futures::future::try_join_all(sources.iter().enumerate().map(
            |(i, source)| async move {
                engine
                    .image_vector(model, source)
                    .await
                    .map(|(_, v)| v.to_vec())
                    .map_err(|e| ApiError::from(e).at(format!("images[{i}]")))
            },
        ))
        .await?;
        return Ok(batch(vs));
    }
    let vectors = request.vectors.as_deref().unwrap_or_default();
    check_query_count("vectors", vectors.len())?;
    let units = vectors
        .iter()
        .enumerate()
        .map(|(i, v)| {
            unit_vector(v, model.dimension(), &model.bundle.digest)
                .map_err(|e| vector_fault(e, format!("vectors[{i}]")))
        })
        .collect::<Result<Vec<_>, _>>()?;
    Ok(batch(units))
}

/// A refused query vector, blamed on its place in `vectors`.
fn vector_fault(e: IndexError, field: String) -> ApiError {
    match e {
        IndexError::Dimension { got, expected, .. } => Invalid::new(
            field,
            Problem::VectorLength {
                got,
                want: expected,
            },
        )
        .into(),
        IndexError::NotFinite { .. } | IndexError::Zero => {
            Invalid::new(field, Problem::VectorValues).into()
        }
        other => other.into(),
    }
}

/// Nearest captions (or images) of one query: the single form's answer, and
/// each entry of a batch's `results`.
#[derive(Serialize, ToSchema)]
pub struct Found {
    /// How the search was answered: by the graph or by the exact scan.
    answered: Answered,
    /// Breadth used (0 for the exact scan).
    ef_search: usize,
    /// Best first.
    neighbors: Vec<Hit>,
}

/// A caption of the bank, or a registered image (`among: "images"`).
#[derive(Serialize, ToSchema)]
#[serde(untagged)]
enum Hit {
    Caption(BankHit),
    Image(ImageHit),
}

/// A registered image near the query (`among: "images"`).
#[derive(Serialize, ToSchema)]
struct ImageHit {
    id: String,
    cosine: f32,
}

/// The answer of `POST /v1/neighbors`: one query's hits, or a batch's `results` in order.
#[derive(Serialize, ToSchema)]
#[serde(untagged)]
pub enum NeighborsAnswer {
    One(OneAnswer),
    Many(ManyAnswer),
}

/// The answer to `text`, `image` or `vector`.
#[derive(Serialize, ToSchema)]
pub struct OneAnswer {
    model: ModelRef,
    /// True while the model's bank is still being backfilled (absent for `among: "images"`).
    #[serde(skip_serializing_if = "Option::is_none")]
    partial: Option<bool>,
    #[serde(flatten)]
    found: Found,
}

/// The answer to `texts`, `images` or `vectors`.
#[derive(Serialize, ToSchema)]
pub struct ManyAnswer {
    model: ModelRef,
    /// True while the model's bank is still being backfilled (absent for `among: "images"`).
    #[serde(skip_serializing_if = "Option::is_none")]
    partial: Option<bool>,
    results: Vec<Found>,
}

impl NeighborsAnswer {
    fn new(model: &Model, partial: Option<bool>, mut found: Vec<Found>, batch: bool) -> Self {
        let model = ModelRef::of(model);
        match found.pop() {
            Some(one) if !batch => NeighborsAnswer::One(OneAnswer {
                model,
                partial,
                found: one,
            }),
            last => {
                found.extend(last);
                NeighborsAnswer::Many(ManyAnswer {
                    model,
                    partial,
                    results: found,
                })
            }
        }
    }
}

#[utoipa::path(post, path = "/v1/neighbors", operation_id = "neighbors", tag = "bank", request_body = NeighborsRequest,
    responses((status = 200, body = NeighborsAnswer), super::Failure))]
pub async fn neighbors(
    State(service): State<Service>,
    ApiJson(request): ApiJson<NeighborsRequest>,
) -> Result<Json<NeighborsAnswer>, ApiError> {
    let engine = service.engine()?;
    let model = engine.model(request.model.as_deref())?;
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
    // The bank's bounds on k and ef_search, before any embedding.
    q.check()?;
    let Queries { vectors, batch } = queries(&service, model, &request).await?;
    if request.among == Among::Images {
        let mut found = Vec::with_capacity(vectors.len());
        for query in vectors {
            let hits = engine.nearest_images(model, query, request.k).await?;
            found.push(Found {
                answered: Answered::Exact,
                ef_search: 0,
                neighbors: hits
                    .iter()
                    .map(|h| {
                        Hit::Image(ImageHit {
                            id: h.id.clone(),
                            cosine: h.cosine,
                        })
                    })
                    .collect(),
            });
        }
        return Ok(Json(NeighborsAnswer::new(model, None, found, batch)));
    }
    let bank = model_bank(&service, model)?;
    let partial = service.backfills().partial(&model.bundle.digest);
    let answers: Vec<BankAnswer> = if batch {
        blocking(move || bank.search_many(&vectors, &q).map_err(ApiError::from)).await?
    } else {
        let query = vectors.into_iter().next().unwrap_or_default();
        vec![blocking(move || bank.search(&query, &q).map_err(ApiError::from)).await?]
    };
    let found = answers
        .into_iter()
        .map(|a| Found {
            answered: a.answered,
            ef_search: a.ef_search,
            neighbors: a.hits.into_iter().map(Hit::Caption).collect(),
        })
        .collect();
    Ok(Json(NeighborsAnswer::new(
        model,
        Some(partial),
        found,
        batch,
    )))
}

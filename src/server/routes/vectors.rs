//! `POST /v1/vectors`: raw unit embeddings of images and captions.

use axum::extract::State;
use axum::Json;
use serde::{Deserialize, Serialize};
use utoipa::ToSchema;

use super::ModelRef;
use crate::intake::image_source::{sources, ImageRef};
use crate::intake::limits::Limit;
use crate::intake::validation::{Invalid, Problem};
use crate::server::error::ApiError;
use crate::server::json::ApiJson;
use crate::service::Service;

#[derive(Deserialize, ToSchema)]
#[serde(deny_unknown_fields)]
pub struct VectorsRequest {
    model: Option<String>,
    #[serde(default)]
    images: Vec<ImageRef>,
    #[serde(default)]
    texts: Vec<String>,
}

#[derive(Serialize, ToSchema)]
pub struct VectorsResponse {
    model: ModelRef,
    dimension: usize,
    images: Vec<ImageVector>,
    texts: Vec<TextVector>,
}

#[derive(Serialize, ToSchema)]
struct ImageVector {
    id: String,
    vector: Vec<f32>,
}

#[derive(Serialize, ToSchema)]
struct TextVector {
    vector: Vec<f32>,
    tokens: usize,
    truncated: bool,
}

#[utoipa::path(post, path = "/v1/vectors", operation_id = "vectors", tag = "scoring", request_body = VectorsRequest,
    responses((status = 200, body = VectorsResponse), super::Failure))]
pub async fn embed(
    State(service): State<Service>,
    ApiJson(request): ApiJson<VectorsRequest>,
) -> Result<Json<VectorsResponse>, ApiError> {
    let engine = service.engine()?;
    let limits = service.limits();
    if request.images.is_empty() && request.texts.is_empty() {
        return Err(Invalid::new("texts", Problem::Missing("image or text")).into());
    }
    limits.check(Limit::Images, request.images.len(), "images")?;
    if !request.texts.is_empty() {
        limits.check_captions(&request.texts, "texts")?;
    }
    let model = engine.model(request.model.as_deref())?;
    let sources = sources(&request.images, "images")?;
    let images =
        futures::future::try_join_all(sources.iter().enumerate().map(|(i, source)| async move {
            engine
                .image_vector(model, source)
                .await
                .map_err(|e| ApiError::from(e).at(format!("images[{i}]")))
        }));
    let texts = async {
        model
            .caption_vectors(&request.texts)
            .await
            .map_err(ApiError::from)
    };
    let (images, texts) = futures::future::try_join(images, texts).await?;
    Ok(Json(VectorsResponse {
        model: ModelRef::of(model),
        dimension: model.dimension(),
        images: images
            .into_iter()
            .map(|(id, v)| ImageVector {
                id,
                vector: v.to_vec(),
            })
            .collect(),
        texts: texts
            .iter()
            .map(|t| TextVector {
                vector: t.vector.clone(),
                tokens: t.tokens,
                truncated: t.truncated,
            })
            .collect(),
    }))
}

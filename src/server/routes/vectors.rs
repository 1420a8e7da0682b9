//! `POST /v1/vectors`: raw unit embeddings of images and captions.

use axum::extract::State;
use axum::Json;
use serde::{Deserialize, Serialize};

use super::ModelRef;
use crate::server::error::ApiError;
use crate::server::image_ref::ImageRef;
use crate::server::json::ApiJson;
use crate::server::state::AppState;

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
pub struct VectorsRequest {
    model: Option<String>,
    #[serde(default)]
    images: Vec<ImageRef>,
    #[serde(default)]
    texts: Vec<String>,
}

#[derive(Serialize)]
pub struct VectorsResponse {
    model: ModelRef,
    dimension: usize,
    images: Vec<ImageVector>,
    texts: Vec<TextVector>,
}

#[derive(Serialize)]
struct ImageVector {
    id: String,
    vector: Vec<f32>,
}

#[derive(Serialize)]
struct TextVector {
    vector: Vec<f32>,
    tokens: usize,
    truncated: bool,
}

pub async fn embed(
    State(state): State<AppState>,
    ApiJson(request): ApiJson<VectorsRequest>,
) -> Result<Json<VectorsResponse>, ApiError> {
    let engine = state.engine()?;
    let limits = state.limits();
    if request.images.is_empty() && request.texts.is_empty() {
        return Err(ApiError::invalid(
            "texts",
            "give at least one image or text",
        ));
    }
    if request.images.len() > limits.max_images {
        return Err(ApiError::over_limit(
            "images",
            "number of images",
            limits.max_images,
            "--max-images",
        ));
    }
    if request.texts.len() > limits.max_captions {
        return Err(ApiError::over_limit(
            "texts",
            "number of texts",
            limits.max_captions,
            "--max-captions",
        ));
    }
    for (i, text) in request.texts.iter().enumerate() {
        if text.trim().is_empty() {
            return Err(ApiError::invalid(
                format!("texts[{i}]"),
                "texts must not be empty",
            ));
        }
        if text.len() > limits.max_caption_bytes {
            return Err(ApiError::over_limit(
                format!("texts[{i}]"),
                "text length in bytes",
                limits.max_caption_bytes,
                "--max-caption-bytes",
            ));
        }
    }
    let model = engine.model(request.model.as_deref())?;
    let sources = request
        .images
        .iter()
        .enumerate()
        .map(|(i, r)| r.source(&format!("images[{i}]")))
        .collect::<Result<Vec<_>, _>>()?;
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

//! `GET /v1/models`: the loaded bundles and their metadata.

use axum::extract::State;
use axum::Json;
use serde::Serialize;
use utoipa::ToSchema;

use super::ModelRef;
use crate::bundle::manifest::{Filter, Padding, ResizeRule};
use crate::encoders::Model;
use crate::server::error::ApiError;
use crate::service::Service;

#[derive(Serialize, ToSchema)]
pub struct ModelsAnswer {
    /// The model a request without `model` uses.
    pub default: String,
    pub models: Vec<ModelInfo>,
}

/// One loaded bundle.
#[derive(Serialize, ToSchema)]
pub struct ModelInfo {
    #[serde(flatten)]
    pub identity: ModelRef,
    pub dimension: usize,
    pub image: ImageInfo,
    pub text: TextInfo,
    /// The bundle's `card.json`, when it has one (free-form).
    #[schema(value_type = Option<Object>)]
    pub card: Option<serde_json::Value>,
}

/// How the bundle prepares an image.
#[derive(Serialize, ToSchema)]
pub struct ImageInfo {
    pub size: u32,
    pub resize: ResizeRule,
    pub filter: Filter,
    pub mean: [f32; 3],
    pub std: [f32; 3],
}

/// How the bundle tokenises a caption.
#[derive(Serialize, ToSchema)]
pub struct TextInfo {
    pub max_tokens: usize,
    pub padding: Padding,
    pub prefix: String,
}

impl ModelInfo {
    fn of(model: &Model) -> ModelInfo {
        let manifest = &model.bundle.manifest;
        ModelInfo {
            identity: ModelRef::of(model),
            dimension: manifest.model.dimension,
            image: ImageInfo {
                size: manifest.image.size,
                resize: manifest.image.resize,
                filter: manifest.image.filter,
                mean: manifest.image.mean,
                std: manifest.image.std,
            },
            text: TextInfo {
                max_tokens: manifest.text.max_tokens,
                padding: manifest.text.padding,
                prefix: manifest.text.prefix.clone(),
            },
            card: model.bundle.card.clone(),
        }
    }
}

#[utoipa::path(get, path = "/v1/models", operation_id = "models", tag = "models",
    responses((status = 200, body = ModelsAnswer), super::Failure))]
pub async fn list(State(state): State<Service>) -> Result<Json<ModelsAnswer>, ApiError> {
    let engine = state.engine()?;
    Ok(Json(ModelsAnswer {
        default: engine.models()[0].id.clone(),
        models: engine.models().iter().map(|m| ModelInfo::of(m)).collect(),
    }))
}

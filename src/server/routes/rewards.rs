//! `POST /v1/rewards`: rewards and advantages for sampled captions, grouped by image.

use std::sync::Arc;

use axum::extract::State;
use axum::Json;
use serde::{Deserialize, Serialize};

use super::ModelRef;
use crate::scoring::{
    check_groups, score_groups, Baseline, GroupJson, GroupScores, Remap, RewardSpec, Scale,
};
use crate::server::error::ApiError;
use crate::server::json::ApiJson;
use crate::service::Service;

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RewardsRequest {
    pub model: Option<String>,
    #[serde(default)]
    pub scale: Scale,
    #[serde(default)]
    pub baseline: Baseline,
    pub remap: Option<String>,
    pub groups: Vec<GroupJson>,
}

#[derive(Debug, Serialize)]
pub struct RewardsResponse {
    pub model: ModelRef,
    pub scale: Scale,
    pub baseline: Baseline,
    pub remap: Option<String>,
    pub groups: Vec<GroupScores>,
}

pub async fn score(
    State(service): State<Service>,
    ApiJson(request): ApiJson<RewardsRequest>,
) -> Result<Json<RewardsResponse>, ApiError> {
    let engine = service.engine()?;
    let model = engine.model(request.model.as_deref())?;
    let remap = match &request.remap {
        Some(name) => {
            let map = service
                .maps()
                .for_model(name, &model.id, &model.bundle.digest)?;
            Some(map as Arc<dyn Remap>)
        }
        None => None,
    };
    let spec = RewardSpec::new(request.scale, request.baseline, remap)?;
    let groups = request
        .groups
        .into_iter()
        .enumerate()
        .map(|(g, group)| group.into_group(&format!("groups[{g}]")))
        .collect::<Result<Vec<_>, _>>()?;
    check_groups(&groups, &spec, service.limits(), "groups")?;
    let groups = score_groups(engine, model, &spec, &groups, "groups").await?;
    Ok(Json(RewardsResponse {
        model: ModelRef::of(model),
        scale: spec.scale(),
        baseline: spec.baseline(),
        remap: request.remap,
        groups,
    }))
}

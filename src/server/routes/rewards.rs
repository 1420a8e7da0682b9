//! `POST /v1/rewards`: rewards and advantages for sampled captions, grouped by image.

use std::sync::Arc;

use axum::extract::State;
use axum::Json;
use serde::{Deserialize, Serialize};
use utoipa::ToSchema;

use super::ModelRef;
use crate::runs::{record_scored, RunReport, RunTag, Thresholds, Warning};
use crate::scoring::bank_nearest::BankNearest;
use crate::scoring::{
    check_groups, score_groups, Baseline, GroupJson, GroupScores, Guard, GuardJson, Remap,
    RewardSpec, Scale,
};
use crate::server::error::ApiError;
use crate::server::json::ApiJson;
use crate::service::Service;

#[derive(Debug, Deserialize, ToSchema)]
#[serde(deny_unknown_fields)]
pub struct RewardsRequest {
    pub model: Option<String>,
    #[serde(default)]
    pub scale: Scale,
    #[serde(default)]
    pub baseline: Baseline,
    pub remap: Option<String>,
    pub guard: Option<GuardJson>,
    /// The training run the samples belong to (see `GET /v1/runs`).
    pub run: Option<String>,
    pub step: Option<u64>,
    /// Warning thresholds for the run, kept for its later requests.
    pub run_thresholds: Option<Thresholds>,
    pub groups: Vec<GroupJson>,
}

#[derive(Debug, Serialize, ToSchema)]
pub struct RewardsResponse {
    pub model: ModelRef,
    pub scale: Scale,
    pub baseline: Baseline,
    pub remap: Option<String>,
    /// The guard as applied, when the request has one (absent otherwise, so
    /// answers without a guard are what they were before guards existed).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub guard: Option<GuardJson>,
    pub groups: Vec<GroupScores>,
    /// The run and step the samples were counted in, when the request names a run.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub run: Option<RunReport>,
    /// Thresholds the run's step crosses, when the request names a run.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub warnings: Option<Vec<Warning>>,
}

#[utoipa::path(post, path = "/v1/rewards", operation_id = "rewards", tag = "scoring", request_body = RewardsRequest,
    responses((status = 200, body = RewardsResponse), super::Failure))]
pub async fn score(
    State(service): State<Service>,
    ApiJson(request): ApiJson<RewardsRequest>,
) -> Result<Json<RewardsResponse>, ApiError> {
    let tag = RunTag::from_request(request.run, request.step, request.run_thresholds)?;
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
    // The bundle's bank, when the server has one: the guard's nearest
    // caption and the watch's copies of bank captions.
    let bank = service
        .bank()
        .ok()
        .and_then(|bank| bank.loaded(&model.bundle.digest));
    let mut spec = RewardSpec::new(request.scale, request.baseline, remap)?;
    if let Some(json) = request.guard {
        let nearest = BankNearest::of(bank.clone());
        spec = spec.with_guard(Guard::new(json, model.fluency_head(), nearest)?);
    }
    let groups = request
        .groups
        .into_iter()
        .enumerate()
        .map(|(g, group)| group.into_group(&format!("groups[{g}]")))
        .collect::<Result<Vec<_>, _>>()?;
    check_groups(&groups, &spec, service.limits(), "groups")?;
    let scores = score_groups(engine, model, &spec, &groups, "groups").await?;
    let watched = match tag {
        Some(tag) => Some(record_scored(service.runs(), tag, groups, &scores, bank).await?),
        None => None,
    };
    let (run, warnings) = watched.unzip();
    Ok(Json(RewardsResponse {
        model: ModelRef::of(model),
        scale: spec.scale(),
        baseline: spec.baseline(),
        remap: request.remap,
        guard: spec.guard().map(|g| g.echo().clone()),
        groups: scores,
        run,
        warnings,
    }))
}

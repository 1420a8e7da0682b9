//! `GET /v1/runs` and `GET /v1/runs/NAME`: the run watch's runs and one
//! run's steps, filterable by step range.

use axum::extract::rejection::{PathRejection, QueryRejection};
use axum::extract::{Path, Query, State};
use axum::Json;
use serde::{Deserialize, Serialize};
use utoipa::{IntoParams, ToSchema};

use crate::runs::{RunInfo, StepSummary, MAX_SERIES_STEPS};
use crate::server::error::ApiError;
use crate::server::json::unreadable;
use crate::service::Service;

#[derive(Debug, Serialize, ToSchema)]
pub struct RunsAnswer {
    pub runs: Vec<RunInfo>,
}

#[utoipa::path(get, path = "/v1/runs", operation_id = "runs", tag = "runs",
    responses((status = 200, body = RunsAnswer), super::Failure))]
pub async fn list(State(service): State<Service>) -> Result<Json<RunsAnswer>, ApiError> {
    let watch = service.runs().clone();
    let runs = tokio::task::spawn_blocking(move || watch.list())
        .await
        .map_err(ApiError::internal)??;
    Ok(Json(RunsAnswer { runs }))
}

/// The step range of `GET /v1/runs/NAME`, both ends included.
#[derive(Debug, Deserialize, IntoParams)]
#[serde(deny_unknown_fields)]
#[into_params(parameter_in = Query)]
pub struct StepRange {
    pub from: Option<u64>,
    pub to: Option<u64>,
}

#[derive(Debug, Serialize, ToSchema)]
pub struct RunAnswer {
    #[serde(flatten)]
    pub run: RunInfo,
    /// True when the range held more than the steps one answer carries.
    pub more: bool,
    pub series: Vec<StepSummary>,
}

#[utoipa::path(get, path = "/v1/runs/{name}", operation_id = "run_series", tag = "runs",
    params(("name" = String, Path, description = "The run's name"), StepRange),
    responses((status = 200, body = RunAnswer), super::Failure))]
pub async fn series(
    State(service): State<Service>,
    name: Result<Path<String>, PathRejection>,
    range: Result<Query<StepRange>, QueryRejection>,
) -> Result<Json<RunAnswer>, ApiError> {
    let Path(name) = name.map_err(|e| unreadable("name", "a run name in UTF-8", e.body_text()))?;
    let Query(range) =
        range.map_err(|e| unreadable("from", "a whole step from 0, as is to", e.body_text()))?;
    let watch = service.runs().clone();
    let (from, to) = (range.from.unwrap_or(0), range.to.unwrap_or(u64::MAX));
    let (run, series) = tokio::task::spawn_blocking(move || watch.series(&name, from, to))
        .await
        .map_err(ApiError::internal)??;
    Ok(Json(RunAnswer {
        more: series.len() == MAX_SERIES_STEPS,
        run,
        series,
    }))
}

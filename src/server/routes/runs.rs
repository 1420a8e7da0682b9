//! `GET /v1/runs` and `GET /v1/runs/NAME`: the run watch's runs and one
//! run's steps, filterable by step range.

use axum::extract::rejection::QueryRejection;
use axum::extract::{Path, Query, State};
use axum::Json;
use serde::{Deserialize, Serialize};

use crate::runs::{RunInfo, StepSummary, MAX_SERIES_STEPS};
use crate::server::error::{ApiError, ErrorCode};
use crate::service::Service;

#[derive(Debug, Serialize)]
pub struct RunsAnswer {
    pub runs: Vec<RunInfo>,
}

pub async fn list(State(service): State<Service>) -> Result<Json<RunsAnswer>, ApiError> {
    let watch = service.runs().clone();
    let runs = tokio::task::spawn_blocking(move || watch.list())
        .await
        .map_err(ApiError::internal)??;
    Ok(Json(RunsAnswer { runs }))
}

/// The step range of `GET /v1/runs/NAME`, both ends included.
#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct StepRange {
    pub from: Option<u64>,
    pub to: Option<u64>,
}

#[derive(Debug, Serialize)]
pub struct RunAnswer {
    #[serde(flatten)]
    pub run: RunInfo,
    /// True when the range held more than the steps one answer carries.
    pub more: bool,
    pub series: Vec<StepSummary>,
}

pub async fn series(
    State(service): State<Service>,
    Path(name): Path<String>,
    range: Result<Query<StepRange>, QueryRejection>,
) -> Result<Json<RunAnswer>, ApiError> {
    let Query(range) = range.map_err(|e| {
        ApiError::new(
            ErrorCode::InvalidField,
            format!("from and to must be whole steps from 0: {}", e.body_text()),
        )
        .at("from")
    })?;
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

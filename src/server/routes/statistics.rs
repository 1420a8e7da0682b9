//! `POST /v1/calibration` and `POST /v1/drift`: the statistics of
//! `docs/statistics.md` over a probe set sent in the request.

use std::path::Path;
use std::sync::Arc;

use axum::extract::State;
use axum::Json;
use serde::{Deserialize, Serialize};
use serde_json::Value;

use super::ModelRef;
use crate::encoders::offline::EngineProbeEncoder;
use crate::encoders::{Engine, Model};
use crate::probe::{embed_probe, EmbedOptions, LoadOptions, ProbeError, ProbeSet, RowIssue};
use crate::server::error::ApiError;
use crate::server::json::ApiJson;
use crate::server::state::AppState;
use crate::stats::{
    self, CalibrationOptions, CalibrationReport, DriftOptions, DriftReport, ProbeVectors,
};

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
pub struct CalibrationRequest {
    model: Option<String>,
    probe: Vec<Value>,
    #[serde(default)]
    options: CalibrationOptions,
    #[serde(default)]
    skip_bad: bool,
}

#[derive(Serialize)]
pub struct CalibrationResponse {
    model: ModelRef,
    skipped: Vec<String>,
    report: CalibrationReport,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
pub struct DriftRequest {
    from: String,
    to: String,
    probe: Vec<Value>,
    #[serde(default)]
    options: DriftOptions,
    #[serde(default)]
    skip_bad: bool,
    save_map: Option<SaveMap>,
}

/// Keeps the fitted map under a name `/v1/rewards` accepts as `remap`.
#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
pub struct SaveMap {
    name: String,
    #[serde(default)]
    kind: MapKind,
}

#[derive(Deserialize, Default, Clone, Copy)]
#[serde(rename_all = "lowercase")]
enum MapKind {
    #[default]
    Monotone,
    Affine,
}

#[derive(Serialize)]
pub struct DriftResponse {
    from: ModelRef,
    to: ModelRef,
    skipped: Vec<String>,
    saved_map: Option<String>,
    report: DriftReport,
}

fn probe_error(e: ProbeError) -> ApiError {
    match e {
        ProbeError::Encoder { .. } => ApiError::internal(e),
        other => ApiError::invalid("probe", other.to_string()),
    }
}

fn parse_probe(
    state: &AppState,
    rows: Vec<Value>,
    skip_bad: bool,
) -> Result<(ProbeSet, Vec<RowIssue>), ApiError> {
    let limit = state.limits().max_probe_rows;
    if rows.len() > limit {
        return Err(ApiError::over_limit(
            "probe",
            "number of probe rows",
            limit,
            "--max-probe-rows",
        ));
    }
    let options = LoadOptions {
        skip_bad,
        check_files: false,
    };
    let loaded =
        ProbeSet::from_values(rows, Path::new(""), "request", &options).map_err(probe_error)?;
    Ok((loaded.set, loaded.skipped))
}

/// Embeds the probe set with one model on a blocking thread.
async fn embed_with(
    engine: &Arc<Engine>,
    model: &Arc<Model>,
    set: Arc<ProbeSet>,
    skip_bad: bool,
) -> Result<(ProbeVectors, Vec<RowIssue>), ApiError> {
    let encoder = EngineProbeEncoder {
        engine: Arc::clone(engine),
        model: Arc::clone(model),
        runtime: tokio::runtime::Handle::current(),
    };
    let options = EmbedOptions {
        bundle: model.id.clone(),
        skip_bad,
        ..EmbedOptions::default()
    };
    let embedded =
        tokio::task::spawn_blocking(move || embed_probe(&set, &encoder, &options, &mut |_, _| {}))
            .await
            .map_err(ApiError::internal)?
            .map_err(probe_error)?;
    Ok((embedded.vectors, embedded.skipped))
}

fn stats_error(e: stats::StatsError) -> ApiError {
    ApiError::invalid("options", e.to_string())
}

pub async fn calibration(
    State(state): State<AppState>,
    ApiJson(request): ApiJson<CalibrationRequest>,
) -> Result<Json<CalibrationResponse>, ApiError> {
    let engine = state.engine()?;
    request.options.validate().map_err(stats_error)?;
    let model = engine.model(request.model.as_deref())?;
    let (set, mut skipped) = parse_probe(&state, request.probe, request.skip_bad)?;
    let (vectors, dropped) = embed_with(engine, model, Arc::new(set), request.skip_bad).await?;
    skipped.extend(dropped);
    let options = request.options;
    let report = tokio::task::spawn_blocking(move || stats::calibrate(&vectors, &options))
        .await
        .map_err(ApiError::internal)?
        .map_err(stats_error)?;
    Ok(Json(CalibrationResponse {
        model: ModelRef::of(model),
        skipped: skipped.iter().map(|s| s.to_string()).collect(),
        report,
    }))
}

pub async fn drift(
    State(state): State<AppState>,
    ApiJson(request): ApiJson<DriftRequest>,
) -> Result<Json<DriftResponse>, ApiError> {
    let engine = state.engine()?;
    request.options.validate().map_err(stats_error)?;
    let from = engine
        .model(Some(&request.from))
        .map_err(|e| ApiError::from(e).at("from"))?;
    let to = engine
        .model(Some(&request.to))
        .map_err(|e| ApiError::from(e).at("to"))?;
    if let Some(save) = &request.save_map {
        if !crate::server::state::valid_map_name(&save.name) {
            return Err(ApiError::invalid(
                "save_map.name",
                "map names must match [A-Za-z0-9._-]+ (at most 64 characters)",
            ));
        }
    }
    let (set, mut skipped) = parse_probe(&state, request.probe, request.skip_bad)?;
    let set = Arc::new(set);
    let (a, dropped_a) = embed_with(engine, from, Arc::clone(&set), request.skip_bad).await?;
    let (b, dropped_b) = embed_with(engine, to, set, request.skip_bad).await?;
    skipped.extend(dropped_a);
    skipped.extend(dropped_b);
    let options = request.options;
    let report = tokio::task::spawn_blocking(move || stats::drift(&a, &b, &options))
        .await
        .map_err(ApiError::internal)?
        .map_err(stats_error)?;
    let saved_map = match request.save_map {
        Some(save) => {
            let fit = match save.kind {
                MapKind::Monotone => &report.continuity.monotone,
                MapKind::Affine => &report.continuity.affine,
            };
            state
                .save_map(&save.name, fit.map.clone())
                .map_err(ApiError::internal)?;
            Some(save.name)
        }
        None => None,
    };
    Ok(Json(DriftResponse {
        from: ModelRef::of(from),
        to: ModelRef::of(to),
        skipped: skipped.iter().map(|s| s.to_string()).collect(),
        saved_map,
        report,
    }))
}

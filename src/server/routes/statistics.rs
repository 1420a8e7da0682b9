//! `POST /v1/calibration` and `POST /v1/drift`: the statistics of
//! `docs/statistics.md` over a probe set sent in the request.

use std::path::Path;
use std::sync::Arc;

use axum::extract::State;
use axum::http::header::CONTENT_TYPE;
use axum::response::{IntoResponse, Response};
use axum::Extension;
use axum::Json;
use serde::{Deserialize, Serialize};
use serde_json::Value;
use utoipa::ToSchema;

use super::ModelRef;
use crate::encoders::offline::EngineProbeEncoder;
use crate::encoders::{Engine, Model};
use crate::intake::limits::Limit;
use crate::intake::validation::{Invalid, Problem};
use crate::probe::cancel::Cancel;
use crate::probe::{embed_probe, EmbedOptions, LoadOptions, ProbeSet, RowIssue};
use crate::server::access::{self, Caller, Scope};
use crate::server::error::ApiError;
use crate::server::json::ApiJson;
use crate::service::maps::{valid_map_name, MAX_MAP_NAME};
use crate::service::Service;
use crate::stats::{
    self, CalibrationOptions, CalibrationReport, DriftOptions, DriftReport, MapBundle,
    ProbeVectors, Provenance, RewardMap,
};

/// What a statistics route answers: the JSON report, or the same HTML page
/// as `befit calibrate --report` / `befit drift --report`.
#[derive(Deserialize, Default, Clone, Copy, PartialEq, Eq, ToSchema)]
#[serde(rename_all = "lowercase")]
pub enum ReportFormat {
    /// The JSON body of `docs/statistics.md`.
    #[default]
    Json,
    /// One self-contained HTML page, `text/html`.
    Html,
}

/// sha256 of the request's probe rows as JSON Lines: each row compact JSON
/// (keys in sorted order, as serde_json writes a parsed object), ended by a
/// newline. A file of such lines has the same digest under the CLI.
fn probe_sha256(rows: &[Value]) -> String {
    let mut lines = String::new();
    for row in rows {
        lines.push_str(&row.to_string());
        lines.push('\n');
    }
    stats::sha256_hex(lines.as_bytes())
}

fn html_page(page: String) -> Response {
    ([(CONTENT_TYPE, "text/html; charset=utf-8")], page).into_response()
}

#[derive(Deserialize, ToSchema)]
#[serde(deny_unknown_fields)]
pub struct CalibrationRequest {
    model: Option<String>,
    /// The probe rows, as the lines of a probe file (`docs/statistics.md`).
    #[schema(value_type = Vec<Object>)]
    probe: Vec<Value>,
    #[serde(default)]
    options: CalibrationOptions,
    #[serde(default)]
    skip_bad: bool,
    #[serde(default)]
    format: ReportFormat,
}

#[derive(Serialize, ToSchema)]
pub struct CalibrationResponse {
    model: ModelRef,
    skipped: Vec<String>,
    report: CalibrationReport,
}

#[derive(Deserialize, ToSchema)]
#[serde(deny_unknown_fields)]
pub struct DriftRequest {
    from: String,
    to: String,
    /// The probe rows, as the lines of a probe file (`docs/statistics.md`).
    #[schema(value_type = Vec<Object>)]
    probe: Vec<Value>,
    #[serde(default)]
    options: DriftOptions,
    #[serde(default)]
    skip_bad: bool,
    save_map: Option<SaveMap>,
    #[serde(default)]
    format: ReportFormat,
}

/// Keeps the fitted map under a name `/v1/rewards` accepts as `remap`.
#[derive(Deserialize, ToSchema)]
#[serde(deny_unknown_fields)]
pub struct SaveMap {
    name: String,
    #[serde(default)]
    kind: MapKind,
    /// Overwrite a map of that name (a map changes every later run's rewards).
    #[serde(default)]
    replace: bool,
}

#[derive(Deserialize, Default, Clone, Copy, ToSchema)]
#[serde(rename_all = "lowercase")]
enum MapKind {
    #[default]
    Monotone,
    Affine,
}

#[derive(Serialize, ToSchema)]
pub struct DriftResponse {
    from: ModelRef,
    to: ModelRef,
    skipped: Vec<String>,
    saved_map: Option<String>,
    report: DriftReport,
}

/// Parses the rows and checks every image can be read at all (a path needs
/// the server's image root) before any encoder work.
fn parse_probe(
    service: &Service,
    engine: &Engine,
    rows: Vec<Value>,
    skip_bad: bool,
) -> Result<(ProbeSet, Vec<RowIssue>), ApiError> {
    service
        .limits()
        .check(Limit::ProbeRows, rows.len(), "probe")?;
    let options = LoadOptions {
        skip_bad,
        check_files: false,
    };
    let loaded = ProbeSet::from_values(rows, Path::new(""), "request", &options)?;
    for row in &loaded.set.rows {
        engine
            .check_probe_source(&row.image, skip_bad)
            .map_err(|e| ApiError::from(e).at(format!("probe[{}].image", row.line - 1)))?;
    }
    Ok((loaded.set, loaded.skipped))
}

/// The example images' thumbnails, made on a blocking thread (files are read).
async fn thumbnails(
    engine: &Arc<Engine>,
    set: Arc<ProbeSet>,
    lines: std::collections::BTreeSet<usize>,
) -> Result<stats::Thumbnails, ApiError> {
    let engine = Arc::clone(engine);
    tokio::task::spawn_blocking(move || engine.thumbnails(&set, &lines))
        .await
        .map_err(ApiError::internal)
}

/// Embeds the probe set with one model on a blocking thread.
async fn embed_with(
    engine: &Arc<Engine>,
    model: &Arc<Model>,
    set: Arc<ProbeSet>,
    skip_bad: bool,
    cancel: &Cancel,
) -> Result<(ProbeVectors, Vec<RowIssue>), ApiError> {
    let encoder = EngineProbeEncoder {
        engine: Arc::clone(engine),
        model: Arc::clone(model),
        runtime: tokio::runtime::Handle::current(),
    };
    let options = EmbedOptions {
        bundle: model.id.clone(),
        skip_bad,
        cancel: cancel.clone(),
        ..EmbedOptions::default()
    };
    let embedded =
        tokio::task::spawn_blocking(move || embed_probe(&set, &encoder, &options, &mut |_, _| {}))
            .await
            .map_err(ApiError::internal)??;
    Ok((embedded.vectors, embedded.skipped))
}

#[utoipa::path(post, path = "/v1/calibration", operation_id = "calibration", tag = "statistics", request_body = CalibrationRequest,
    responses(
        (status = 200, content(
            (CalibrationResponse = "application/json"),
            (String = "text/html", example = "<!doctype html>..."),
        )),
        super::Failure,
    ))]
pub async fn calibration(
    State(service): State<Service>,
    ApiJson(request): ApiJson<CalibrationRequest>,
) -> Result<Response, ApiError> {
    let engine = service.engine()?;
    // Dropped with this future (a timeout, a client gone): the embedding stops.
    let cancel = Cancel::default();
    let _stop_when_gone = cancel.on_drop();
    request.options.validate()?;
    let model = engine.model(request.model.as_deref())?;
    let (probe_sha256, probe_rows) = (probe_sha256(&request.probe), request.probe.len());
    let (set, mut skipped) = parse_probe(&service, engine, request.probe, request.skip_bad)?;
    let set = Arc::new(set);
    let (vectors, dropped) =
        embed_with(engine, model, Arc::clone(&set), request.skip_bad, &cancel).await?;
    skipped.extend(dropped);
    let options = request.options;
    let report = tokio::task::spawn_blocking(move || stats::calibrate(&vectors, &options))
        .await
        .map_err(ApiError::internal)??;
    if request.format == ReportFormat::Html {
        let provenance = Provenance::now(vec![map_bundle(model)], probe_sha256, probe_rows);
        let lines = stats::calibration_example_lines(&report);
        let thumbnails = thumbnails(engine, set, lines).await?;
        return Ok(html_page(stats::calibration_html(
            &report,
            &provenance,
            &thumbnails,
        )));
    }
    Ok(Json(CalibrationResponse {
        model: ModelRef::of(model),
        skipped: skipped.iter().map(|s| s.to_string()).collect(),
        report,
    })
    .into_response())
}

#[utoipa::path(post, path = "/v1/drift", operation_id = "drift", tag = "statistics", request_body = DriftRequest,
    responses(
        (status = 200, content(
            (DriftResponse = "application/json"),
            (String = "text/html", example = "<!doctype html>..."),
        )),
        super::Failure,
    ))]
pub async fn drift(
    State(service): State<Service>,
    caller: Option<Extension<Caller>>,
    ApiJson(request): ApiJson<DriftRequest>,
) -> Result<Response, ApiError> {
    let engine = service.engine()?;
    // Dropped with this future (a timeout, a client gone): the embedding stops.
    let cancel = Cancel::default();
    let _stop_when_gone = cancel.on_drop();
    request.options.validate()?;
    let from = engine
        .model(Some(&request.from))
        .map_err(|e| ApiError::from(e).at("from"))?;
    let to = engine
        .model(Some(&request.to))
        .map_err(|e| ApiError::from(e).at("to"))?;
    if let Some(save) = &request.save_map {
        // Saving a map changes every later run's rewards: an administration write.
        access::require(caller.as_deref(), Scope::Admin)?;
        if !valid_map_name(&save.name) {
            let problem = Problem::MapName { max: MAX_MAP_NAME };
            return Err(Invalid::new("save_map.name", problem).into());
        }
        service
            .maps()
            .check_free(&save.name, save.replace)
            .map_err(|e| ApiError::from(e).at("save_map.name"))?;
    }
    let (probe_sha256, probe_rows) = (probe_sha256(&request.probe), request.probe.len());
    let (set, mut skipped) = parse_probe(&service, engine, request.probe, request.skip_bad)?;
    let set = Arc::new(set);
    let (a, dropped_a) =
        embed_with(engine, from, Arc::clone(&set), request.skip_bad, &cancel).await?;
    let (b, dropped_b) =
        embed_with(engine, to, Arc::clone(&set), request.skip_bad, &cancel).await?;
    skipped.extend(dropped_a);
    skipped.extend(dropped_b);
    let options = request.options;
    let report = tokio::task::spawn_blocking(move || stats::drift(&a, &b, &options))
        .await
        .map_err(ApiError::internal)??;
    let saved_map = match request.save_map {
        Some(save) => {
            let fit = match save.kind {
                MapKind::Monotone => &report.continuity.monotone,
                MapKind::Affine => &report.continuity.affine,
            };
            let map = RewardMap {
                applies_to: map_bundle(to),
                lands_on: map_bundle(from),
                map: fit.map.clone(),
            };
            service.maps().save(&save.name, map, save.replace)?;
            access::audit(caller.as_deref(), "maps.save", 1);
            Some(save.name)
        }
        None => None,
    };
    if request.format == ReportFormat::Html {
        let bundles = vec![map_bundle(from), map_bundle(to)];
        let provenance = Provenance::now(bundles, probe_sha256, probe_rows);
        let thumbnails = thumbnails(engine, set, stats::drift_example_lines(&report)).await?;
        return Ok(html_page(stats::drift_html(
            &report,
            &provenance,
            &thumbnails,
        )));
    }
    Ok(Json(DriftResponse {
        from: ModelRef::of(from),
        to: ModelRef::of(to),
        skipped: skipped.iter().map(|s| s.to_string()).collect(),
        saved_map,
        report,
    })
    .into_response())
}

fn map_bundle(model: &Model) -> MapBundle {
    MapBundle {
        id: model.id.clone(),
        digest: model.bundle.digest.clone(),
    }
}

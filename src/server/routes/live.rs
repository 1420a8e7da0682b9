//! `GET /`: the live page (HTML, script, style and icon compiled into the
//! binary, served under a Content-Security-Policy that allows befit's own
//! files only), and `GET /v1/pulse`, the numbers it polls: loaded models,
//! throughput, latency, encoder batches and queues, caches and the caption
//! bank, from the metrics history ([`crate::metrics::history`]), and the
//! recently updated runs of the run watch ([`crate::runs::RunWatch::recent`]).

use std::sync::LazyLock;

use axum::extract::rejection::QueryRejection;
use axum::extract::{Query, State};
use axum::http::header;
use axum::response::{IntoResponse, Response};
use axum::Json;
use serde::Deserialize;
use serde_json::{json, Value};

use super::ModelRef;
use crate::intake::validation::{Invalid, Problem};
use crate::metrics::history::HISTORY_SAMPLES;
use crate::runs::MAX_GAUGED_RUNS;
use crate::server::error::ApiError;
use crate::service::Service;
use crate::stats::svg::PALETTE;

const PAGE: &str = include_str!("../page/live.html");
const SCRIPT: &str = include_str!("../page/live.js");
const STYLE: &str = include_str!("../page/live.css");
const ICON: &str = include_str!("../page/icon.svg");

/// befit's own files only: no inline script or style, no other origin, no framing.
const CONTENT_SECURITY_POLICY: &str = "default-src 'none'; script-src 'self'; \
style-src 'self'; img-src 'self'; connect-src 'self'; base-uri 'none'; \
form-action 'none'; frame-ancestors 'none'";

/// History points `GET /v1/pulse` gives without `?seconds=`: two minutes.
pub const DEFAULT_PULSE_SECONDS: u64 = 120;

/// Last steps of each run `GET /v1/pulse` shows: enough to see a trend on
/// the page, small enough to poll every 2 s (`/v1/runs/NAME` has them all).
pub const PULSE_RUN_STEPS: u64 = 200;

/// The page's style, led by the reports' colour-blind-safe palette as
/// custom properties `--s0` ... so the colours are defined once.
static STYLE_WITH_PALETTE: LazyLock<String> = LazyLock::new(|| {
    let colours: String = PALETTE
        .iter()
        .enumerate()
        .map(|(i, c)| format!("--s{i}:{c};"))
        .collect();
    format!(":root{{{colours}}}\n{STYLE}")
});

fn asset(content_type: &'static str, body: impl Into<String>) -> Response {
    (
        [
            (header::CONTENT_TYPE, content_type),
            (header::CONTENT_SECURITY_POLICY, CONTENT_SECURITY_POLICY),
            (header::X_CONTENT_TYPE_OPTIONS, "nosniff"),
            (header::REFERRER_POLICY, "no-referrer"),
        ],
        body.into(),
    )
        .into_response()
}

pub async fn page() -> Response {
    asset("text/html; charset=utf-8", PAGE)
}

pub async fn script() -> Response {
    asset("text/javascript; charset=utf-8", SCRIPT)
}

pub async fn style() -> Response {
    asset("text/css; charset=utf-8", STYLE_WITH_PALETTE.as_str())
}

/// The icon, drawn in the palette's first three colours (`{s0}` ... in the file).
static ICON_WITH_PALETTE: LazyLock<String> = LazyLock::new(|| {
    PALETTE
        .iter()
        .enumerate()
        .fold(ICON.to_string(), |svg, (i, c)| {
            svg.replace(&format!("{{s{i}}}"), c)
        })
});

pub async fn icon() -> Response {
    asset("image/svg+xml", ICON_WITH_PALETTE.as_str())
}

/// Other query parameters are ignored, as GET routes commonly do.
#[derive(Debug, Deserialize, utoipa::IntoParams)]
#[into_params(parameter_in = Query)]
pub struct PulseQuery {
    /// Seconds of history, one point per second.
    seconds: Option<u64>,
}

/// The live page's feed. Its shape follows the page and may change between
/// versions: scripts should use `/metrics`, `/v1/runs` and `/v1/bank`.
#[utoipa::path(get, path = "/v1/pulse", operation_id = "pulse", tag = "watch", params(PulseQuery),
    responses((status = 200, body = Object), super::Failure))]
pub async fn pulse(
    State(service): State<Service>,
    query: Result<Query<PulseQuery>, QueryRejection>,
) -> Result<Response, ApiError> {
    let max = HISTORY_SAMPLES as u64 - 1;
    let seconds = match query {
        Ok(Query(q)) => q.seconds.unwrap_or(DEFAULT_PULSE_SECONDS),
        // Only `seconds` is read, so only it can fail to parse.
        Err(_) => 0,
    };
    if !(1..=max).contains(&seconds) {
        return Err(Invalid::new(
            "seconds",
            Problem::OutOfRange {
                what: "seconds of history",
                min: 1,
                max,
            },
        )
        .into());
    }
    let pulse = service.history().pulse(service.metrics(), seconds as usize);
    let (status, models) = match service.engine() {
        Ok(engine) => {
            let models: Vec<Value> = engine
                .models()
                .iter()
                .map(|m| {
                    let mut model = json!(ModelRef::of(m));
                    model["dimension"] = json!(m.dimension());
                    model["ready"] = json!(true);
                    model
                })
                .collect();
            ("ready", models)
        }
        Err(_) => ("loading", Vec::new()),
    };
    // The bank's indexes load after the engine: until then it has no numbers.
    let bank = if service.bank().is_ok() {
        json!(super::bank::summary(&service).await?)
    } else {
        Value::Null
    };
    // The runs the gauges show (the most recently updated), as the page plots them.
    let watch = service.runs().clone();
    let runs = tokio::task::spawn_blocking(move || watch.recent(MAX_GAUGED_RUNS, PULSE_RUN_STEPS))
        .await
        .map_err(ApiError::internal)??;
    let body = json!({
        "status": status,
        "models": models,
        "bank": bank,
        "runs": runs,
        "sample_every_ms": pulse.sample_every_ms,
        "current": pulse.current,
        "since_start": pulse.since_start,
        "history": pulse.history,
    });
    Ok(([(header::CACHE_CONTROL, "no-store")], Json(body)).into_response())
}

//! The HTTP service.
//!
//! [`app`] builds the router over a [`Service`] so tests can drive it with
//! `oneshot`. The routes that watch the service (the live page, `/v1/pulse`,
//! `/healthz`, `/readyz`, `/metrics`, `/openapi.json`) answer outside every limit, so it can be
//! watched while overloaded; the routes that do work are first admitted by
//! the encoder work already queued (before a byte of body is read), then have
//! their body read in full ([`body`]: size, deadline and rate, holding no slot), then
//! pass load shedding, the concurrency limit and the timeout. [`run`] serves
//! it on a bound listener ([`listen`]: header timeout, connection cap, drain)
//! until `shutdown` resolves. Handlers parse, check, call the domain and shape
//! the answer; [`error`] maps every domain error to the API's codes. The API is
//! documented in `proto-free-api.md`, and as OpenAPI 3.1 by [`openapi`]. Before any of that, [`access`] checks
//! `Host`, `Origin`, the API key and its scope, and the key's rate.

pub mod access;
pub mod body;
pub mod error;
pub mod json;
pub mod listen;
pub mod openapi;
pub mod routes;
mod shed_log;

use std::future::Future;
use std::sync::Arc;
use std::time::Instant;

use axum::error_handling::HandleErrorLayer;
use axum::extract::{DefaultBodyLimit, MatchedPath, Request, State};
use axum::middleware::{self, Next};
use axum::response::{IntoResponse, Response};
use axum::routing::{get, post};
use axum::{BoxError, Router};
use tower::limit::GlobalConcurrencyLimitLayer;
use tower::ServiceBuilder;
use tower_http::catch_panic::CatchPanicLayer;
use tower_http::trace::TraceLayer;

pub use crate::intake::limits::Limits;
use crate::service::Service;
use error::{ApiError, ErrorCode};

/// The router with every route and layer, open to every caller (for
/// in-process use and tests; `befit serve` uses [`app_with`]).
pub fn app(state: Service) -> Router {
    app_with(state, Arc::new(access::Access::default()))
}

/// The router with every route and layer, behind `access`'s checks.
pub fn app_with(state: Service, access: Arc<access::Access>) -> Router {
    let limits = state.limits().clone();
    // Watching the service must work while it is overloaded: these routes are
    // cheap, and skip the load shedding, concurrency limit and timeout.
    let watch = Router::new()
        .route("/", get(routes::live::page))
        .route("/page/live.js", get(routes::live::script))
        .route("/page/live.css", get(routes::live::style))
        .route("/page/icon.svg", get(routes::live::icon))
        .route("/v1/pulse", get(routes::live::pulse))
        .route("/openapi.json", get(openapi::serve))
        .route("/healthz", get(routes::health::healthz))
        .route("/readyz", get(routes::health::readyz))
        .route("/metrics", get(routes::health::metrics));
    let work = Router::new()
        .route("/v1/models", get(routes::models::list))
        .route("/v1/limits", get(routes::limits::list))
        .route("/v1/images", post(routes::images::register))
        .route("/v1/rewards", post(routes::rewards::score))
        .route("/v1/runs", get(routes::runs::list))
        .route("/v1/runs/{name}", get(routes::runs::series))
        .route("/v1/vectors", post(routes::vectors::embed))
        .route(
            "/v1/bank",
            post(routes::bank::append).get(routes::bank::stats),
        )
        .route("/v1/neighbors", post(routes::bank::neighbors))
        .route("/v1/calibration", post(routes::statistics::calibration))
        .route("/v1/drift", post(routes::statistics::drift))
        .layer(
            ServiceBuilder::new()
                .layer(HandleErrorLayer::new(shed_or_timeout))
                .load_shed()
                .layer(GlobalConcurrencyLimitLayer::new(limits.max_inflight))
                .timeout(limits.request_timeout),
        )
        // Outside the limit: a body still arriving holds no slot.
        .layer(middleware::from_fn_with_state(
            state.clone(),
            body::read_first,
        ));
    watch
        .merge(work)
        .fallback(not_found)
        .method_not_allowed_fallback(method_not_allowed)
        .layer(DefaultBodyLimit::max(limits.max_body_bytes))
        .with_state(state.clone())
        // After routing (it needs the matched route), before any body is read.
        .layer(middleware::from_fn_with_state(access, access::guard))
        .layer(middleware::from_fn_with_state(state, record))
        // Failures are counted and summarised by `record`; internal errors log themselves once.
        .layer(TraceLayer::new_for_http().on_failure(()))
        .layer(CatchPanicLayer::custom(|_| {
            ApiError::internal("a request handler panicked").into_response()
        }))
}

/// Serves `app(state)` on `listener` until `shutdown` resolves, then drains
/// for at most `settings.drain`.
pub async fn run(
    listener: tokio::net::TcpListener,
    state: Service,
    settings: listen::ConnectionSettings,
    shutdown: impl Future<Output = ()> + Send + 'static,
) -> std::io::Result<()> {
    listen::serve(listener, app(state), settings, None, shutdown).await
}

async fn not_found() -> ApiError {
    ApiError::new(
        ErrorCode::NotFound,
        "no such route; see proto-free-api.md for the routes",
    )
}

async fn method_not_allowed() -> ApiError {
    ApiError::new(
        ErrorCode::MethodNotAllowed,
        "this route does not take that method",
    )
}

async fn shed_or_timeout(error: BoxError) -> ApiError {
    if error.is::<tower::timeout::error::Elapsed>() {
        ApiError::overloaded("the request took longer than --request-timeout-secs")
    } else if error.is::<tower::load_shed::error::Overloaded>() {
        ApiError::overloaded(
            "too many requests in flight (--max-inflight); retry after the delay given",
        )
    } else {
        ApiError::internal(error)
    }
}

/// Counts and times requests by matched route, never by raw path.
async fn record(State(state): State<Service>, request: Request, next: Next) -> Response {
    let route = request
        .extensions()
        .get::<MatchedPath>()
        .map_or_else(|| "unmatched".to_string(), |p| p.as_str().to_string());
    let method = method_label(request.method());
    let started = Instant::now();
    let response = next.run(request).await;
    let status = response.status().as_u16().to_string();
    let metrics = state.metrics();
    if response.status() == axum::http::StatusCode::SERVICE_UNAVAILABLE {
        shed_log::count_refusal(&route);
    }
    metrics.add(
        "befit_http_requests_total",
        &[("route", &route), ("method", method), ("status", &status)],
        1,
    );
    metrics.observe(
        "befit_http_request_seconds",
        &[("route", &route), ("method", method)],
        started.elapsed().as_secs_f64(),
    );
    response
}

/// A method as a metric label: the standard ones by name, anything else as
/// `other`, so random methods cannot grow `/metrics` without bound.
fn method_label(method: &axum::http::Method) -> &'static str {
    use axum::http::Method;
    match *method {
        Method::GET => "GET",
        Method::POST => "POST",
        Method::PUT => "PUT",
        Method::DELETE => "DELETE",
        Method::HEAD => "HEAD",
        Method::OPTIONS => "OPTIONS",
        Method::PATCH => "PATCH",
        Method::TRACE => "TRACE",
        Method::CONNECT => "CONNECT",
        _ => "other",
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn unknown_methods_share_one_label() {
        let odd = axum::http::Method::from_bytes(b"XYZZY").unwrap();
        assert_eq!(method_label(&odd), "other");
        assert_eq!(method_label(&axum::http::Method::POST), "POST");
    }
}

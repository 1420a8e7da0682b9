//! `GET /v1/limits`: the limits in force, so clients split requests by the
//! server's real flags instead of copies of their defaults.

use axum::extract::State;
use axum::Json;
use serde::Serialize;
use utoipa::ToSchema;

use crate::bank::index::{MAX_EF_SEARCH, MAX_K};
use crate::intake::limits::Limits;
use crate::service::Service;

/// The limits in force, and the caption bank's bounds on `k` and `ef_search`.
#[derive(Serialize, ToSchema)]
pub struct LimitsAnswer {
    #[serde(flatten)]
    pub limits: Limits,
    pub max_k: usize,
    pub max_ef_search: usize,
}

#[utoipa::path(get, path = "/v1/limits", operation_id = "limits", tag = "models",
    responses((status = 200, body = LimitsAnswer), super::Failure))]
pub async fn list(State(state): State<Service>) -> Json<LimitsAnswer> {
    Json(LimitsAnswer {
        limits: state.limits().clone(),
        max_k: MAX_K,
        max_ef_search: MAX_EF_SEARCH,
    })
}

//! `GET /v1/limits`: the limits in force, so clients split requests by the
//! server's real flags instead of copies of their defaults.

use axum::extract::State;
use axum::Json;
use serde_json::{json, Value};

use crate::bank::index::{MAX_EF_SEARCH, MAX_K};
use crate::service::Service;

pub async fn list(State(state): State<Service>) -> Json<Value> {
    let l = state.limits();
    Json(json!({
        "max_body_bytes": l.max_body_bytes,
        "max_groups": l.max_groups,
        "max_captions": l.max_captions,
        "max_caption_bytes": l.max_caption_bytes,
        "max_images": l.max_images,
        "max_pixels": l.max_pixels,
        "max_decoded_bytes": l.max_decoded_bytes,
        "decode_budget_bytes": l.decode_budget_bytes,
        "max_probe_rows": l.max_probe_rows,
        "max_inflight": l.max_inflight,
        "request_timeout_secs": l.request_timeout.as_secs_f64(),
        "body_timeout_secs": l.body_timeout.as_secs_f64(),
        "min_body_rate": l.min_body_rate,
        "max_queue_wait_ms": l.max_queue_wait.as_millis() as u64,
        "max_k": MAX_K,
        "max_ef_search": MAX_EF_SEARCH,
    }))
}

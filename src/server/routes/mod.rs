//! One file per route family; each handler validates, calls the engine, and
//! shapes the answer documented in `proto-free-api.md`.

pub mod bank;
pub mod health;
pub mod images;
pub mod limits;
pub mod live;
pub mod models;
pub mod rewards;
pub mod runs;
pub mod statistics;
pub mod vectors;

use serde::Serialize;
use utoipa::{IntoResponses, ToSchema};

use crate::encoders::Model;
use crate::server::error::ErrorBody;

/// How answers name the model they used, so a run can log its reward model.
#[derive(Debug, Clone, Serialize, ToSchema)]
pub struct ModelRef {
    pub id: String,
    pub name: String,
    pub version: String,
    pub digest: String,
}

impl ModelRef {
    pub fn of(model: &Model) -> ModelRef {
        let spec = &model.bundle.manifest.model;
        ModelRef {
            id: model.id.clone(),
            name: spec.name.clone(),
            version: spec.version.clone(),
            digest: model.bundle.digest.clone(),
        }
    }
}

/// The answers that are not a success, as the API document lists them: the
/// status comes from `error.code` (the table of `proto-free-api.md`).
#[derive(IntoResponses)]
pub enum Failure {
    /// The request was refused; `error.code` says why and `error.field` where.
    #[response(status = "4XX")]
    Refused(#[to_schema] ErrorBody),
    /// The server could not answer now (overloaded, not ready, storage full) or failed.
    #[response(status = "5XX")]
    Failed(#[to_schema] ErrorBody),
}

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

use crate::encoders::Model;

/// How answers name the model they used, so a run can log its reward model.
#[derive(Debug, Clone, Serialize)]
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

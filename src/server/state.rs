//! The state every handler shares: a cheap-to-clone handle around `Arc<Shared>`.

use std::sync::{Arc, OnceLock};

use super::error::ApiError;
use super::limits::Limits;
use crate::encoders::Engine;
use crate::metrics::Registry;

/// Shared by all handlers; clone freely.
#[derive(Clone)]
pub struct AppState {
    shared: Arc<Shared>,
}

struct Shared {
    engine: OnceLock<Arc<Engine>>,
    limits: Limits,
    metrics: Arc<Registry>,
}

impl AppState {
    /// State whose engine is set later, once bundles are loaded.
    pub fn new(limits: Limits, metrics: Arc<Registry>) -> AppState {
        AppState {
            shared: Arc::new(Shared {
                engine: OnceLock::new(),
                limits,
                metrics,
            }),
        }
    }

    /// Makes the service ready; later calls are ignored.
    pub fn set_engine(&self, engine: Arc<Engine>) {
        let _ = self.shared.engine.set(engine);
    }

    /// The engine, or 503 `not_ready` while bundles load.
    pub fn engine(&self) -> Result<&Arc<Engine>, ApiError> {
        self.shared.engine.get().ok_or_else(ApiError::not_ready)
    }

    pub fn limits(&self) -> &Limits {
        &self.shared.limits
    }

    pub fn metrics(&self) -> &Arc<Registry> {
        &self.shared.metrics
    }
}

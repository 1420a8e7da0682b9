//! The state every handler shares: a cheap-to-clone handle around `Arc<Shared>`.

use std::collections::BTreeMap;
use std::path::PathBuf;
use std::sync::{Arc, OnceLock, RwLock};

use super::error::ApiError;
use super::limits::Limits;
use crate::bank::CaptionBank;
use crate::encoders::Engine;
use crate::metrics::Registry;
use crate::stats::ContinuityMap;

/// Shared by all handlers; clone freely.
#[derive(Clone)]
pub struct AppState {
    shared: Arc<Shared>,
}

struct Shared {
    engine: OnceLock<Arc<Engine>>,
    bank: OnceLock<CaptionBank>,
    limits: Limits,
    metrics: Arc<Registry>,
    maps: RwLock<BTreeMap<String, ContinuityMap>>,
    maps_dir: Option<PathBuf>,
}

/// Why a reward map could not be kept.
#[derive(Debug, thiserror::Error)]
pub enum MapError {
    #[error("map name {0:?} must match [A-Za-z0-9._-]+ (at most 64 characters)")]
    BadName(String),
    #[error("cannot write map file {path}: {cause}")]
    Write { path: String, cause: std::io::Error },
    #[error("map file {path}: {message}")]
    Read { path: String, message: String },
}

/// Whether `name` may name a map (it becomes a file name).
pub fn valid_map_name(name: &str) -> bool {
    !name.is_empty()
        && name.len() <= 64
        && !name.starts_with('.')
        && name
            .bytes()
            .all(|b| b.is_ascii_alphanumeric() || b == b'.' || b == b'_' || b == b'-')
}

/// Reads one map file (JSON of a [`ContinuityMap`]), checked.
pub fn read_map(path: &std::path::Path) -> Result<ContinuityMap, MapError> {
    let fail = |message: String| MapError::Read {
        path: path.display().to_string(),
        message,
    };
    let text = std::fs::read_to_string(path).map_err(|e| fail(e.to_string()))?;
    let map: ContinuityMap =
        serde_json::from_str(&text).map_err(|e| fail(format!("not a reward map: {e}")))?;
    map.validate().map_err(|e| fail(e.to_string()))?;
    Ok(map)
}

impl AppState {
    /// State whose engine is set later, once bundles are loaded.
    pub fn new(limits: Limits, metrics: Arc<Registry>) -> AppState {
        AppState::with_maps(limits, metrics, BTreeMap::new(), None)
    }

    /// State with reward maps loaded at start; maps saved later go to `maps_dir`.
    pub fn with_maps(
        limits: Limits,
        metrics: Arc<Registry>,
        maps: BTreeMap<String, ContinuityMap>,
        maps_dir: Option<PathBuf>,
    ) -> AppState {
        let shared = Shared {
            engine: OnceLock::new(),
            bank: OnceLock::new(),
            limits,
            metrics,
            maps: RwLock::new(maps),
            maps_dir,
        };
        AppState {
            shared: Arc::new(shared),
        }
    }

    /// The reward map registered as `name`.
    pub fn map(&self, name: &str) -> Option<ContinuityMap> {
        self.shared
            .maps
            .read()
            .unwrap_or_else(|p| p.into_inner())
            .get(name)
            .cloned()
    }

    /// Names of the registered maps.
    pub fn map_names(&self) -> Vec<String> {
        self.shared
            .maps
            .read()
            .unwrap_or_else(|p| p.into_inner())
            .keys()
            .cloned()
            .collect()
    }

    /// Registers a map, writing it to the maps folder first (when there is one) so it survives restarts.
    pub fn save_map(&self, name: &str, map: ContinuityMap) -> Result<(), MapError> {
        if !valid_map_name(name) {
            return Err(MapError::BadName(name.to_string()));
        }
        if let Some(dir) = &self.shared.maps_dir {
            let path = dir.join(format!("{name}.json"));
            let write = |cause| MapError::Write {
                path: path.display().to_string(),
                cause,
            };
            std::fs::create_dir_all(dir).map_err(write)?;
            let text = serde_json::to_string_pretty(&map).unwrap_or_default();
            let tmp = dir.join(format!(".{name}.json.tmp"));
            std::fs::write(&tmp, text).map_err(write)?;
            std::fs::rename(&tmp, &path).map_err(write)?;
        }
        self.shared
            .maps
            .write()
            .unwrap_or_else(|p| p.into_inner())
            .insert(name.to_string(), map);
        Ok(())
    }

    /// Makes the service ready; later calls are ignored.
    pub fn set_engine(&self, engine: Arc<Engine>) {
        let _ = self.shared.engine.set(engine);
    }

    /// Makes the caption bank available (its indexes loaded); later calls are ignored.
    pub fn set_bank(&self, bank: CaptionBank) {
        let _ = self.shared.bank.set(bank);
    }

    /// The caption bank, or 503 `not_ready` while its indexes load.
    pub fn bank(&self) -> Result<&CaptionBank, ApiError> {
        self.shared.bank.get().ok_or_else(ApiError::not_ready)
    }

    /// The caption bank if it is loaded, for shutdown.
    pub fn loaded_bank(&self) -> Option<&CaptionBank> {
        self.shared.bank.get()
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

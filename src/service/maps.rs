//! The reward maps a server knows: saved ones under the data folder, those
//! given with `--map NAME=FILE`, and those saved by `POST /v1/drift`. A map is
//! handed out only for the bundle it was fitted for.

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};
use std::sync::{Arc, RwLock};

use crate::stats::{RewardMap, RewardMapError};

/// Longest map name (it becomes a file name).
pub const MAX_MAP_NAME: usize = 64;

/// Why a map could not be found, used, read or kept.
#[derive(Debug, thiserror::Error)]
pub enum MapError {
    #[error("no reward map named {name:?}; {}", known_list(known))]
    Unknown { name: String, known: Vec<String> },
    #[error("reward map {name:?} was fitted for {fitted} (digest {fitted_digest:.12}), not for {asked} (digest {asked_digest:.12}); fit one for this model with POST /v1/drift")]
    WrongModel {
        name: String,
        fitted: String,
        fitted_digest: String,
        asked: String,
        asked_digest: String,
    },
    #[error("map name {name:?} must match [A-Za-z0-9._-]+ (at most {MAX_MAP_NAME} characters)")]
    BadName { name: String },
    #[error("cannot write map file {path}: {source}")]
    Write {
        path: PathBuf,
        #[source]
        source: std::io::Error,
    },
    #[error("map file {path}: {message}")]
    Read { path: PathBuf, message: String },
    #[error("map file {path}: {source}")]
    NoDigests {
        path: PathBuf,
        #[source]
        source: RewardMapError,
    },
}

fn known_list(known: &[String]) -> String {
    if known.is_empty() {
        "none is registered".to_string()
    } else {
        format!("known: {}", known.join(", "))
    }
}

/// Whether `name` may name a map.
pub fn valid_map_name(name: &str) -> bool {
    !name.is_empty()
        && name.len() <= MAX_MAP_NAME
        && !name.starts_with('.')
        && name
            .bytes()
            .all(|b| b.is_ascii_alphanumeric() || b == b'.' || b == b'_' || b == b'-')
}

/// Reads one map file, checked.
pub fn read_map(path: &Path) -> Result<RewardMap, MapError> {
    let text = std::fs::read_to_string(path).map_err(|e| MapError::Read {
        path: path.to_path_buf(),
        message: e.to_string(),
    })?;
    RewardMap::from_json(&text).map_err(|source| match source {
        RewardMapError::NoDigests => MapError::NoDigests {
            path: path.to_path_buf(),
            source,
        },
        other => MapError::Read {
            path: path.to_path_buf(),
            message: other.to_string(),
        },
    })
}

/// The maps in force; clone the `Arc` a lookup gives, never the registry.
#[derive(Debug, Default)]
pub struct MapRegistry {
    maps: RwLock<BTreeMap<String, Arc<RewardMap>>>,
    dir: Option<PathBuf>,
}

impl MapRegistry {
    /// Maps saved in `dir`, then those of `flags` (`NAME`, `FILE`), which win.
    /// Maps saved later are written to `dir`.
    pub fn load(
        dir: Option<PathBuf>,
        flags: &[(String, PathBuf)],
    ) -> Result<MapRegistry, MapError> {
        let mut maps = BTreeMap::new();
        if let Some(dir) = dir.as_ref().filter(|d| d.is_dir()) {
            let entries = std::fs::read_dir(dir).map_err(|e| MapError::Read {
                path: dir.clone(),
                message: e.to_string(),
            })?;
            for entry in entries.flatten() {
                let path = entry.path();
                let name = path
                    .file_name()
                    .and_then(|n| n.to_str())
                    .and_then(|n| n.strip_suffix(".json"));
                if let Some(name) = name.filter(|n| valid_map_name(n)) {
                    maps.insert(name.to_string(), Arc::new(read_map(&path)?));
                }
            }
        }
        for (name, file) in flags {
            if !valid_map_name(name) {
                return Err(MapError::BadName { name: name.clone() });
            }
            maps.insert(name.clone(), Arc::new(read_map(file)?));
        }
        Ok(MapRegistry {
            maps: RwLock::new(maps),
            dir,
        })
    }

    /// Names of the registered maps.
    pub fn names(&self) -> Vec<String> {
        self.maps
            .read()
            .unwrap_or_else(|p| p.into_inner())
            .keys()
            .cloned()
            .collect()
    }

    /// The map `name`, for scoring the bundle `(id, digest)`: refused when it
    /// was fitted for another bundle.
    pub fn for_model(
        &self,
        name: &str,
        id: &str,
        digest: &str,
    ) -> Result<Arc<RewardMap>, MapError> {
        let map = self
            .maps
            .read()
            .unwrap_or_else(|p| p.into_inner())
            .get(name)
            .cloned()
            .ok_or_else(|| MapError::Unknown {
                name: name.to_string(),
                known: self.names(),
            })?;
        if map.applies_to.digest != digest {
            return Err(MapError::WrongModel {
                name: name.to_string(),
                fitted: map.applies_to.id.clone(),
                fitted_digest: map.applies_to.digest.clone(),
                asked: id.to_string(),
                asked_digest: digest.to_string(),
            });
        }
        Ok(map)
    }

    /// Registers a map, writing it first (when there is a folder) so it survives restarts.
    pub fn save(&self, name: &str, map: RewardMap) -> Result<(), MapError> {
        if !valid_map_name(name) {
            return Err(MapError::BadName {
                name: name.to_string(),
            });
        }
        if let Some(dir) = &self.dir {
            let path = dir.join(format!("{name}.json"));
            let write = |source| MapError::Write {
                path: path.clone(),
                source,
            };
            std::fs::create_dir_all(dir).map_err(write)?;
            let text = serde_json::to_string_pretty(&map).map_err(|e| write(e.into()))?;
            let tmp = dir.join(format!(".{name}.json.tmp"));
            std::fs::write(&tmp, text).map_err(write)?;
            std::fs::rename(&tmp, &path).map_err(write)?;
        }
        self.maps
            .write()
            .unwrap_or_else(|p| p.into_inner())
            .insert(name.to_string(), Arc::new(map));
        Ok(())
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::stats::{ContinuityMap, MapBundle};

    fn map() -> RewardMap {
        RewardMap {
            applies_to: MapBundle {
                id: "blocks@v2".into(),
                digest: "2".repeat(64),
            },
            lands_on: MapBundle {
                id: "blocks@v1".into(),
                digest: "1".repeat(64),
            },
            map: ContinuityMap::Affine { a: 2.0, b: 0.0 },
        }
    }

    #[test]
    fn a_map_serves_only_the_bundle_it_was_fitted_for_and_survives_restarts() {
        let dir = tempfile::tempdir().unwrap();
        let maps = MapRegistry::load(Some(dir.path().to_path_buf()), &[]).unwrap();
        maps.save("v2-on-v1", map()).unwrap();
        assert!(maps
            .for_model("v2-on-v1", "blocks@v2", &"2".repeat(64))
            .is_ok());
        let e = maps
            .for_model("v2-on-v1", "blocks@v1", &"1".repeat(64))
            .unwrap_err();
        let message = e.to_string();
        assert!(matches!(e, MapError::WrongModel { .. }));
        assert!(
            message.contains("blocks@v2") && message.contains("blocks@v1"),
            "{message}"
        );
        assert!(matches!(
            maps.for_model("nope", "blocks@v2", "x").unwrap_err(),
            MapError::Unknown { .. }
        ));
        let again = MapRegistry::load(Some(dir.path().to_path_buf()), &[]).unwrap();
        assert_eq!(again.names(), ["v2-on-v1"]);
        // A map file of the old form (no bundles) stops the start with how to refit it.
        std::fs::write(
            dir.path().join("old.json"),
            r#"{"kind": "affine", "a": 1, "b": 0}"#,
        )
        .unwrap();
        let e = MapRegistry::load(Some(dir.path().to_path_buf()), &[]).unwrap_err();
        assert!(matches!(e, MapError::NoDigests { .. }), "{e}");
        assert!(
            e.to_string().contains("old.json") && e.to_string().contains("refit"),
            "{e}"
        );
    }
}

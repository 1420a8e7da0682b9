//! The reward maps a server knows: saved ones under the data folder, those
//! given with `--map NAME=FILE`, and those saved by `POST /v1/drift`. A map is
//! handed out only for the bundle it was fitted for. A file under the data
//! folder that cannot be read does not stop the server: that one map is
//! unusable (said in `/readyz` and the log); a `--map` file that cannot be
//! read does, since the operator asked for it by name.

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
    #[error("reward map {name:?} could not be loaded at start ({reason}); fix or remove its file, or save it again with \"replace\": true")]
    Unusable { name: String, reason: String },
    #[error("a reward map named {name:?} exists already; send \"replace\": true to overwrite it")]
    Exists { name: String },
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
    /// Files under the folder that could not be read, by map name: why.
    unusable: RwLock<BTreeMap<String, String>>,
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
        let mut unusable = BTreeMap::new();
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
                    match read_map(&path) {
                        Ok(map) => {
                            maps.insert(name.to_string(), Arc::new(map));
                        }
                        Err(e) => {
                            tracing::warn!(map = name, error = %e, "reward map unusable; the other maps are loaded");
                            unusable.insert(name.to_string(), e.to_string());
                        }
                    }
                }
            }
        }
        for (name, file) in flags {
            if !valid_map_name(name) {
                return Err(MapError::BadName { name: name.clone() });
            }
            maps.insert(name.clone(), Arc::new(read_map(file)?));
            unusable.remove(name);
        }
        Ok(MapRegistry {
            maps: RwLock::new(maps),
            unusable: RwLock::new(unusable),
            dir,
        })
    }

    /// Maps whose files could not be read at start, with why.
    pub fn unusable(&self) -> BTreeMap<String, String> {
        self.unusable
            .read()
            .unwrap_or_else(|p| p.into_inner())
            .clone()
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
            .ok_or_else(|| match self.unusable().remove(name) {
                Some(reason) => MapError::Unusable {
                    name: name.to_string(),
                    reason,
                },
                None => MapError::Unknown {
                    name: name.to_string(),
                    known: self.names(),
                },
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

    /// Refuses a bad name, or one taken when `replace` is not said; a caller
    /// asks before fitting a map, so a long drift is not run for nothing.
    pub fn check_free(&self, name: &str, replace: bool) -> Result<(), MapError> {
        if !valid_map_name(name) {
            return Err(MapError::BadName {
                name: name.to_string(),
            });
        }
        let taken = self
            .maps
            .read()
            .unwrap_or_else(|p| p.into_inner())
            .contains_key(name)
            || self.unusable().contains_key(name)
            || self
                .dir
                .as_ref()
                .is_some_and(|d| d.join(format!("{name}.json")).exists());
        if taken && !replace {
            return Err(MapError::Exists {
                name: name.to_string(),
            });
        }
        Ok(())
    }

    /// Registers a map, writing it first (when there is a folder) so it
    /// survives restarts. A map of that name, usable or not, is overwritten
    /// only when `replace` says so: a map changes every later run's rewards.
    pub fn save(&self, name: &str, map: RewardMap, replace: bool) -> Result<(), MapError> {
        self.check_free(name, replace)?;
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
        self.unusable
            .write()
            .unwrap_or_else(|p| p.into_inner())
            .remove(name);
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
        maps.save("v2-on-v1", map(), false).unwrap();
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
        // A map file of the old form (no bundles) and a damaged one are unusable,
        // with how to refit them; the others load.
        std::fs::write(
            dir.path().join("old.json"),
            r#"{"kind": "affine", "a": 1, "b": 0}"#,
        )
        .unwrap();
        std::fs::write(dir.path().join("torn.json"), r#"{"applies_to": {"#).unwrap();
        let loaded = MapRegistry::load(Some(dir.path().to_path_buf()), &[]).unwrap();
        assert_eq!(loaded.names(), ["v2-on-v1"]);
        let unusable = loaded.unusable();
        assert_eq!(unusable.keys().collect::<Vec<_>>(), ["old", "torn"]);
        assert!(
            unusable["old"].contains("old.json") && unusable["old"].contains("refit"),
            "{unusable:?}"
        );
        let e = loaded
            .for_model("torn", "blocks@v2", &"2".repeat(64))
            .unwrap_err();
        assert!(matches!(e, MapError::Unusable { .. }), "{e}");
        // Given by flag, the same file stops the start: the operator asked for it.
        let e =
            MapRegistry::load(None, &[("old".into(), dir.path().join("old.json"))]).unwrap_err();
        assert!(matches!(e, MapError::NoDigests { .. }), "{e}");
        // Saving over an existing or unusable map needs `replace`.
        assert!(matches!(
            loaded.save("v2-on-v1", map(), false).unwrap_err(),
            MapError::Exists { .. }
        ));
        assert!(matches!(
            loaded.save("torn", map(), false).unwrap_err(),
            MapError::Exists { .. }
        ));
        loaded.save("torn", map(), true).unwrap();
        assert!(!loaded.unusable().contains_key("torn"));
        assert!(loaded
            .for_model("torn", "blocks@v2", &"2".repeat(64))
            .is_ok());
    }
}

//! Loading the bundles a process serves or works with: each opened, checked
//! and loaded, with two bundles of one id refused.

use std::path::{Path, PathBuf};
use std::sync::Arc;

use super::model::{LoadError, Model, ModelSettings};
use crate::bundle::{Bundle, BundleError};
use crate::metrics::Registry;

/// Why the bundles could not all be loaded.
#[derive(Debug, thiserror::Error)]
pub enum LoadBundlesError {
    #[error("opening bundle {}: {source}", dir.display())]
    Open {
        dir: PathBuf,
        #[source]
        source: BundleError,
    },
    #[error("loading bundle {}: {source}", dir.display())]
    Load {
        dir: PathBuf,
        #[source]
        source: LoadError,
    },
    #[error("bundles {} and {} are both {id}; give each a distinct name or version", first.display(), second.display())]
    SameId {
        first: PathBuf,
        second: PathBuf,
        id: String,
    },
    #[error("give at least one bundle")]
    None,
}

/// Opens, checks and loads `dirs` in order (the first is the default model).
pub fn load_bundles(
    dirs: &[impl AsRef<Path>],
    env: &ort::environment::Environment,
    settings: &ModelSettings,
    metrics: &Arc<Registry>,
) -> Result<Vec<Arc<Model>>, LoadBundlesError> {
    if dirs.is_empty() {
        return Err(LoadBundlesError::None);
    }
    let mut models: Vec<Arc<Model>> = Vec::new();
    for dir in dirs {
        let dir = dir.as_ref();
        let bundle = Bundle::open(dir).map_err(|source| LoadBundlesError::Open {
            dir: dir.to_path_buf(),
            source,
        })?;
        if let Some(other) = models.iter().find(|m| m.id == bundle.id()) {
            return Err(LoadBundlesError::SameId {
                first: other.bundle.dir.clone(),
                second: dir.to_path_buf(),
                id: bundle.id(),
            });
        }
        let model = Model::load(bundle, env, settings, Arc::clone(metrics)).map_err(|source| {
            LoadBundlesError::Load {
                dir: dir.to_path_buf(),
                source,
            }
        })?;
        tracing::info!(
            model = %model.id,
            dimension = model.dimension(),
            digest = %model.bundle.short_digest(),
            dir = %dir.display(),
            "bundle loaded"
        );
        models.push(Arc::new(model));
    }
    Ok(models)
}

//! Finds the ONNX Runtime shared library and loads it once per process.
//!
//! befit links ONNX Runtime dynamically: the library comes from the PyPI wheel
//! `onnxruntime==1.31.1` (the Makefile unpacks it into [`CACHE_DIR`]). The path
//! is taken from, in order: the `--ort-lib` flag, `ORT_DYLIB_PATH`, then the
//! cache folder under the working directory or any ancestor of the executable.
//! ONNX Runtime allows one environment per process, so [`environment`] keeps
//! the first one it builds and hands it out ever after.

use std::path::{Path, PathBuf};
use std::sync::OnceLock;

use ort::environment::Environment;

/// File name of the ONNX Runtime library befit is built against.
pub const LIBRARY_FILE: &str = "libonnxruntime.so.1.31.1";
/// Folder, relative to the project root, where `make ort` puts the library.
pub const CACHE_DIR: &str = ".cache/onnxruntime";

/// Why ONNX Runtime could not be made ready.
#[derive(Debug, thiserror::Error)]
pub enum RuntimeError {
    #[error(
        "ONNX Runtime library not found (looked at: {tried}). Run `make ort` to fetch {LIBRARY_FILE} \
         from the onnxruntime==1.31.1 wheel into {CACHE_DIR}, or pass --ort-lib PATH, or set ORT_DYLIB_PATH"
    )]
    NotFound { tried: String },
    #[error("ONNX Runtime library {path} could not be loaded: {message}")]
    Load { path: PathBuf, message: String },
    #[error("ONNX Runtime environment could not be created: {0}")]
    Environment(String),
}

/// Where to look for the library, in order of preference.
#[derive(Debug, Clone, Default)]
pub struct LibrarySearch {
    /// Given on the command line; used as is.
    pub flag: Option<PathBuf>,
    /// From `ORT_DYLIB_PATH`; used as is.
    pub env: Option<PathBuf>,
    /// Folders whose `.cache/onnxruntime/` may hold the library.
    pub roots: Vec<PathBuf>,
}

impl LibrarySearch {
    /// The usual roots: the working directory and every ancestor of the executable.
    pub fn with_default_roots(flag: Option<PathBuf>, env: Option<PathBuf>) -> Self {
        let mut roots = Vec::new();
        if let Ok(cwd) = std::env::current_dir() {
            roots.push(cwd);
        }
        if let Ok(exe) = std::env::current_exe() {
            roots.extend(exe.ancestors().skip(1).map(Path::to_path_buf));
        }
        LibrarySearch { flag, env, roots }
    }

    /// The first existing candidate; an explicit flag or variable that names a
    /// missing file is an error rather than a silent fall-back.
    pub fn locate(&self) -> Result<PathBuf, RuntimeError> {
        let explicit = self.flag.as_ref().or(self.env.as_ref());
        if let Some(path) = explicit {
            return if path.is_file() {
                Ok(path.clone())
            } else {
                Err(RuntimeError::NotFound {
                    tried: path.display().to_string(),
                })
            };
        }
        let candidates: Vec<PathBuf> = self
            .roots
            .iter()
            .map(|root| root.join(CACHE_DIR).join(LIBRARY_FILE))
            .collect();
        candidates
            .iter()
            .find(|path| path.is_file())
            .cloned()
            .ok_or_else(|| {
                let tried: Vec<String> =
                    candidates.iter().map(|p| p.display().to_string()).collect();
                RuntimeError::NotFound {
                    tried: tried.join(", "),
                }
            })
    }
}

static ENVIRONMENT: OnceLock<Environment> = OnceLock::new();

/// Loads the library at `path` (first call only) and returns the process's one environment.
pub fn environment(path: &Path) -> Result<&'static Environment, RuntimeError> {
    if let Some(env) = ENVIRONMENT.get() {
        return Ok(env);
    }
    let builder = ort::init_from(path).map_err(|e| RuntimeError::Load {
        path: path.to_path_buf(),
        message: format!("{e:?}"),
    })?;
    let env = builder
        .with_name("befit")
        .with_telemetry(false)
        .build()
        .map_err(|e| RuntimeError::Environment(format!("{e:?}")))?;
    Ok(ENVIRONMENT.get_or_init(|| env))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn explicit_missing_path_is_an_error_naming_it() {
        let search = LibrarySearch {
            flag: Some(PathBuf::from("/nowhere/libonnxruntime.so")),
            env: None,
            roots: vec![],
        };
        let err = search.locate().unwrap_err().to_string();
        assert!(err.contains("/nowhere/libonnxruntime.so"), "{err}");
        assert!(err.contains("make ort"), "{err}");
    }

    #[test]
    fn flag_wins_over_variable_and_cache() {
        let dir = tempfile::tempdir().unwrap();
        let flag = dir.path().join("flag.so");
        std::fs::write(&flag, b"x").unwrap();
        let cached = dir.path().join(CACHE_DIR);
        std::fs::create_dir_all(&cached).unwrap();
        std::fs::write(cached.join(LIBRARY_FILE), b"x").unwrap();
        let search = LibrarySearch {
            flag: Some(flag.clone()),
            env: Some(dir.path().join("missing.so")),
            roots: vec![dir.path().to_path_buf()],
        };
        assert_eq!(search.locate().unwrap(), flag);
        let search = LibrarySearch {
            flag: None,
            env: None,
            roots: vec![dir.path().to_path_buf()],
        };
        assert_eq!(search.locate().unwrap(), cached.join(LIBRARY_FILE));
    }
}

//! Finds the ONNX Runtime shared library and loads it once per process.
//!
//! befit links ONNX Runtime dynamically: the library comes from the PyPI wheel
//! `onnxruntime==1.31.1` (the Makefile unpacks it into [`CACHE_DIR`]). The path
//! is taken from, in order: the `--ort-lib` flag, `ORT_DYLIB_PATH`, the cache
//! folder under the working directory or any ancestor of the executable, then
//! [`INSTALLED_DIR`] beside the executable's folder (where `make install` puts it).
//! ONNX Runtime allows one environment per process, so [`environment`] keeps
//! the first one it builds and hands it out ever after.

use std::path::{Path, PathBuf};
use std::sync::OnceLock;

use ort::environment::Environment;

/// File name of the ONNX Runtime library befit is built against.
pub const LIBRARY_FILE: &str = "libonnxruntime.so.1.31.1";
/// Folder, relative to the project root, where `make ort` puts the library.
pub const CACHE_DIR: &str = ".cache/onnxruntime";
/// Folder, relative to the executable's folder, where `make install` puts the library.
pub const INSTALLED_DIR: &str = "../lib/befit";

/// Why ONNX Runtime could not be made ready.
#[derive(Debug, thiserror::Error)]
pub enum RuntimeError {
    #[error(
        "ONNX Runtime library not found (looked at: {tried}). Run `make ort` to fetch {LIBRARY_FILE} \
         from the onnxruntime==1.31.1 wheel into {CACHE_DIR}, or pass --ort-lib PATH, or set ORT_DYLIB_PATH"
    )]
    NotFound { tried: String },
    #[error(
        "ONNX Runtime library {path} could not be loaded: {message}. befit needs {LIBRARY_FILE} \
         from the onnxruntime==1.31.1 wheel (`make ort`)"
    )]
    Load { path: PathBuf, message: String },
    #[error(
        "{path} is a shared library but not ONNX Runtime (it has no OrtGetApiBase). befit needs \
         {LIBRARY_FILE} from the onnxruntime==1.31.1 wheel (`make ort` puts it in {CACHE_DIR})"
    )]
    NotOnnxRuntime { path: PathBuf },
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
    /// The executable's folder, whose [`INSTALLED_DIR`] may hold the library.
    pub exe_dir: Option<PathBuf>,
}

impl LibrarySearch {
    /// The usual roots: the working directory and every ancestor of the executable.
    pub fn with_default_roots(flag: Option<PathBuf>, env: Option<PathBuf>) -> Self {
        let mut roots = Vec::new();
        if let Ok(cwd) = std::env::current_dir() {
            roots.push(cwd);
        }
        let exe = std::env::current_exe().ok();
        if let Some(exe) = &exe {
            roots.extend(exe.ancestors().skip(1).map(Path::to_path_buf));
        }
        let exe_dir = exe.and_then(|e| e.parent().map(Path::to_path_buf));
        LibrarySearch {
            flag,
            env,
            roots,
            exe_dir,
        }
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
            .chain(
                self.exe_dir
                    .iter()
                    .map(|dir| dir.join(INSTALLED_DIR).join(LIBRARY_FILE)),
            )
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
    // dlopen looks a name without a slash up in the system's library folders,
    // not in the working directory: give it the absolute path.
    let absolute = std::path::absolute(path).unwrap_or_else(|_| path.to_path_buf());
    let path = absolute.as_path();
    check_is_onnx_runtime(path)?;
    let builder = ort::init_from(path).map_err(|e| RuntimeError::Load {
        path: path.to_path_buf(),
        message: e.to_string(),
    })?;
    let env = builder
        .with_name("befit")
        .with_telemetry(false)
        .build()
        .map_err(|e| RuntimeError::Environment(e.to_string()))?;
    Ok(ENVIRONMENT.get_or_init(|| env))
}

/// Opens the library and looks for ONNX Runtime's entry point, so that a
/// wrong file gets a message saying so rather than the loader's internals.
fn check_is_onnx_runtime(path: &Path) -> Result<(), RuntimeError> {
    // SAFETY: loading a shared library runs its initialisers; the path is the
    // one the user named for ONNX Runtime, which ort would load the same way.
    let library = unsafe { libloading::Library::new(path) }.map_err(|e| RuntimeError::Load {
        path: path.to_path_buf(),
        // libloading's own text is "dlopen failed"; the loader's reason is its source.
        message: match std::error::Error::source(&e) {
            Some(reason) => reason.to_string(),
            None => e.to_string(),
        },
    })?;
    // SAFETY: the symbol is only looked up, never called.
    let entry = unsafe { library.get::<unsafe extern "C" fn()>(b"OrtGetApiBase\0") };
    match entry {
        Ok(_) => Ok(()),
        Err(_) => Err(RuntimeError::NotOnnxRuntime {
            path: path.to_path_buf(),
        }),
    }
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
            exe_dir: None,
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
            exe_dir: None,
        };
        assert_eq!(search.locate().unwrap(), flag);
        let search = LibrarySearch {
            flag: None,
            env: None,
            roots: vec![dir.path().to_path_buf()],
            exe_dir: None,
        };
        assert_eq!(search.locate().unwrap(), cached.join(LIBRARY_FILE));
    }

    #[test]
    fn an_installed_library_beside_the_executable_is_found_after_the_cache() {
        let dir = tempfile::tempdir().unwrap();
        let bin = dir.path().join("bin");
        let installed = dir.path().join("lib/befit");
        std::fs::create_dir_all(&bin).unwrap();
        std::fs::create_dir_all(&installed).unwrap();
        std::fs::write(installed.join(LIBRARY_FILE), b"x").unwrap();
        let search = LibrarySearch {
            flag: None,
            env: None,
            roots: vec![dir.path().join("elsewhere")],
            exe_dir: Some(bin.clone()),
        };
        let found = search.locate().unwrap();
        assert_eq!(
            found.canonicalize().unwrap(),
            installed.join(LIBRARY_FILE).canonicalize().unwrap()
        );
        // Nothing anywhere: the message lists the installed place among those tried.
        std::fs::remove_file(installed.join(LIBRARY_FILE)).unwrap();
        let err = search.locate().unwrap_err().to_string();
        assert!(err.contains("lib/befit"), "{err}");
    }

    #[test]
    fn a_file_that_is_not_a_library_or_not_onnx_runtime_is_named_as_such() {
        let dir = tempfile::tempdir().unwrap();
        let text = dir.path().join(LIBRARY_FILE);
        std::fs::write(&text, b"not a library").unwrap();
        let err = check_is_onnx_runtime(&text).unwrap_err();
        assert!(matches!(err, RuntimeError::Load { .. }), "{err}");
        assert!(err.to_string().contains("make ort"), "{err}");
        // The C library this test process runs with: a real shared library, not ONNX Runtime.
        let maps = std::fs::read_to_string("/proc/self/maps").unwrap();
        let libc = maps
            .lines()
            .filter_map(|line| line.split_whitespace().nth(5))
            .find(|path| path.contains("/libc.so"))
            .expect("the C library among this process's mappings");
        let err = check_is_onnx_runtime(Path::new(libc)).unwrap_err();
        assert!(matches!(err, RuntimeError::NotOnnxRuntime { .. }), "{err}");
        assert!(err.to_string().contains("not ONNX Runtime"), "{err}");
    }
}

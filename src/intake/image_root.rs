//! Image paths named by requests, resolved under the server's `--image-root`.
//!
//! Trainers keep data sets on a shared disk and name images by path instead
//! of sending their bytes. A path must stay inside the root: `..`, absolute
//! paths and symbolic links that lead out are refused.

use std::io::Read;
use std::path::{Component, Path, PathBuf};

use super::limits::DEFAULT_MAX_BODY_BYTES;

/// Why a requested path was not read.
#[derive(Debug, thiserror::Error)]
pub enum PathError {
    #[error("images by path are off: start the server with --image-root DIR to allow them")]
    NoRoot,
    #[error("path {0:?} leaves the image root; give a path relative to it, without `..`")]
    Escapes(String),
    #[error("no image file at {0:?} under the image root")]
    Missing(String),
    #[error("image {path:?} could not be read: {message}")]
    Read { path: String, message: String },
    #[error("image file {path:?} is {bytes} bytes, over the limit of {limit} (--max-body-bytes: a file may be as large as a request could carry)")]
    FileTooLarge {
        path: String,
        bytes: u64,
        limit: u64,
    },
}

/// The folder that path-named images must live in.
#[derive(Debug, Clone)]
pub struct ImageRoot {
    root: PathBuf,
    max_file_bytes: u64,
}

impl ImageRoot {
    /// Canonicalises `root` so later checks compare real paths. Files are
    /// limited to [`DEFAULT_MAX_BODY_BYTES`] until [`ImageRoot::max_file_bytes`] says otherwise.
    pub fn new(root: &Path) -> std::io::Result<ImageRoot> {
        Ok(ImageRoot {
            root: root.canonicalize()?,
            max_file_bytes: DEFAULT_MAX_BODY_BYTES as u64,
        })
    }

    /// Files larger than `bytes` are refused before they are read.
    pub fn max_file_bytes(mut self, bytes: u64) -> ImageRoot {
        self.max_file_bytes = bytes;
        self
    }

    /// The real file `relative` names, when it is inside the root.
    pub fn resolve(&self, path: &Path) -> Result<PathBuf, PathError> {
        let relative = path.display().to_string();
        let lexically_inside = !relative.is_empty()
            && path
                .components()
                .all(|c| matches!(c, Component::Normal(_) | Component::CurDir));
        if !lexically_inside {
            return Err(PathError::Escapes(relative));
        }
        let real = match self.root.join(path).canonicalize() {
            Ok(real) => real,
            Err(e) if e.kind() == std::io::ErrorKind::NotFound => {
                return Err(PathError::Missing(relative))
            }
            Err(e) => {
                return Err(PathError::Read {
                    path: relative,
                    message: e.to_string(),
                })
            }
        };
        // A symbolic link inside the root may point anywhere; the real path decides.
        if !real.starts_with(&self.root) {
            return Err(PathError::Escapes(relative));
        }
        if !real.is_file() {
            return Err(PathError::Missing(relative));
        }
        Ok(real)
    }

    /// Reads the file `relative` names, refusing one over the size limit
    /// from its metadata, and reading no more than the limit should it grow meanwhile.
    pub fn read(&self, relative: &Path) -> Result<Vec<u8>, PathError> {
        let real = self.resolve(relative)?;
        let path = relative.display().to_string();
        let read_error = |e: std::io::Error| PathError::Read {
            path: path.clone(),
            message: e.to_string(),
        };
        let too_large = |bytes| PathError::FileTooLarge {
            path: path.clone(),
            bytes,
            limit: self.max_file_bytes,
        };
        let file = std::fs::File::open(&real).map_err(read_error)?;
        let declared = file.metadata().map_err(read_error)?.len();
        if declared > self.max_file_bytes {
            return Err(too_large(declared));
        }
        let mut bytes = Vec::with_capacity(declared as usize);
        file.take(self.max_file_bytes + 1)
            .read_to_end(&mut bytes)
            .map_err(read_error)?;
        if bytes.len() as u64 > self.max_file_bytes {
            return Err(too_large(bytes.len() as u64));
        }
        Ok(bytes)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn refuses_every_way_out() {
        let outside = tempfile::tempdir().unwrap();
        std::fs::write(outside.path().join("secret.png"), b"x").unwrap();
        let dir = tempfile::tempdir().unwrap();
        std::fs::create_dir(dir.path().join("scenes")).unwrap();
        std::fs::write(dir.path().join("scenes/a.png"), b"png").unwrap();
        std::os::unix::fs::symlink(
            outside.path().join("secret.png"),
            dir.path().join("link.png"),
        )
        .unwrap();
        let root = ImageRoot::new(dir.path()).unwrap();
        let small = ImageRoot::new(dir.path()).unwrap().max_file_bytes(2);
        match small.read(Path::new("scenes/a.png")) {
            Err(PathError::FileTooLarge { bytes, limit, .. }) => assert_eq!((bytes, limit), (3, 2)),
            other => panic!("expected FileTooLarge, got {other:?}"),
        }
        let exact = ImageRoot::new(dir.path()).unwrap().max_file_bytes(3);
        assert_eq!(exact.read(Path::new("scenes/a.png")).unwrap(), b"png");

        assert_eq!(root.read(Path::new("scenes/a.png")).unwrap(), b"png");
        assert_eq!(root.read(Path::new("./scenes/a.png")).unwrap(), b"png");
        for bad in [
            "../x.png",
            "scenes/../../x.png",
            "/etc/passwd",
            "link.png",
            "",
        ] {
            assert!(
                matches!(root.resolve(Path::new(bad)), Err(PathError::Escapes(_))),
                "{bad}"
            );
        }
        assert!(matches!(
            root.resolve(Path::new("scenes/none.png")),
            Err(PathError::Missing(_))
        ));
        assert!(matches!(
            root.resolve(Path::new("scenes")),
            Err(PathError::Missing(_))
        ));
    }
}

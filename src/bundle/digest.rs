//! The bundle digest: one sha256 that changes when any file the server uses changes.

use std::io::Read;
use std::path::Path;

use sha2::{Digest, Sha256};

use super::{BundleError, Manifest};

/// sha256 of a file's bytes, streamed.
pub fn file_sha256(path: &Path) -> Result<[u8; 32], BundleError> {
    let read_err = |cause| BundleError::Read {
        path: path.to_path_buf(),
        cause,
    };
    let mut file = std::fs::File::open(path).map_err(read_err)?;
    let mut hasher = Sha256::new();
    let mut buffer = vec![0u8; 1 << 16];
    loop {
        let n = file.read(&mut buffer).map_err(read_err)?;
        if n == 0 {
            break;
        }
        hasher.update(&buffer[..n]);
    }
    Ok(hasher.finalize().into())
}

/// The digest defined in `docs/bundles.md`: over `bundle.toml`, then the files
/// the manifest names, each as its relative name, a NUL byte and its raw sha256.
pub fn bundle_digest(dir: &Path, manifest: &Manifest) -> Result<String, BundleError> {
    let mut hasher = Sha256::new();
    let names = std::iter::once("bundle.toml").chain(manifest.files().into_iter().map(|(_, f)| f));
    for name in names {
        hasher.update(name.as_bytes());
        hasher.update([0u8]);
        hasher.update(file_sha256(&dir.join(name))?);
    }
    Ok(hex::encode(hasher.finalize()))
}

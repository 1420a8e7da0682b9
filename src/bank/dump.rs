//! The on-disk form of an index: a dump folder per generation, a manifest
//! with checksums, and a `CURRENT` pointer switched atomically.
//!
//! ```text
//! <root>/<digest>/CURRENT              "dump-000007": the generation to load
//! <root>/<digest>/dump-000007/
//!     index.hnsw.graph, index.hnsw.data   the backend's own files (these: hnsw_rs)
//!     manifest.json                        backend, what it covers, sha256 of each file
//! <root>/<digest>/tmp-<pid>-<nanos>/    a dump being written (removed at open)
//! ```
//!
//! A new generation is written into a temporary folder, every file is
//! fsynced, the folder is renamed to its final name, then `CURRENT` is
//! replaced by rename (atomic on POSIX file systems) and the folder fsynced.
//! A crash at any point leaves `CURRENT` naming a complete older dump, or no
//! `CURRENT` at all; either way the index is loaded or rebuilt, never read
//! half-written.
//!
//! The graph libraries trust their input (hnsw_rs's loader: a truncated file
//! hits `unwrap`s, a garbled length allocates whatever it says, an unknown
//! format version calls `process::exit`). So nothing reaches one unless the
//! manifest parses, names this backend and library version, digest,
//! dimension and build settings, lists every file the backend reads, and
//! every file's size and sha256 match what was written.

use std::fs::{self, File, OpenOptions};
use std::io::{self, Read, Write};
use std::path::{Path, PathBuf};

use serde::{Deserialize, Serialize};
use sha2::{Digest, Sha256};

use super::RowId;

/// Version of the manifest and folder layout; a dump of another version is
/// rebuilt rather than read. 2: the backend is recorded, its files listed.
pub const MANIFEST_FORMAT: u32 = 2;

/// Name of the pointer file.
pub const CURRENT_FILE: &str = "CURRENT";

/// Name of the manifest inside a dump folder.
pub const MANIFEST_FILE: &str = "manifest.json";

/// A manifest is a few hundred bytes; anything larger is not one of ours.
const MAX_MANIFEST_BYTES: u64 = 64 * 1024;

/// One file of a dump, as written.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct DumpedFile {
    /// File name inside the dump folder.
    pub name: String,
    /// Size in bytes.
    pub bytes: u64,
    /// sha256 of the content, lowercase hex.
    pub sha256: String,
}

/// What a dump holds and how it was built.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Manifest {
    /// [`MANIFEST_FORMAT`] when written.
    pub format: u32,
    /// The graph backend that wrote it (`hnsw-rs`, `usearch`).
    pub backend: String,
    /// Library and version whose file format the graph files are in.
    pub library: String,
    /// Type name of the distance the graph was built with.
    pub distance: String,
    /// Bundle digest the vectors come from.
    pub digest: String,
    /// Vector length.
    pub dimension: usize,
    /// HNSW `M` (links per node above layer 0).
    pub max_connections: usize,
    /// HNSW `ef_construction`.
    pub ef_construction: usize,
    /// Number of rows in the dump.
    pub rows: usize,
    /// Highest row id in the dump: rows of the store above it (and any others
    /// the dump lacks) are replayed after loading.
    pub max_row_id: Option<RowId>,
    /// Every file of the dump but the manifest.
    pub files: Vec<DumpedFile>,
    /// When the dump was written, milliseconds since the Unix epoch.
    pub written_at_unix_ms: u64,
}

/// What a manifest must say for its dump to be loaded.
#[derive(Debug, Clone)]
pub struct Expected<'a> {
    /// Graph backend.
    pub backend: &'a str,
    /// Library and version of the backend.
    pub library: &'a str,
    /// Files the backend reads, each of which the manifest must list.
    pub files: &'a [String],
    /// Bundle digest.
    pub digest: &'a str,
    /// Vector length.
    pub dimension: usize,
    /// HNSW `M`.
    pub max_connections: usize,
    /// HNSW `ef_construction`.
    pub ef_construction: usize,
    /// Type name of the distance.
    pub distance: &'a str,
}

/// A dump that checked out: its folder and manifest.
#[derive(Debug, Clone)]
pub struct CheckedDump {
    /// The generation's folder.
    pub folder: PathBuf,
    /// Its manifest.
    pub manifest: Manifest,
}

/// Milliseconds since the Unix epoch (0 if the clock is before it).
pub fn unix_ms() -> u64 {
    std::time::SystemTime::now()
        .duration_since(std::time::UNIX_EPOCH)
        .map(|d| d.as_millis() as u64)
        .unwrap_or(0)
}

/// sha256 and length of a file.
pub fn file_sha256(path: &Path) -> io::Result<(String, u64)> {
    let mut f = File::open(path)?;
    let mut hasher = Sha256::new();
    let mut buf = vec![0u8; 1 << 20];
    let mut total = 0u64;
    loop {
        let n = f.read(&mut buf)?;
        if n == 0 {
            break;
        }
        hasher.update(&buf[..n]);
        total += n as u64;
    }
    Ok((hex::encode(hasher.finalize()), total))
}

/// Flushes a file's content and metadata to disk.
pub fn fsync_file(path: &Path) -> io::Result<()> {
    OpenOptions::new().read(true).open(path)?.sync_all()
}

/// Flushes a folder's entries (new names, renames) to disk.
pub fn fsync_dir(path: &Path) -> io::Result<()> {
    File::open(path)?.sync_all()
}

/// True for names this module may have created inside a digest folder:
/// plain names, no separators, no `..`.
fn is_plain_name(name: &str) -> bool {
    !name.is_empty()
        && name.len() <= 64
        && name
            .chars()
            .all(|c| c.is_ascii_alphanumeric() || c == '-' || c == '_' || c == '.')
        && !name.starts_with('.')
}

/// Why a dump on disk was not used; the index is rebuilt from the store.
pub fn check(digest_dir: &Path, expected: &Expected<'_>) -> Result<CheckedDump, String> {
    let current_path = digest_dir.join(CURRENT_FILE);
    let current = match fs::read_to_string(&current_path) {
        Ok(s) => s,
        Err(e) if e.kind() == io::ErrorKind::NotFound => return Err("no dump yet".into()),
        Err(e) => return Err(format!("cannot read {}: {e}", current_path.display())),
    };
    let name = current.trim();
    if !is_plain_name(name) || !name.starts_with("dump-") {
        return Err(format!(
            "{} does not name a dump folder",
            current_path.display()
        ));
    }
    let folder = digest_dir.join(name);
    let manifest_path = folder.join(MANIFEST_FILE);
    let meta = fs::metadata(&manifest_path)
        .map_err(|e| format!("cannot read {}: {e}", manifest_path.display()))?;
    if meta.len() > MAX_MANIFEST_BYTES {
        return Err(format!(
            "{} is too large to be a manifest",
            manifest_path.display()
        ));
    }
    let text = fs::read_to_string(&manifest_path)
        .map_err(|e| format!("cannot read {}: {e}", manifest_path.display()))?;
    let manifest: Manifest = serde_json::from_str(&text)
        .map_err(|e| format!("{} is not a valid manifest: {e}", manifest_path.display()))?;
    check_manifest(&manifest, expected)?;
    for file in &manifest.files {
        if !is_plain_name(&file.name) {
            return Err(format!(
                "manifest names a file outside its folder: {:?}",
                file.name
            ));
        }
        let path = folder.join(&file.name);
        let actual_len = fs::metadata(&path)
            .map_err(|e| format!("cannot read {}: {e}", path.display()))?
            .len();
        if actual_len != file.bytes {
            return Err(format!(
                "{} is {actual_len} bytes, the manifest says {} (truncated or replaced)",
                path.display(),
                file.bytes
            ));
        }
        let (sha, _) =
            file_sha256(&path).map_err(|e| format!("cannot read {}: {e}", path.display()))?;
        if sha != file.sha256 {
            return Err(format!(
                "{} does not match its checksum (corrupt)",
                path.display()
            ));
        }
    }
    for needed in expected.files {
        if !manifest.files.iter().any(|f| &f.name == needed) {
            return Err(format!("manifest does not list {needed}"));
        }
    }
    Ok(CheckedDump { folder, manifest })
}

fn check_manifest(m: &Manifest, e: &Expected<'_>) -> Result<(), String> {
    if m.format != MANIFEST_FORMAT {
        return Err(format!(
            "dump format {} (this befit reads {MANIFEST_FORMAT})",
            m.format
        ));
    }
    if m.backend != e.backend {
        return Err(format!(
            "dump written by the {} backend, this index uses {}",
            m.backend, e.backend
        ));
    }
    if m.library != e.library {
        return Err(format!(
            "dump written by {} (this befit uses {})",
            m.library, e.library
        ));
    }
    if m.digest != e.digest {
        return Err(format!(
            "dump is for bundle digest {}, not {}",
            m.digest, e.digest
        ));
    }
    if m.dimension != e.dimension {
        return Err(format!(
            "dump holds {}-long vectors, the bundle makes {}",
            m.dimension, e.dimension
        ));
    }
    if m.max_connections != e.max_connections || m.ef_construction != e.ef_construction {
        return Err(format!(
            "dump built with M={} ef_construction={}, configured M={} ef_construction={}",
            m.max_connections, m.ef_construction, e.max_connections, e.ef_construction
        ));
    }
    if m.distance != e.distance {
        return Err(format!(
            "dump built with distance {}, expected {}",
            m.distance, e.distance
        ));
    }
    Ok(())
}

/// A fresh temporary folder for writing a dump into.
pub fn temp_folder(digest_dir: &Path) -> io::Result<PathBuf> {
    fs::create_dir_all(digest_dir)?;
    let nanos = std::time::SystemTime::now()
        .duration_since(std::time::UNIX_EPOCH)
        .map(|d| d.as_nanos())
        .unwrap_or(0);
    let path = digest_dir.join(format!("tmp-{}-{nanos}", std::process::id()));
    fs::create_dir(&path)?;
    Ok(path)
}

/// Fsyncs the files a backend wrote into `tmp` (`written`, their names),
/// writes the manifest (with the files' checksums) and makes the folder the
/// current generation.
///
/// `manifest.files` is filled in here.
pub fn publish(
    digest_dir: &Path,
    tmp: &Path,
    written: &[String],
    mut manifest: Manifest,
) -> io::Result<PathBuf> {
    let mut files = Vec::new();
    for name in written {
        if !is_plain_name(name) || name == MANIFEST_FILE {
            return Err(io::Error::other(format!(
                "the graph wrote a file named {name:?}, which a dump cannot hold"
            )));
        }
        let name = name.clone();
        let path = tmp.join(&name);
        fsync_file(&path)?;
        let (sha256, bytes) = file_sha256(&path)?;
        files.push(DumpedFile {
            name,
            bytes,
            sha256,
        });
    }
    manifest.files = files;
    let text = serde_json::to_string_pretty(&manifest).map_err(io::Error::other)?;
    write_synced(&tmp.join(MANIFEST_FILE), text.as_bytes())?;
    fsync_dir(tmp)?;

    let generation = next_generation(digest_dir)?;
    let name = format!("dump-{generation:06}");
    let folder = digest_dir.join(&name);
    fs::rename(tmp, &folder)?;
    fsync_dir(digest_dir)?;

    let pointer_tmp = digest_dir.join(format!("{CURRENT_FILE}.tmp"));
    write_synced(&pointer_tmp, name.as_bytes())?;
    fs::rename(&pointer_tmp, digest_dir.join(CURRENT_FILE))?;
    fsync_dir(digest_dir)?;
    remove_stale(digest_dir, Some(&name));
    Ok(folder)
}

fn write_synced(path: &Path, bytes: &[u8]) -> io::Result<()> {
    let mut f = OpenOptions::new()
        .create(true)
        .truncate(true)
        .write(true)
        .open(path)?;
    f.write_all(bytes)?;
    f.sync_all()
}

fn next_generation(digest_dir: &Path) -> io::Result<u64> {
    let mut highest = 0u64;
    for entry in fs::read_dir(digest_dir)? {
        let entry = entry?;
        if let Some(n) = entry
            .file_name()
            .to_str()
            .and_then(|s| s.strip_prefix("dump-"))
            .and_then(|s| s.parse::<u64>().ok())
        {
            highest = highest.max(n);
        }
    }
    Ok(highest + 1)
}

/// Removes temporary folders and every dump generation but `keep` (all of
/// them when `keep` is `None` and there is no `CURRENT`). Failures are
/// ignored: leftovers cost disk space, not correctness.
pub fn remove_stale(digest_dir: &Path, keep: Option<&str>) {
    let current = fs::read_to_string(digest_dir.join(CURRENT_FILE))
        .ok()
        .map(|s| s.trim().to_string());
    let keep = keep.map(str::to_string).or(current);
    let Ok(entries) = fs::read_dir(digest_dir) else {
        return;
    };
    for entry in entries.flatten() {
        let name = entry.file_name();
        let Some(name) = name.to_str() else { continue };
        let stale_tmp = name.starts_with("tmp-") || name == format!("{CURRENT_FILE}.tmp");
        let old_dump = name.starts_with("dump-") && Some(name) != keep.as_deref();
        if stale_tmp || old_dump {
            let path = entry.path();
            let _ = if path.is_dir() {
                fs::remove_dir_all(&path)
            } else {
                fs::remove_file(&path)
            };
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn manifest(digest: &str) -> Manifest {
        Manifest {
            format: MANIFEST_FORMAT,
            backend: "b".into(),
            library: "lib 1".into(),
            distance: "d".into(),
            digest: digest.into(),
            dimension: 4,
            max_connections: 16,
            ef_construction: 100,
            rows: 0,
            max_row_id: None,
            files: vec![],
            written_at_unix_ms: 0,
        }
    }

    fn files() -> &'static [String] {
        static NAMES: std::sync::OnceLock<Vec<String>> = std::sync::OnceLock::new();
        NAMES.get_or_init(|| vec!["index.hnsw.graph".into(), "index.hnsw.data".into()])
    }

    fn expected(digest: &str) -> Expected<'_> {
        Expected {
            backend: "b",
            library: "lib 1",
            files: files(),
            digest,
            dimension: 4,
            max_connections: 16,
            ef_construction: 100,
            distance: "d",
        }
    }

    fn fake_dump(dir: &Path, digest: &str) -> PathBuf {
        let tmp = temp_folder(dir).unwrap();
        fs::write(tmp.join("index.hnsw.graph"), b"graph bytes").unwrap();
        fs::write(tmp.join("index.hnsw.data"), b"data bytes").unwrap();
        publish(dir, &tmp, files(), manifest(digest)).unwrap()
    }

    #[test]
    fn published_dump_checks_and_replaces_the_old_one() {
        let root = tempfile::tempdir().unwrap();
        let first = fake_dump(root.path(), "aa");
        let second = fake_dump(root.path(), "aa");
        assert_ne!(first, second);
        assert!(!first.exists(), "older generation removed");
        let checked = check(root.path(), &expected("aa")).unwrap();
        assert_eq!(checked.folder, second);
        assert_eq!(checked.manifest.files.len(), 2);
    }

    #[test]
    fn truncated_garbled_or_foreign_dumps_are_refused() {
        let root = tempfile::tempdir().unwrap();
        assert_eq!(
            check(root.path(), &expected("aa")).unwrap_err(),
            "no dump yet"
        );
        let folder = fake_dump(root.path(), "aa");
        assert!(check(root.path(), &expected("bb"))
            .unwrap_err()
            .contains("digest"));
        let other_backend = Expected {
            backend: "c",
            ..expected("aa")
        };
        assert!(check(root.path(), &other_backend)
            .unwrap_err()
            .contains("the b backend, this index uses c"));
        let other_library = Expected {
            library: "lib 2",
            ..expected("aa")
        };
        assert!(check(root.path(), &other_library)
            .unwrap_err()
            .contains("lib 1"));
        let more_files = ["index.extra".to_string()];
        let unlisted = Expected {
            files: &more_files,
            ..expected("aa")
        };
        assert!(check(root.path(), &unlisted)
            .unwrap_err()
            .contains("does not list index.extra"));

        fs::write(folder.join("index.hnsw.graph"), b"graph byteX").unwrap();
        assert!(check(root.path(), &expected("aa"))
            .unwrap_err()
            .contains("checksum"));
        fs::write(folder.join("index.hnsw.graph"), b"graph").unwrap();
        assert!(check(root.path(), &expected("aa"))
            .unwrap_err()
            .contains("truncated"));
        fs::write(folder.join(MANIFEST_FILE), b"{not json").unwrap();
        assert!(check(root.path(), &expected("aa"))
            .unwrap_err()
            .contains("not a valid manifest"));
        fs::write(root.path().join(CURRENT_FILE), b"../../etc").unwrap();
        assert!(check(root.path(), &expected("aa"))
            .unwrap_err()
            .contains("does not name"));
    }

    #[test]
    fn stale_temporary_folders_are_removed() {
        let root = tempfile::tempdir().unwrap();
        let kept = fake_dump(root.path(), "aa");
        let tmp = temp_folder(root.path()).unwrap();
        remove_stale(root.path(), None);
        assert!(!tmp.exists());
        assert!(kept.exists());
    }
}

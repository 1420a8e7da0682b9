//! The data folder: every file befit keeps there, named in one place, and the
//! exclusive lock that keeps two processes from writing it at once.
//!
//! The lock is an advisory `flock` on `befit.lock` (through std's
//! `File::try_lock`): the operating system drops it when its process exits,
//! however it exits, so a lock file left by a killed server is stale by
//! construction and the next start takes it. The file records the holder's
//! process id and command for the refusal message.

use std::fs::{File, OpenOptions, TryLockError};
use std::io::{Read, Seek, Write};
use std::path::{Path, PathBuf};

use crate::bank::{BANK_FILE, INDEX_DIR};

/// The data folder when none is given: relative to where befit runs (the
/// Makefile's `make serve` uses the same one), ignored by git.
pub const DEFAULT_DATA_DIR: &str = "befit-data";

/// File name of the SQLite image store.
pub const IMAGES_FILE: &str = "images.sqlite";
/// Folder of saved reward maps, one `NAME.json` each.
pub const MAPS_DIR: &str = "maps";
/// File name of the run watch's SQLite file.
pub const RUNS_FILE: &str = "runs.sqlite";
/// The lock file.
pub const LOCK_FILE: &str = "befit.lock";

/// Why the data folder cannot be used.
#[derive(Debug, thiserror::Error)]
pub enum DataDirError {
    #[error("cannot create the data folder {path}: {source}; check it is writable")]
    Create {
        path: PathBuf,
        #[source]
        source: std::io::Error,
    },
    #[error("cannot lock {path}: {source}")]
    Lock {
        path: PathBuf,
        #[source]
        source: std::io::Error,
    },
    #[error("the data folder {dir} is in use by {holder}; {advice}")]
    Busy {
        dir: PathBuf,
        holder: String,
        advice: &'static str,
    },
}

/// Where a befit process keeps its state.
#[derive(Debug, Clone)]
pub struct DataDir {
    root: PathBuf,
}

/// Holds the data folder's lock until dropped.
#[derive(Debug)]
pub struct DataDirLock {
    _file: File,
    path: PathBuf,
}

impl DataDirLock {
    pub fn path(&self) -> &Path {
        &self.path
    }
}

impl DataDir {
    pub fn new(root: impl Into<PathBuf>) -> DataDir {
        DataDir { root: root.into() }
    }

    pub fn root(&self) -> &Path {
        &self.root
    }

    pub fn images(&self) -> PathBuf {
        self.root.join(IMAGES_FILE)
    }

    pub fn bank(&self) -> PathBuf {
        self.root.join(BANK_FILE)
    }

    pub fn bank_index(&self) -> PathBuf {
        self.root.join(INDEX_DIR)
    }

    pub fn runs(&self) -> PathBuf {
        self.root.join(RUNS_FILE)
    }

    pub fn maps(&self) -> PathBuf {
        self.root.join(MAPS_DIR)
    }

    pub fn lock_file(&self) -> PathBuf {
        self.root.join(LOCK_FILE)
    }

    /// Creates the folder and takes its lock for `holder` (say `befit serve`);
    /// `advice` says what to do instead when another process has it.
    pub fn lock(&self, holder: &str, advice: &'static str) -> Result<DataDirLock, DataDirError> {
        std::fs::create_dir_all(&self.root).map_err(|source| DataDirError::Create {
            path: self.root.clone(),
            source,
        })?;
        let path = self.lock_file();
        let lock_err = |source| DataDirError::Lock {
            path: path.clone(),
            source,
        };
        let mut file = OpenOptions::new()
            .read(true)
            .write(true)
            .create(true)
            .truncate(false)
            .open(&path)
            .map_err(lock_err)?;
        match file.try_lock() {
            Ok(()) => {}
            Err(TryLockError::WouldBlock) => {
                let mut held_by = String::new();
                let _ = file.read_to_string(&mut held_by);
                let held_by = held_by.trim();
                return Err(DataDirError::Busy {
                    dir: self.root.clone(),
                    holder: if held_by.is_empty() {
                        "another process".to_string()
                    } else {
                        held_by.to_string()
                    },
                    advice,
                });
            }
            Err(TryLockError::Error(e)) => return Err(lock_err(e)),
        }
        // Ours now: record who holds it (a stale record of a killed process is overwritten).
        let record = format!("{holder} (process {})\n", std::process::id());
        file.set_len(0)
            .and_then(|()| file.rewind())
            .and_then(|()| file.write_all(record.as_bytes()))
            .and_then(|()| file.sync_all())
            .map_err(lock_err)?;
        Ok(DataDirLock { _file: file, path })
    }
}

/// What a command that writes the bank tells the user when a server holds the folder.
pub const BANK_WRITE_ADVICE: &str =
    "add captions to a running server with POST /v1/bank, or stop the server first";

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_second_holder_is_refused_and_a_released_lock_is_taken() {
        let dir = tempfile::tempdir().unwrap();
        let data = DataDir::new(dir.path().join("data"));
        let first = data.lock("befit serve", "stop it").unwrap();
        let e = data
            .lock("befit bank import", BANK_WRITE_ADVICE)
            .unwrap_err();
        let message = e.to_string();
        assert!(matches!(e, DataDirError::Busy { .. }));
        assert!(message.contains("befit serve (process "), "{message}");
        assert!(message.contains("POST /v1/bank"), "{message}");
        drop(first);
        // A lock file left behind (as after kill -9) holds no lock: it is taken.
        assert!(data.lock_file().exists());
        let again = data.lock("befit bank import", BANK_WRITE_ADVICE).unwrap();
        assert_eq!(again.path(), data.lock_file());
        let record = std::fs::read_to_string(data.lock_file()).unwrap();
        assert!(
            record.starts_with("befit bank import (process "),
            "{record}"
        );
    }
}

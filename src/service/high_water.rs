//! The data folder's high-water marks: how many images and bank captions its
//! stores held, so that a store that was emptied or replaced behind befit's
//! back (a 0-byte `images.sqlite` after a bad copy, a restored older file)
//! stops the start with a clear message instead of serving as if thousands of
//! items had never existed.
//!
//! Neither store ever deletes, so their counts only grow: a count below the
//! mark means lost data. The marks are written at start and with every bank
//! dump (at its interval and at shutdown), atomically (a temporary file
//! renamed over `counts.json`), so a crash leaves the old marks or the new.

use std::path::{Path, PathBuf};

use serde::{Deserialize, Serialize};

/// File name of the marks in the data folder.
pub const MARKS_FILE: &str = "counts.json";

/// What the stores held.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq, Serialize, Deserialize)]
pub struct Counts {
    /// Images in `images.sqlite`.
    pub images: u64,
    /// Captions in `bank.sqlite`.
    pub captions: u64,
}

/// Why the marks stop the start.
#[derive(Debug, thiserror::Error)]
pub enum MarkError {
    #[error(
        "{file} holds {now} {what} but held {before} when befit last wrote {marks}: it was emptied \
         or replaced by an older copy, and those {what} are gone. Restore the file from a backup, \
         or start with --accept-smaller-stores to serve what is there (the marks then start anew)"
    )]
    Shrunk {
        file: &'static str,
        what: &'static str,
        now: u64,
        before: u64,
        marks: PathBuf,
    },
    #[error("reading {path}: {message}; delete it to start without the check")]
    Unreadable { path: PathBuf, message: String },
    #[error("writing {path}: {source}")]
    Write {
        path: PathBuf,
        #[source]
        source: std::io::Error,
    },
}

/// The marks last written in `dir`, if any.
pub fn read(dir: &Path) -> Result<Option<Counts>, MarkError> {
    let path = dir.join(MARKS_FILE);
    match std::fs::read(&path) {
        Ok(bytes) => serde_json::from_slice(&bytes)
            .map(Some)
            .map_err(|e| MarkError::Unreadable {
                path,
                message: e.to_string(),
            }),
        Err(e) if e.kind() == std::io::ErrorKind::NotFound => Ok(None),
        Err(e) => Err(MarkError::Unreadable {
            path,
            message: e.to_string(),
        }),
    }
}

/// Refuses `now` when a store holds fewer items than its mark, unless `accept`.
pub fn check(dir: &Path, now: Counts, accept: bool) -> Result<(), MarkError> {
    let Some(before) = read(dir)? else {
        return Ok(());
    };
    if accept {
        return Ok(());
    }
    let stores = [
        ("images.sqlite", "images", now.images, before.images),
        ("bank.sqlite", "captions", now.captions, before.captions),
    ];
    if let Some((file, what, now, before)) = stores.into_iter().find(|s| s.2 < s.3) {
        return Err(MarkError::Shrunk {
            file,
            what,
            now,
            before,
            marks: dir.join(MARKS_FILE),
        });
    }
    Ok(())
}

/// Writes `counts` as the new marks, atomically.
pub fn record(dir: &Path, counts: Counts) -> Result<(), MarkError> {
    let path = dir.join(MARKS_FILE);
    let tmp = dir.join(format!("{MARKS_FILE}.tmp"));
    let write = |source| MarkError::Write {
        path: path.clone(),
        source,
    };
    let text = serde_json::to_vec(&counts).expect("two integers serialise");
    std::fs::write(&tmp, text).map_err(write)?;
    std::fs::File::open(&tmp)
        .and_then(|f| f.sync_all())
        .map_err(write)?;
    std::fs::rename(&tmp, &path).map_err(write)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_store_below_its_mark_is_refused_unless_accepted() {
        let dir = tempfile::tempdir().unwrap();
        let d = dir.path();
        // No marks yet: anything goes.
        check(d, Counts::default(), false).unwrap();
        record(
            d,
            Counts {
                images: 10,
                captions: 5,
            },
        )
        .unwrap();
        check(
            d,
            Counts {
                images: 10,
                captions: 5,
            },
            false,
        )
        .unwrap();
        check(
            d,
            Counts {
                images: 12,
                captions: 9,
            },
            false,
        )
        .unwrap();
        let e = check(
            d,
            Counts {
                images: 0,
                captions: 5,
            },
            false,
        )
        .unwrap_err();
        assert!(
            e.to_string()
                .contains("images.sqlite holds 0 images but held 10"),
            "{e}"
        );
        let e = check(
            d,
            Counts {
                images: 10,
                captions: 4,
            },
            false,
        )
        .unwrap_err();
        assert!(
            e.to_string()
                .contains("bank.sqlite holds 4 captions but held 5"),
            "{e}"
        );
        check(
            d,
            Counts {
                images: 0,
                captions: 0,
            },
            true,
        )
        .unwrap();
        // Damaged marks are named, not ignored.
        std::fs::write(d.join(MARKS_FILE), b"{not json").unwrap();
        assert!(matches!(
            check(d, Counts::default(), false),
            Err(MarkError::Unreadable { .. })
        ));
    }
}

//! The caption bank's source of truth: one SQLite file (`bank.sqlite` under
//! the data dir) holding each caption once, its tags, and its embedding per
//! bundle digest.
//!
//! WAL journal with `synchronous=FULL`: a write returns only after its
//! transaction is on disk, so anything acknowledged survives a crash or a
//! SIGKILL, and readers run beside the one writer. Indexes are derived from
//! this file and rebuilt from it whenever in doubt.

use std::path::{Path, PathBuf};
use std::sync::{Mutex, MutexGuard};
use std::time::Duration;

use rusqlite::{params, Connection, OpenFlags, OptionalExtension};
use serde::Serialize;

use super::dump::unix_ms;
use super::index::RowSource;
use super::RowId;

/// Schema version written to `PRAGMA user_version`.
pub const SCHEMA_VERSION: i64 = 1;

/// How long a connection waits for a lock held by another before failing:
/// long enough for a large import batch to commit.
pub const BUSY_TIMEOUT: Duration = Duration::from_secs(30);

/// Read connections kept open for reuse.
const READER_POOL: usize = 8;

const SCHEMA: &str = "
CREATE TABLE IF NOT EXISTS captions (
    id INTEGER PRIMARY KEY,
    text TEXT NOT NULL UNIQUE,
    added_unix_ms INTEGER NOT NULL
);
CREATE TABLE IF NOT EXISTS caption_tags (
    caption_id INTEGER NOT NULL REFERENCES captions(id),
    tag TEXT NOT NULL,
    added_unix_ms INTEGER NOT NULL,
    PRIMARY KEY (caption_id, tag)
) WITHOUT ROWID;
CREATE INDEX IF NOT EXISTS caption_tags_by_tag ON caption_tags(tag);
CREATE TABLE IF NOT EXISTS caption_vectors (
    digest TEXT NOT NULL,
    caption_id INTEGER NOT NULL REFERENCES captions(id),
    vector BLOB NOT NULL,
    added_unix_ms INTEGER NOT NULL,
    PRIMARY KEY (digest, caption_id)
) WITHOUT ROWID;
";

/// What went wrong with the SQLite file.
#[derive(Debug, thiserror::Error)]
pub enum StoreError {
    /// The file could not be opened or set up.
    #[error("cannot open the caption bank {path}: {source}; check that the data dir exists and is writable")]
    Open {
        /// The SQLite file.
        path: PathBuf,
        /// SQLite's error.
        #[source]
        source: rusqlite::Error,
    },
    /// A newer befit wrote the file.
    #[error("the caption bank {path} has schema version {found}, newer than this befit's {SCHEMA_VERSION}; upgrade befit or use another data dir")]
    NewerSchema {
        /// The SQLite file.
        path: PathBuf,
        /// Version found.
        found: i64,
    },
    /// A query failed.
    #[error("caption bank query failed: {0}; if it persists, check the disk and run `PRAGMA integrity_check` on bank.sqlite")]
    Sql(#[from] rusqlite::Error),
}

/// A caption as stored.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, utoipa::ToSchema)]
pub struct Caption {
    /// Stable id (the same for every bundle).
    pub id: RowId,
    /// The text, exactly as added.
    pub text: String,
    /// Every tag it was added with, sorted.
    pub tags: Vec<String>,
    /// When it was first added, milliseconds since the Unix epoch.
    pub added_unix_ms: i64,
}

/// One row to append: a caption, an optional tag, and its vector for the
/// digest (`None`: only record the caption and tag).
#[derive(Debug, Clone)]
pub struct StoreRow<'a> {
    /// Caption text.
    pub text: &'a str,
    /// Tag to attach.
    pub tag: Option<&'a str>,
    /// Unit vector for the digest.
    pub vector: Option<&'a [f32]>,
}

/// What an append did to one row.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
pub struct Stored {
    /// The caption's id.
    pub id: RowId,
    /// The text was not in the bank before.
    pub new_caption: bool,
    /// The vector for this digest was not there before (and was stored).
    pub new_vector: bool,
}

/// Row counts for the stats route.
#[derive(Debug, Clone, PartialEq, Eq, Serialize)]
pub struct StoreCounts {
    /// Distinct captions.
    pub captions: u64,
    /// Vectors per digest.
    pub vectors: Vec<(String, u64)>,
    /// Captions per tag.
    pub tags: Vec<(String, u64)>,
    /// Size of the SQLite file (without its WAL), in bytes.
    pub file_bytes: u64,
}

/// The SQLite file and its connections (one writer, pooled readers).
pub struct CaptionStore {
    path: PathBuf,
    writer: Mutex<Connection>,
    readers: Mutex<Vec<Connection>>,
}

impl std::fmt::Debug for CaptionStore {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("CaptionStore")
            .field("path", &self.path)
            .finish()
    }
}

fn lock<T>(m: &Mutex<T>) -> MutexGuard<'_, T> {
    m.lock().unwrap_or_else(|e| e.into_inner())
}

/// Vector as stored: little-endian f32s.
pub fn encode_vector(v: &[f32]) -> Vec<u8> {
    v.iter().flat_map(|x| x.to_le_bytes()).collect()
}

/// Vector from its stored bytes; `None` when the length is not a whole
/// number of f32s.
pub fn decode_vector(bytes: &[u8]) -> Option<Vec<f32>> {
    if !bytes.len().is_multiple_of(4) {
        return None;
    }
    Some(
        bytes
            .chunks_exact(4)
            .map(|c| f32::from_le_bytes([c[0], c[1], c[2], c[3]]))
            .collect(),
    )
}

fn configure(conn: &Connection) -> rusqlite::Result<()> {
    conn.busy_timeout(BUSY_TIMEOUT)?;
    conn.pragma_update(None, "foreign_keys", "ON")?;
    conn.pragma_update(None, "synchronous", "FULL")?;
    Ok(())
}

impl CaptionStore {
    /// Opens (creating if needed) the bank file at `path`.
    pub fn open(path: &Path) -> Result<Self, StoreError> {
        let open_err = |source| StoreError::Open {
            path: path.to_path_buf(),
            source,
        };
        let conn = Connection::open(path).map_err(open_err)?;
        let mode: String = conn
            .query_row("PRAGMA journal_mode=WAL", [], |r| r.get(0))
            .map_err(open_err)?;
        if !mode.eq_ignore_ascii_case("wal") {
            return Err(open_err(rusqlite::Error::InvalidParameterName(format!(
                "journal_mode is {mode}, WAL is needed (is the data dir on a network file system?)"
            ))));
        }
        configure(&conn).map_err(open_err)?;
        let version: i64 = conn
            .query_row("PRAGMA user_version", [], |r| r.get(0))
            .map_err(open_err)?;
        if version > SCHEMA_VERSION {
            return Err(StoreError::NewerSchema {
                path: path.to_path_buf(),
                found: version,
            });
        }
        conn.execute_batch(SCHEMA).map_err(open_err)?;
        conn.pragma_update(None, "user_version", SCHEMA_VERSION)
            .map_err(open_err)?;
        Ok(Self {
            path: path.to_path_buf(),
            writer: Mutex::new(conn),
            readers: Mutex::new(Vec::new()),
        })
    }

    /// Path of the SQLite file.
    pub fn path(&self) -> &Path {
        &self.path
    }

    fn with_reader<T>(
        &self,
        f: impl FnOnce(&Connection) -> rusqlite::Result<T>,
    ) -> Result<T, StoreError> {
        let pooled = lock(&self.readers).pop();
        let conn = match pooled {
            Some(c) => c,
            None => {
                let c = Connection::open_with_flags(
                    &self.path,
                    OpenFlags::SQLITE_OPEN_READ_ONLY | OpenFlags::SQLITE_OPEN_NO_MUTEX,
                )?;
                c.busy_timeout(BUSY_TIMEOUT)?;
                c
            }
        };
        let out = f(&conn);
        let mut pool = lock(&self.readers);
        if pool.len() < READER_POOL {
            pool.push(conn);
        }
        Ok(out?)
    }

    /// Appends rows in one transaction, durable when this returns.
    pub fn append(&self, digest: &str, rows: &[StoreRow<'_>]) -> Result<Vec<Stored>, StoreError> {
        let now = unix_ms() as i64;
        let mut conn = lock(&self.writer);
        let tx = conn.transaction()?;
        let mut out = Vec::with_capacity(rows.len());
        {
            let mut insert_caption = tx.prepare_cached(
                "INSERT INTO captions (text, added_unix_ms) VALUES (?1, ?2) ON CONFLICT(text) DO NOTHING",
            )?;
            let mut find = tx.prepare_cached("SELECT id FROM captions WHERE text = ?1")?;
            let mut insert_tag = tx.prepare_cached(
                "INSERT OR IGNORE INTO caption_tags (caption_id, tag, added_unix_ms) VALUES (?1, ?2, ?3)",
            )?;
            let mut insert_vector = tx.prepare_cached(
                "INSERT OR IGNORE INTO caption_vectors (digest, caption_id, vector, added_unix_ms) VALUES (?1, ?2, ?3, ?4)",
            )?;
            for row in rows {
                let new_caption = insert_caption.execute(params![row.text, now])? == 1;
                let id: i64 = find.query_row([row.text], |r| r.get(0))?;
                if let Some(tag) = row.tag {
                    insert_tag.execute(params![id, tag, now])?;
                }
                let new_vector = match row.vector {
                    Some(v) => {
                        insert_vector.execute(params![digest, id, encode_vector(v), now])? == 1
                    }
                    None => false,
                };
                out.push(Stored {
                    id: id as RowId,
                    new_caption,
                    new_vector,
                });
            }
        }
        tx.commit()?;
        Ok(out)
    }

    /// For each text: whether the bank has it with a vector for `digest`.
    pub fn has_vector(&self, digest: &str, texts: &[&str]) -> Result<Vec<bool>, StoreError> {
        self.with_reader(|c| {
            let mut stmt = c.prepare_cached(
                "SELECT 1 FROM captions JOIN caption_vectors v ON v.caption_id = captions.id
                 WHERE captions.text = ?1 AND v.digest = ?2",
            )?;
            texts
                .iter()
                .map(|t| stmt.exists(params![t, digest]))
                .collect()
        })
    }

    /// The captions with these ids (`None` for an unknown id), in order.
    pub fn captions(&self, ids: &[RowId]) -> Result<Vec<Option<Caption>>, StoreError> {
        self.with_reader(|c| {
            let mut one =
                c.prepare_cached("SELECT text, added_unix_ms FROM captions WHERE id = ?1")?;
            let mut tags = c.prepare_cached(
                "SELECT tag FROM caption_tags WHERE caption_id = ?1 ORDER BY tag",
            )?;
            let mut out = Vec::with_capacity(ids.len());
            for id in ids {
                let Ok(sql_id) = i64::try_from(*id) else {
                    out.push(None);
                    continue;
                };
                let row = one
                    .query_row([sql_id], |r| {
                        Ok((r.get::<_, String>(0)?, r.get::<_, i64>(1)?))
                    })
                    .optional()?;
                out.push(match row {
                    None => None,
                    Some((text, added_unix_ms)) => Some(Caption {
                        id: *id,
                        text,
                        tags: tags
                            .query_map([sql_id], |r| r.get(0))?
                            .collect::<rusqlite::Result<Vec<String>>>()?,
                        added_unix_ms,
                    }),
                });
            }
            Ok(out)
        })
    }

    /// The caption with this exact text.
    pub fn caption_by_text(&self, text: &str) -> Result<Option<Caption>, StoreError> {
        let id: Option<i64> = self.with_reader(|c| {
            c.query_row("SELECT id FROM captions WHERE text = ?1", [text], |r| {
                r.get(0)
            })
            .optional()
        })?;
        match id {
            None => Ok(None),
            Some(id) => Ok(self.captions(&[id as RowId])?.pop().flatten()),
        }
    }

    /// Every (caption id, tag) pair.
    pub fn all_tags(&self) -> Result<Vec<(RowId, String)>, StoreError> {
        self.with_reader(|c| {
            let mut stmt = c.prepare("SELECT caption_id, tag FROM caption_tags")?;
            let rows = stmt
                .query_map([], |r| {
                    Ok((r.get::<_, i64>(0)? as RowId, r.get::<_, String>(1)?))
                })?
                .collect();
            rows
        })
    }

    /// Up to `limit` captions with ids above `after` that have no vector for
    /// `digest`, by id: what a new bundle still has to embed.
    pub fn without_vector(
        &self,
        digest: &str,
        after: RowId,
        limit: usize,
    ) -> Result<Vec<(RowId, String)>, StoreError> {
        let after = i64::try_from(after).unwrap_or(i64::MAX);
        self.with_reader(|c| {
            let mut stmt = c.prepare_cached(
                "SELECT id, text FROM captions WHERE id > ?1 AND NOT EXISTS
                 (SELECT 1 FROM caption_vectors v WHERE v.digest = ?2 AND v.caption_id = captions.id)
                 ORDER BY id LIMIT ?3",
            )?;
            let rows = stmt
                .query_map(params![after, digest, limit as i64], |r| {
                    Ok((r.get::<_, i64>(0)? as RowId, r.get::<_, String>(1)?))
                })?
                .collect();
            rows
        })
    }

    /// Captions stored (one query; what the high-water marks need).
    pub fn caption_count(&self) -> Result<u64, StoreError> {
        self.with_reader(|c| {
            let n: i64 = c.query_row("SELECT count(*) FROM captions", [], |r| r.get(0))?;
            Ok(n as u64)
        })
    }

    /// Row counts and file size.
    pub fn counts(&self) -> Result<StoreCounts, StoreError> {
        let (captions, vectors, tags) = self.with_reader(|c| {
            let captions: i64 = c.query_row("SELECT count(*) FROM captions", [], |r| r.get(0))?;
            let mut v = c.prepare(
                "SELECT digest, count(*) FROM caption_vectors GROUP BY digest ORDER BY digest",
            )?;
            let vectors = v
                .query_map([], |r| {
                    Ok((r.get::<_, String>(0)?, r.get::<_, i64>(1)? as u64))
                })?
                .collect::<rusqlite::Result<Vec<_>>>()?;
            let mut t =
                c.prepare("SELECT tag, count(*) FROM caption_tags GROUP BY tag ORDER BY tag")?;
            let tags = t
                .query_map([], |r| {
                    Ok((r.get::<_, String>(0)?, r.get::<_, i64>(1)? as u64))
                })?
                .collect::<rusqlite::Result<Vec<_>>>()?;
            Ok((captions as u64, vectors, tags))
        })?;
        let file_bytes = std::fs::metadata(&self.path).map(|m| m.len()).unwrap_or(0);
        Ok(StoreCounts {
            captions,
            vectors,
            tags,
            file_bytes,
        })
    }

    /// `PRAGMA integrity_check`: `["ok"]` for a sound file, else the problems.
    pub fn integrity_check(&self) -> Result<Vec<String>, StoreError> {
        self.with_reader(|c| {
            let mut stmt = c.prepare("PRAGMA integrity_check")?;
            let rows = stmt.query_map([], |r| r.get(0))?.collect();
            rows
        })
    }
}

impl RowSource for CaptionStore {
    fn each_row(
        &self,
        digest: &str,
        each: &mut dyn FnMut(RowId, &[f32]),
    ) -> Result<(), Box<dyn std::error::Error + Send + Sync>> {
        self.with_reader(|c| {
            let mut stmt = c.prepare(
                "SELECT caption_id, vector FROM caption_vectors WHERE digest = ?1 ORDER BY caption_id",
            )?;
            let mut rows = stmt.query([digest])?;
            while let Some(row) = rows.next()? {
                let id: i64 = row.get(0)?;
                let bytes = row.get_ref(1)?.as_blob().unwrap_or(&[]);
                // A blob of the wrong size is handed on empty; the index skips
                // and counts it.
                let v = decode_vector(bytes).unwrap_or_default();
                each(id as RowId, &v);
            }
            Ok(())
        })
        .map_err(|e| Box::new(e) as Box<dyn std::error::Error + Send + Sync>)
    }
}

#[cfg(test)]
mod tests;

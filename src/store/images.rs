//! The SQLite store of registered images: content id (sha256 of the bytes),
//! bytes, size, and one embedding per bundle digest.

use std::path::Path;
use std::sync::{Mutex, MutexGuard};

use rusqlite::{params, Connection, OptionalExtension};
use sha2::{Digest, Sha256};

/// Why the store failed.
#[derive(Debug, thiserror::Error)]
pub enum StoreError {
    #[error("image store {path}: {message}")]
    Open { path: String, message: String },
    #[error("image store: {0}")]
    Sqlite(#[from] rusqlite::Error),
    #[error("image store holds a vector of {found} bytes for {id}, not a whole number of floats")]
    BadVector { id: String, found: usize },
}

/// Content id of image bytes: their sha256 as 64 lower-case hex digits.
pub fn content_id(bytes: &[u8]) -> String {
    hex::encode(Sha256::digest(bytes))
}

/// True when `id` has the form of a content id.
pub fn is_content_id(id: &str) -> bool {
    id.len() == 64
        && id
            .bytes()
            .all(|b| b.is_ascii_digit() || (b'a'..=b'f').contains(&b))
}

/// One SQLite connection; callers run on blocking threads, never the async runtime.
pub struct ImageStore {
    conn: Mutex<Connection>,
}

const SCHEMA: &str = "
CREATE TABLE IF NOT EXISTS images (
    id TEXT PRIMARY KEY,
    bytes BLOB NOT NULL,
    width INTEGER NOT NULL,
    height INTEGER NOT NULL,
    added_at INTEGER NOT NULL
);
CREATE TABLE IF NOT EXISTS image_vectors (
    image_id TEXT NOT NULL REFERENCES images(id),
    digest TEXT NOT NULL,
    vector BLOB NOT NULL,
    PRIMARY KEY (image_id, digest)
);
";

impl ImageStore {
    /// Opens (creating) `path`, in WAL mode with full sync: a registration
    /// that was answered survives a crash.
    pub fn open(path: &Path) -> Result<ImageStore, StoreError> {
        let open_err = |e: rusqlite::Error| StoreError::Open {
            path: path.display().to_string(),
            message: e.to_string(),
        };
        let conn = Connection::open(path).map_err(open_err)?;
        conn.pragma_update(None, "journal_mode", "WAL")
            .map_err(open_err)?;
        conn.pragma_update(None, "synchronous", "FULL")
            .map_err(open_err)?;
        conn.busy_timeout(std::time::Duration::from_secs(10))
            .map_err(open_err)?;
        conn.execute_batch(SCHEMA).map_err(open_err)?;
        Ok(ImageStore {
            conn: Mutex::new(conn),
        })
    }

    /// An in-memory store, for tests and one-off CLI runs.
    pub fn in_memory() -> Result<ImageStore, StoreError> {
        let conn = Connection::open_in_memory()?;
        conn.execute_batch(SCHEMA)?;
        Ok(ImageStore {
            conn: Mutex::new(conn),
        })
    }

    fn conn(&self) -> MutexGuard<'_, Connection> {
        self.conn.lock().unwrap_or_else(|p| p.into_inner())
    }

    /// Stores an image; returns whether it was new.
    pub fn put_image(
        &self,
        id: &str,
        bytes: &[u8],
        width: u32,
        height: u32,
    ) -> Result<bool, StoreError> {
        let now = std::time::SystemTime::now()
            .duration_since(std::time::UNIX_EPOCH)
            .map_or(0, |d| d.as_secs() as i64);
        let changed = self.conn().execute(
            "INSERT OR IGNORE INTO images (id, bytes, width, height, added_at) VALUES (?1, ?2, ?3, ?4, ?5)",
            params![id, bytes, width, height, now],
        )?;
        Ok(changed == 1)
    }

    /// The image's bytes, if registered.
    pub fn image_bytes(&self, id: &str) -> Result<Option<Vec<u8>>, StoreError> {
        Ok(self
            .conn()
            .query_row("SELECT bytes FROM images WHERE id = ?1", [id], |r| r.get(0))
            .optional()?)
    }

    /// Whether the image is registered.
    pub fn has_image(&self, id: &str) -> Result<bool, StoreError> {
        Ok(self
            .conn()
            .query_row("SELECT 1 FROM images WHERE id = ?1", [id], |_| Ok(()))
            .optional()?
            .is_some())
    }

    /// Width and height of a registered image.
    pub fn image_size(&self, id: &str) -> Result<Option<(u32, u32)>, StoreError> {
        Ok(self
            .conn()
            .query_row(
                "SELECT width, height FROM images WHERE id = ?1",
                [id],
                |r| Ok((r.get(0)?, r.get(1)?)),
            )
            .optional()?)
    }

    /// Number of registered images.
    pub fn image_count(&self) -> Result<u64, StoreError> {
        Ok(self
            .conn()
            .query_row("SELECT COUNT(*) FROM images", [], |r| r.get::<_, i64>(0))?
            as u64)
    }

    /// The embedding of an image under a bundle digest, if computed before.
    pub fn vector(&self, id: &str, digest: &str) -> Result<Option<Vec<f32>>, StoreError> {
        let blob: Option<Vec<u8>> = self
            .conn()
            .query_row(
                "SELECT vector FROM image_vectors WHERE image_id = ?1 AND digest = ?2",
                [id, digest],
                |r| r.get(0),
            )
            .optional()?;
        blob.map(|b| decode_vector(id, &b)).transpose()
    }

    /// Keeps an image's embedding under a bundle digest.
    pub fn put_vector(&self, id: &str, digest: &str, vector: &[f32]) -> Result<(), StoreError> {
        let blob: Vec<u8> = vector.iter().flat_map(|x| x.to_le_bytes()).collect();
        self.conn().execute(
            "INSERT OR REPLACE INTO image_vectors (image_id, digest, vector) VALUES (?1, ?2, ?3)",
            params![id, digest, blob],
        )?;
        Ok(())
    }

    /// Every stored (id, vector) under a digest, for the image index.
    pub fn vectors(&self, digest: &str) -> Result<Vec<(String, Vec<f32>)>, StoreError> {
        let conn = self.conn();
        let mut stmt = conn.prepare(
            "SELECT image_id, vector FROM image_vectors WHERE digest = ?1 ORDER BY image_id",
        )?;
        let rows = stmt.query_map([digest], |r| {
            Ok((r.get::<_, String>(0)?, r.get::<_, Vec<u8>>(1)?))
        })?;
        let mut out = Vec::new();
        for row in rows {
            let (id, blob) = row?;
            let vector = decode_vector(&id, &blob)?;
            out.push((id, vector));
        }
        Ok(out)
    }
}

/// A stored image vector with the SQLite row id it was written under.
pub type StoredVector = (i64, String, Vec<f32>);

impl ImageStore {
    /// Vectors of `digest` written after row `after` (0: all), in write order,
    /// so an index over the store can catch up with what was added since.
    pub fn vectors_after(&self, digest: &str, after: i64) -> Result<Vec<StoredVector>, StoreError> {
        let conn = self.conn();
        let mut stmt = conn.prepare(
            "SELECT rowid, image_id, vector FROM image_vectors \
             WHERE digest = ?1 AND rowid > ?2 ORDER BY rowid",
        )?;
        let rows = stmt.query_map(params![digest, after], |r| {
            Ok((
                r.get::<_, i64>(0)?,
                r.get::<_, String>(1)?,
                r.get::<_, Vec<u8>>(2)?,
            ))
        })?;
        let mut out = Vec::new();
        for row in rows {
            let (rowid, id, blob) = row?;
            let vector = decode_vector(&id, &blob)?;
            out.push((rowid, id, vector));
        }
        Ok(out)
    }
}

fn decode_vector(id: &str, blob: &[u8]) -> Result<Vec<f32>, StoreError> {
    if !blob.len().is_multiple_of(4) {
        return Err(StoreError::BadVector {
            id: id.to_string(),
            found: blob.len(),
        });
    }
    Ok(blob
        .chunks_exact(4)
        .map(|c| f32::from_le_bytes([c[0], c[1], c[2], c[3]]))
        .collect())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn content_id_is_sha256_hex() {
        // sha256("abc") from FIPS 180-2, appendix B.1.
        assert_eq!(
            content_id(b"abc"),
            "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad"
        );
        assert!(is_content_id(&content_id(b"abc")));
        assert!(!is_content_id("BA7816"));
    }

    #[test]
    fn images_and_vectors_survive_reopening() {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("images.sqlite");
        {
            let store = ImageStore::open(&path).unwrap();
            assert!(store.put_image("a", b"bytes", 2, 3).unwrap());
            assert!(!store.put_image("a", b"bytes", 2, 3).unwrap());
            store.put_vector("a", "d1", &[0.5, -0.25]).unwrap();
        }
        let store = ImageStore::open(&path).unwrap();
        assert_eq!(store.image_bytes("a").unwrap().unwrap(), b"bytes");
        assert_eq!(store.image_size("a").unwrap(), Some((2, 3)));
        assert_eq!(store.vector("a", "d1").unwrap().unwrap(), vec![0.5, -0.25]);
        assert_eq!(store.vector("a", "d2").unwrap(), None);
        assert_eq!(store.image_count().unwrap(), 1);
        assert_eq!(store.vectors("d1").unwrap().len(), 1);
    }
}

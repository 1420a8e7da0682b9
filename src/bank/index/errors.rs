//! Why the index refused or failed. Faults of the caller (a vector of the
//! wrong length, a `k` out of range) are told apart from faults of the index
//! itself (disk, the HNSW library), so the HTTP layer answers 400 for the
//! first and 500 for the second without reading messages.

use std::path::PathBuf;

use crate::bank::RowId;

/// Why the index refused or failed; each message says what to change.
#[derive(Debug, thiserror::Error)]
pub enum IndexError {
    /// The service is stopping: a graph build was given up between two
    /// inserts (the rows are safe in the store; the next start builds again).
    #[error("the index build was stopped because the service is shutting down; it is built again at the next start")]
    Stopped,
    /// A vector of the wrong length.
    #[error("the vector has {got} numbers but this index holds {expected}-long vectors (bundle digest {digest}); embed with that bundle")]
    Dimension {
        /// Length given.
        got: usize,
        /// Length expected.
        expected: usize,
        /// Digest of the index's bundle.
        digest: String,
    },
    /// A NaN or infinity in a vector.
    #[error("the vector has a non-finite number (NaN or infinity) at position {position}; the encoder output is broken")]
    NotFinite {
        /// First bad position.
        position: usize,
    },
    /// An all-zero vector.
    #[error("the vector is all zeros and has no direction to compare; send a non-zero vector")]
    Zero,
    /// A setting or a search parameter out of range. `name` is the search
    /// field (`k`, `ef_search`) or the build setting at fault.
    #[error("{name} = {value} is out of range: use {min} to {max}")]
    Setting {
        /// Setting or field name.
        name: &'static str,
        /// Value given.
        value: usize,
        /// Smallest value allowed.
        min: usize,
        /// Largest value allowed.
        max: usize,
    },
    /// An index asked for vectors of no numbers.
    #[error("an index needs vectors of at least one number (dimension 0 given)")]
    ZeroDimension,
    /// The digest is not a 64-hex string.
    #[error("bundle digest {0:?} is not 64 lowercase hex digits")]
    Digest(String),
    /// A row id the platform cannot index.
    #[error("row id {0} does not fit this platform's index ids")]
    RowId(RowId),
    /// Writing a dump failed.
    #[error("could not write the index dump under {path}: {source}; check that the data dir is writable and has free space")]
    DumpIo {
        /// Folder being written.
        path: PathBuf,
        /// The I/O error.
        #[source]
        source: std::io::Error,
    },
    /// The graph library failed to write its files.
    #[error("hnsw_rs could not dump the index into {path}: {message}")]
    DumpFailed {
        /// Folder being written.
        path: PathBuf,
        /// What the library said.
        message: String,
    },
    /// The row owner could not list its rows.
    #[error("could not read the rows to index: {0}")]
    Source(#[source] Box<dyn std::error::Error + Send + Sync>),
    /// The graph library panicked; the index keeps serving, the log has the details.
    #[error("the HNSW library failed inside {0}; use exact search meanwhile and report this")]
    Internal(&'static str),
}

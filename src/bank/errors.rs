//! Why the bank refused or failed. Faults of the caller are typed
//! ([`BankError::Invalid`] with an [`EntryProblem`], [`BankError::TooMany`],
//! index faults such as a `k` out of range) so the HTTP layer maps them
//! without reading messages; the rest are the bank's own faults.

use std::path::PathBuf;

use super::index::IndexError;
use super::store::StoreError;
use super::validation::EntryProblem;

/// Why the bank refused or failed.
#[derive(Debug, thiserror::Error)]
pub enum BankError {
    /// The SQLite store failed.
    #[error(transparent)]
    Store(#[from] StoreError),
    /// The index refused or failed.
    #[error(transparent)]
    Index(#[from] IndexError),
    /// A caption or tag that cannot be stored.
    #[error("captions[{position}]: {problem}")]
    Invalid {
        /// Position in the append.
        position: usize,
        /// What is wrong with it.
        problem: EntryProblem,
    },
    /// A vector handed with a caption is unusable (wrong length, NaN, zero).
    /// Vectors come from the bank's own bundle, so this is the encoder's
    /// fault, not the caption's.
    #[error("captions[{position}]: the caption's vector is unusable: {source}")]
    Vector {
        /// Position in the append.
        position: usize,
        /// What is wrong with it.
        #[source]
        source: IndexError,
    },
    /// Too many captions at once.
    #[error("{got} captions in one append, the limit is {limit}; send them in smaller requests")]
    TooMany {
        /// Captions sent.
        got: usize,
        /// The limit.
        limit: usize,
    },
    /// The bank was asked for a digest it has not loaded.
    #[error("the caption bank has no index loaded for bundle digest {0}; load that bundle first")]
    NotLoaded(String),
    /// A digest already loaded with another vector length.
    #[error("bundle digest {digest} is loaded with {loaded}-long vectors, not {asked}")]
    DimensionClash {
        /// Digest.
        digest: String,
        /// Length it was loaded with.
        loaded: usize,
        /// Length asked for.
        asked: usize,
    },
    /// The data dir could not be prepared.
    #[error("cannot create {path}: {source}; check the data dir is writable")]
    DataDir {
        /// Folder.
        path: PathBuf,
        /// The I/O error.
        #[source]
        source: std::io::Error,
    },
}

impl BankError {
    /// The request field at fault for [`BankError::Invalid`]: `captions[i]`,
    /// or `captions[i].tag` when the tag is.
    pub fn field(&self) -> Option<String> {
        match self {
            BankError::Invalid { position, problem } if problem.is_tag() => {
                Some(format!("captions[{position}].tag"))
            }
            BankError::Invalid { position, .. } => Some(format!("captions[{position}]")),
            _ => None,
        }
    }
}

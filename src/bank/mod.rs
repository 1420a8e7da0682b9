//! The caption bank: captions stored once in SQLite with their tags and one
//! embedding per bundle digest, and per digest an HNSW index (with an exact
//! scan beside it) to find the captions nearest a vector.
//!
//! - [`caption_bank`]: [`CaptionBank`], the bank of one data dir and the
//!   digests loaded so far.
//! - [`model_bank`]: [`ModelBank`], the bank as one bundle sees it: append,
//!   search, look up.
//! - [`validation`]: what a caption and a tag may be; [`errors`]: [`BankError`].
//! - [`store`]: the SQLite file, the source of truth (durable appends).
//! - [`index`]: the "row id -> vector" index, generic so registered images can
//!   use it too; [`exact`] is its exact scan, [`distance`] the graph's metric.
//! - [`dump`]: the index's crash-safe folder on disk, loaded at start.
//! - [`import`]: JSON Lines import and the embedding of captions a new bundle
//!   lacks, batched and resumable; [`progress`] is how they report.
//! - [`recall`] and [`synthetic`]: the recall measure and seeded test banks
//!   shared by the tests and `bench/retrieval`.
//!
//! The service opens one [`CaptionBank`] under its data dir, asks it for the
//! [`ModelBank`] of each loaded bundle (loading or building that digest's
//! index), and calls [`CaptionBank::dump`] on a timer and at shutdown.

pub mod caption_bank;
pub mod distance;
pub mod dump;
pub mod errors;
pub mod exact;
pub mod import;
pub mod index;
pub mod model_bank;
pub mod progress;
pub mod recall;
pub mod store;
pub mod synthetic;
pub mod validation;

use std::collections::{HashMap, HashSet};
use std::sync::{RwLock, RwLockReadGuard, RwLockWriteGuard};

use serde::Serialize;

pub use caption_bank::{BankStats, CaptionBank};
pub use errors::BankError;
pub use exact::Neighbour;
pub use import::{embed_missing, import_jsonl, ImportError, ImportReport};
pub use index::{
    Answered, DumpReport, IndexBackend, IndexError, IndexParams, IndexStats, LoadReport, RowSource,
    Search, SearchMode, VectorIndex,
};
pub use model_bank::{Appended, BankAnswer, BankHit, BankQuery, ModelBank, NewCaption};
pub use progress::ImportProgress;
pub use store::{Caption, CaptionStore, StoreError};
pub use validation::{check_caption, check_tag, EntryProblem, MAX_TAG_BYTES};

/// Longest caption accepted, in bytes of UTF-8: the service's
/// `--max-caption-bytes` default, defined with the other request limits.
pub use crate::intake::limits::DEFAULT_MAX_CAPTION_BYTES;

/// Id of a row: for the bank, a caption id (shared by every bundle).
pub type RowId = u64;

/// File name of the bank's SQLite file under the data dir.
pub const BANK_FILE: &str = "bank.sqlite";

/// Folder (under the data dir) holding one dump folder per bundle digest.
pub const INDEX_DIR: &str = "bank-index";

/// Most captions in one append: one request's captions, so the service's
/// `--max-captions` default.
pub const DEFAULT_MAX_APPEND: usize = crate::intake::limits::DEFAULT_MAX_CAPTIONS;

/// Bank settings; every default is a named constant.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
pub struct BankConfig {
    /// Index build and search settings.
    pub index: IndexParams,
    /// Longest caption ([`DEFAULT_MAX_CAPTION_BYTES`]).
    pub max_caption_bytes: usize,
    /// Most captions per append ([`DEFAULT_MAX_APPEND`]).
    pub max_append: usize,
}

impl Default for BankConfig {
    fn default() -> Self {
        Self {
            index: IndexParams::default(),
            max_caption_bytes: DEFAULT_MAX_CAPTION_BYTES,
            max_append: DEFAULT_MAX_APPEND,
        }
    }
}

/// What every model's bank shares: the store, the limits and the tag sets.
struct Core {
    store: CaptionStore,
    config: BankConfig,
    tags: RwLock<HashMap<String, HashSet<RowId>>>,
}

fn read<T>(l: &RwLock<T>) -> RwLockReadGuard<'_, T> {
    l.read().unwrap_or_else(|e| e.into_inner())
}

fn write<T>(l: &RwLock<T>) -> RwLockWriteGuard<'_, T> {
    l.write().unwrap_or_else(|e| e.into_inner())
}

#[cfg(test)]
mod tests;

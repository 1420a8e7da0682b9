//! How the bank's long jobs report where they are: a callback after each
//! committed batch. The bank draws nothing; `befit bank import` and
//! `befit bank embed-missing` draw a bar from it (`cli::progress`), and the
//! server's backfill keeps the counts that `GET /v1/bank` shows.

use serde::Serialize;

/// Where an import is, passed to its [`ImportReporter`] after each batch.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default, Serialize)]
pub struct ImportProgress {
    /// Bytes of the file consumed.
    pub bytes_read: u64,
    /// Size of the file (0 when unknown).
    pub total_bytes: u64,
    /// Lines read.
    pub lines: u64,
    /// Captions embedded and stored.
    pub added: u64,
    /// Captions skipped because the bank already had them for this bundle.
    pub present: u64,
    /// Lines that could not be used.
    pub bad: u64,
}

/// Told where [`super::import_jsonl`] is after every committed batch, and
/// once more at the end of the file.
pub type ImportReporter<'a> = dyn FnMut(&ImportProgress) + 'a;

/// Told how many captions [`super::embed_missing`] has embedded so far,
/// after every committed batch.
pub type EmbedReporter<'a> = dyn FnMut(u64) + 'a;

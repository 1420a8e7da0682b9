//! Labelled probe sets: images with true captions and one-fact contrasts, read
//! from JSON Lines ([`ProbeSet::load`]) and embedded by one bundle
//! ([`embed_probe`]) into the [`ProbeVectors`](crate::stats::ProbeVectors)
//! that calibration and drift read.
//!
//! - [`set`]: the rows in memory.
//! - [`load`]: JSON Lines in, every bad row reported by line.
//! - [`embed`]: rows to vectors in batches, finding the row an encoder
//!   failure comes from, stopping between batches when [`cancel`]led.
//! - [`thumbnails`]: previews of the images a report shows as examples.

use std::fmt;
use std::path::PathBuf;

pub mod cancel;
pub mod embed;
pub mod load;
pub mod set;
pub mod thumbnails;

pub use embed::{embed_probe, EmbedOptions, EmbeddedProbe, ImageFiles, ProbeEncoder};
pub use load::{LoadOptions, LoadedProbe};
pub use set::{Contrast, ImageSource, ProbeRow, ProbeSet};
pub use thumbnails::thumbnails;

/// Most bad rows kept in a [`ProbeError::BadRows`]; the rest are only
/// counted, so a wholly wrong file does not make a message of megabytes.
pub const MAX_LISTED_BAD_ROWS: usize = 50;

/// What is wrong with one probe row.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum RowProblem {
    /// Not a JSON object of the row shape.
    #[error("not a probe row ({0}); expected {{\"image\": \"path\", \"captions\": [\"...\"], \"contrasts\": [...]}}")]
    InvalidJson(String),
    /// The `image` field is not usable.
    #[error("{0}")]
    BadImage(String),
    /// The image file does not exist.
    #[error("image file {} does not exist; paths are relative to the probe file's folder", .0.display())]
    MissingImage(PathBuf),
    /// No true caption.
    #[error("\"captions\" is empty; give at least one true caption")]
    NoCaptions,
    /// An empty true caption.
    #[error("caption {index} is empty; remove it or write the caption")]
    EmptyCaption {
        /// Index in `captions`.
        index: usize,
    },
    /// An empty contrast caption.
    #[error("contrast {index} has an empty caption")]
    EmptyContrast {
        /// Index in `contrasts`.
        index: usize,
    },
    /// An empty `changed` label.
    #[error("contrast {index} has an empty \"changed\" label; name what was changed (colour, shape, size, relation, count...)")]
    EmptyLabel {
        /// Index in `contrasts`.
        index: usize,
    },
    /// `from` names no caption of the row.
    #[error("contrast {index} alters caption {from}, but the row has {captions} caption(s); \"from\" counts from 0")]
    FromOutOfRange {
        /// Index in `contrasts`.
        index: usize,
        /// The `from` given.
        from: usize,
        /// Captions in the row.
        captions: usize,
    },
    /// The encoder failed on this row's image (e.g. it does not decode).
    #[error("the image could not be embedded: {0}; fix or replace the file")]
    Image(String),
    /// The encoder failed on one of this row's captions.
    #[error("a caption could not be embedded: {0}")]
    Text(String),
}

/// One bad row and where it is.
#[derive(Debug, Clone, PartialEq)]
pub struct RowIssue {
    /// 1-based line in the probe file.
    pub line: usize,
    /// What is wrong.
    pub problem: RowProblem,
}

impl fmt::Display for RowIssue {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(f, "line {}: {}", self.line, self.problem)
    }
}

/// Why a probe set could not be read or embedded.
#[derive(Debug, thiserror::Error)]
pub enum ProbeError {
    /// The file could not be read.
    #[error("cannot read probe set {}: {source}; check the path", path.display())]
    Read {
        /// The file.
        path: PathBuf,
        /// The cause.
        source: std::io::Error,
    },
    /// Some rows are bad and skipping was not asked for.
    #[error("{}", bad_rows_message(source_name, issues, *total))]
    BadRows {
        /// The probe set, for the message.
        source_name: String,
        /// The first [`MAX_LISTED_BAD_ROWS`] bad rows, by line.
        issues: Vec<RowIssue>,
        /// How many rows are bad in all.
        total: usize,
    },
    /// No usable row.
    #[error("probe set {source_name} has no usable rows ({skipped} skipped as bad); each line needs {{\"image\": ..., \"captions\": [...]}}")]
    Empty {
        /// The probe set.
        source_name: String,
        /// Rows skipped as bad.
        skipped: usize,
    },
    /// The encoder failed in a way no single row explains.
    #[error("the {tower} encoder failed on lines {first_line} to {last_line}, and on each of them alone too, so the encoder rather than the rows is likely at fault: {message}")]
    Encoder {
        /// `image` or `text`.
        tower: &'static str,
        /// First line of the failing batch.
        first_line: usize,
        /// Last line of the failing batch.
        last_line: usize,
        /// The encoder's message.
        message: String,
    },
    /// Whoever asked has gone (a request timed out or its client hung up):
    /// the work stopped between two encoder batches.
    #[error("stopped: whoever asked for this probe set's vectors has gone")]
    Cancelled,
    /// The encoder returned an array of the wrong shape.
    #[error("the {tower} encoder returned {got:?} for a batch of {want_rows} of dimension {want_dimension}; the bundle's declared dimension does not match its graph")]
    Shape {
        /// `image` or `text`.
        tower: &'static str,
        /// Shape returned.
        got: (usize, usize),
        /// Rows asked for.
        want_rows: usize,
        /// Declared dimension.
        want_dimension: usize,
    },
}

impl ProbeError {
    /// A [`ProbeError::BadRows`] keeping the first [`MAX_LISTED_BAD_ROWS`] issues.
    pub(crate) fn bad_rows(source: &str, mut issues: Vec<RowIssue>) -> Self {
        let total = issues.len();
        issues.truncate(MAX_LISTED_BAD_ROWS);
        ProbeError::BadRows {
            source_name: source.to_string(),
            issues,
            total,
        }
    }
}

fn bad_rows_message(source: &str, issues: &[RowIssue], total: usize) -> String {
    let mut m = format!("probe set {source} has {total} bad row(s):");
    for issue in issues {
        m.push_str(&format!("\n  {issue}"));
    }
    if total > issues.len() {
        m.push_str(&format!("\n  ... and {} more", total - issues.len()));
    }
    m.push_str("\nfix these rows, or skip them (--skip-bad) to go on without them");
    m
}
